"""Write a loaded model as portable C99 source (the C target, docs/c-target.md).

    from boxwood_runtime import load
    from boxwood_runtime.csource import generate
    c_text, h_text = generate(load("model.json"), prefix="pump")

The model has already been validated by :func:`boxwood_runtime.scorer.load`; this module
only lays its arrays out as C tables under the fixed scoring code in
:mod:`boxwood_runtime.c_engine`. Only integers, hexadecimal float literals and escaped string
literals reach the C text; names and labels from the file go into string literals and into
one JSON comment with every ``/`` and ``?`` written as ``\\u`` escapes, so no name can open or end a comment or form a
trigraph.

Inputs: ``x[j]`` is input ``j`` in the order of ``PREFIX_input_names`` (the features, or a
pipeline's raw fields), NaN for missing; a categorical feature with numeric categories takes
the category value; one with text categories takes the category's position (0, 1, ...) among
that feature's categories (C has no strings to match; ``PREFIX_category_labels`` lists the
categorical features' labels one feature after another, in input order). A pipeline whose steps work on text
(imputing a string, encoding text categories) is refused with :class:`CTargetError` naming
the field and the step.

Standard library only (Python 3.8+), like the rest of the device side.
"""
import hashlib
import json
import math
import re

from .c_engine import ENGINE
from .scorer import SCORER_VERSION

C_TARGET_VERSION = 1
MARKER = "boxwood C target, version %d" % C_TARGET_VERSION
TRANSFORM_CODES = {"identity": 0, "exp": 1, "logistic": 2, "logistic_double": 3, "softmax": 4, "samme": 5,
                   "isolation": 6}
TASK_CODES = {"regression": 0, "classification": 1, "outlier_detection": 2}
BINARY_RULE_CODES = {None: 0, "raw_gt_0": 1, "raw_ge_0": 2}
TARGET_STEP_CODES = {"exp": 0, "expm1": 1, "mul": 2, "add": 3, "sub": 4, "div": 5}  # c_engine's PFX_target
ERROR_CODES = (("OK", 0, "the record was scored"),
               ("ERR_MISSING", 1, "a value is missing (NaN) and this model does not accept missing values"),
               ("ERR_INFINITE", 2, "a value is infinite, or outside float's range where the model compares "
                                   "in float, and this model does not accept it"),
               ("ERR_CATEGORY", 3, "a value is not one of a categorical feature's categories (or an encoder "
                                   "that refuses unknown values meets one)"),
               ("ERR_MODEL", 4, "the tables are damaged (a walk deeper than the model's depth)"))
C_KEYWORDS = frozenset((
    "auto break case char const continue default do double else enum extern float for goto if inline int "
    "long register restrict return short signed sizeof static struct switch typedef union unsigned void "
    "volatile while _Bool _Complex _Imaginary").split())
MAX_LABEL = 4000  # characters in one string literal (C99 guarantees 4095)
CAUTION = (
    "CAUTION: the outputs are advisory. Where they drive equipment that can hurt someone, the safety\n"
    "functions need their own engineering under the applicable standards and local codes; this code is\n"
    "not a safety function.")


def engine_id():
    """A short SHA-256 of the fixed scoring code: a file names the code it was written with."""
    return "sha256:" + hashlib.sha256(ENGINE.encode("utf-8")).hexdigest()[:16]


class CTargetError(ValueError):
    """The model cannot be written as C (the message names the feature, field or step), or a
    C prefix is not a usable identifier."""


def prefix_from(stem, prefix=None):
    """The C prefix: ``prefix`` if given (checked), else the file stem made an identifier."""
    if prefix is not None:
        if not re.match(r"^[A-Za-z][A-Za-z0-9_]*$", prefix) or prefix in C_KEYWORDS or len(prefix) > 40:
            raise CTargetError("the C prefix %r is not a usable identifier (a letter, then letters, digits or "
                               "_; at most 40 characters; not a C keyword)" % (prefix,))
        return prefix
    name = re.sub(r"[^A-Za-z0-9_]", "_", stem)[:40] or "model"
    if not name[0].isalpha():
        name = "m_" + name
    return name[:40] if name not in C_KEYWORDS else name + "_model"


def c_double(v):
    """A double as an exact C99 literal: hexadecimal for finite values, else a math.h macro."""
    if v != v:
        return "NAN"
    if math.isinf(v):
        return "INFINITY" if v > 0 else "-INFINITY"
    return float(v).hex()


def c_string(text):
    """A C string literal holding ``text`` as UTF-8 (printable ASCII kept; the rest, and
    ``"``, ``\\`` and ``?``, escaped)."""
    out = []
    for b in text.encode("utf-8"):
        ch = chr(b)
        if ch in '"\\?' or b < 32 or b > 126:
            out.append("\\%03o" % b)
        else:
            out.append(ch)
    return '"%s"' % "".join(out)


def _int_type(lo, hi):
    for name, a, b in (("int8_t", -128, 127), ("uint8_t", 0, 255), ("int16_t", -32768, 32767),
                       ("uint16_t", 0, 65535), ("int32_t", -2 ** 31, 2 ** 31 - 1)):
        if a <= lo and hi <= b:
            return name
    raise CTargetError("a table value (%d..%d) does not fit a 32-bit integer" % (lo, hi))


def _table(lines, ctype, name, values, fmt, static=True, per_line=8):
    values = list(values)
    if not values:
        values = [0]  # C has no empty arrays; the count macro says how many are used
    lines.append("%sconst %s %s[%d] = {" % ("static " if static else "", ctype, name, len(values)))
    for i in range(0, len(values), per_line):
        lines.append("    " + ", ".join(fmt(v) for v in values[i:i + per_line]) + ",")
    lines.append("};")


def _label_text(v):
    return v if isinstance(v, str) else repr(v)


def _check_label(text, what):
    if len(text) > MAX_LABEL:
        raise CTargetError("%s is %d characters long; the C target keeps labels under %d"
                           % (what, len(text), MAX_LABEL))


def describe_refusal(model):
    """None when ``model`` can be written as C, else the reason (naming field and step)."""
    try:
        _plan(model)
    except CTargetError as exc:
        return str(exc)
    return None


# The C step kinds of an arithmetic step's operations (c_engine.ENGINE, PFX_prepare).
ARITHMETIC_KINDS = {"sub": 3, "div": 4, "mul": 5, "add": 6, "clip": 7}


def _plan(model):
    """Per tree feature: (source field index or None, steps as tuples, categories or None, text?)."""
    doc_feats = model.doc["inputs"]["features"]
    plan = []
    for j in range(model.n_features):
        cats = model.categories[j]
        text = cats is not None and any(isinstance(c, str) for c in cats)
        if text and not all(isinstance(c, str) for c in cats):
            raise CTargetError("feature %r mixes text and number categories, which C cannot tell apart"
                               % model.feature_names[j])
        steps = []
        field = None
        if model.preprocesses:
            field, raw_steps = model._sources[j]
            src = doc_feats[j]["source"]
            where = "field %r (feature %r)" % (src["field"], model.feature_names[j])
            for k, step in enumerate(src["steps"]):
                if step["op"] == "impute":
                    if isinstance(step["value"], str):
                        raise CTargetError("%s: step %d imputes the text %r; the C target takes numbers only "
                                           "(export the tree part and encode text on the host, or use the "
                                           "JSON artefact)" % (where, k + 1, step["value"]))
                    if step.get("replaces", "nan") != "nan":
                        raise CTargetError("%s: step %d imputes Python None, which a C double cannot carry"
                                           % (where, k + 1))
                    steps.append(("impute", float(step["value"])))
                    continue
                if step["op"] == "arithmetic":  # one table row per operation; flag 4 starts the step
                    for n, op in enumerate(step["sequence"]):
                        steps.append(("arithmetic", op[0], float(op[1]), float(op[2]) if op[0] == "clip" else 0.0,
                                      n == 0))
                    continue
                if any(isinstance(c, str) for c in step["categories"]):
                    raise CTargetError("%s: step %d encodes text categories (%s); the C target takes numbers "
                                       "only (use the JSON artefact on a box that has Python, or encode on "
                                       "the host)" % (where, k + 1, ", ".join(repr(c) for c in step["categories"][:5])))
                if "none" in step and step["op"] == "lookup":
                    raise CTargetError("%s: step %d gives Python None its own value, which a C double cannot "
                                       "carry" % (where, k + 1))
                unknown = step["unknown"]
                codes = [float(c) for c in step["categories"]]
                steps.append((step["op"], codes,
                              "error" if unknown == "error" else (math.nan if unknown is None else float(unknown)),
                              "missing" in step,
                              math.nan if step.get("missing") is None else float(step["missing"]),
                              [float(v) for v in step["values"]] if step["op"] == "lookup"
                              else [float(i) for i in range(len(codes))]))
        plan.append((field, steps, cats, text))
    return plan


def _meta(model, plan):
    doc = model.doc
    feats = []
    for j, (_, _, cats, text) in enumerate(plan):
        feats.append({"name": model.feature_names[j], "kind": "numeric" if cats is None else "categorical",
                      "text_categories": bool(text)})
    meta = {"format": MARKER, "scorer_version": SCORER_VERSION, "task": model.task, "features": feats,
            "fields": list(model.input_names) if model.preprocesses else None,
            "classes": model.classes, "output_names": list(model.output_names),
            "provenance": doc.get("provenance", {}), "self_check": doc.get("self_check"),
            "source_digest": doc.get("boxwood_digest"), "engine": engine_id()}
    text = json.dumps(meta, ensure_ascii=True, sort_keys=True, allow_nan=False, separators=(",", ":"))
    return text.replace("/", "\\u002f").replace("?", "\\u003f")


def generate(model, prefix="model"):
    """(C source text, header text) for the loaded ``model`` with the C prefix ``prefix``.

    Raises :class:`CTargetError` when the model needs what C cannot carry (text steps)."""
    prefix = prefix_from(prefix, prefix)
    plan = _plan(model)
    up = prefix.upper()
    doc = model.doc
    ens = doc["ensemble"]
    trees = ens["trees"]
    k = model.n_outputs
    n_exact = model.n_exact_values
    n_inputs = len(model.input_names)
    params = model.post_transform_params

    # -- flatten the trees: absolute node indexes, a tree's nodes in file order ------------
    roots, outputs, feature, left, right, value, flags = [], [], [], [], [], [], []
    catset = []
    cat_words = {}
    max_depth = 0
    for t in trees:
        base = len(feature)
        roots.append(base)
        outputs.append(t["output"])
        sets = t.get("left_categories", {})
        for i, f in enumerate(t["feature"]):
            feature.append(f)
            if f < 0:
                left.append(-1)
                right.append(-1)
                value.append(float(_num(t["value"][i])))
                flags.append(0)
                continue
            left.append(base + t["left"][i])
            right.append(base + t["right"][i])
            flag = 1 if t["missing_left"][i] else 0
            cats = model.categories[f]
            if cats is None:
                value.append(float(_num(t["threshold"][i])))
            else:
                flag |= 2
                words = cat_words.setdefault(f, (len(cats) + 31) // 32)
                offset = len(catset)
                bits = [0] * words
                for c in sets[str(i)]:
                    bits[c // 32] |= 1 << (c % 32)
                catset.extend(bits)
                value.append(float(offset))
            flags.append(flag)
        max_depth = max(max_depth, _depth(t))
    if not trees:  # no trees: one unused leaf keeps the tables legal C
        roots, outputs, feature, left, right, value, flags = [0], [0], [-1], [-1], [-1], [0.0], [0]
    has_cats = any(c is not None for c in model.categories)
    has_steps = model.preprocesses

    lines = []
    macros = [
        ("N_TREE_FEATURES", str(model.n_features)), ("N_RAW", str(k)), ("N_TREES", str(len(trees))),
        ("N_NODES", str(len(feature))), ("MAX_DEPTH", str(max_depth)), ("TASK", str(TASK_CODES[model.task])),
        ("COMPARE_FLOAT32", "1" if model.compare_precision == "float32" else "0"),
        ("MISSING_REJECT", "1" if model.missing_values == "reject" else "0"),
        ("ACCEPTS_INFINITY", "1" if model.accepts_infinity else "0"),
        ("COMBINE_MEAN", "1" if model.combine == "mean" else "0"),
        ("TRANSFORM", str(TRANSFORM_CODES[model.post_transform])),
        ("SOFTMAX_PAIRWISE", "1" if model.softmax_sum == "pairwise" else "0"),
        ("BINARY_RULE", str(BINARY_RULE_CODES[model.binary_rule])),
        ("HAS_CATEGORIES", "1" if has_cats else "0"), ("HAS_STEPS", "1" if has_steps else "0"),
        ("WEIGHT_TOTAL", c_double(params.get("weight_total", 0.0))),
        ("DENOMINATOR", c_double(params.get("denominator", 0.0))),
        ("OFFSET", c_double(params.get("offset", 0.0))),
        ("N_TARGET_STEPS", str(len(model.target_steps))),
        ("CALIBRATED", "1" if model.calibration is not None else "0"),
    ]
    cal = model.calibration
    if cal is not None:  # CalibratedClassifierCV (docs/calibration.md)
        n_cls = len(model.classes)
        n_folds = len(cal["folds"])
        macros += [("N_FOLDS", str(n_folds)), ("FOLD_RAW", str(k // n_folds)),
                   ("FOLD_EXACT", str(n_exact // n_folds)), ("N_CAL_CLASSES", str(n_cls)),
                   ("CAL_PROBABILITY", "1" if cal["response"] == "probability" else "0"),
                   ("CAL_ROW_SUM", "1" if cal["normalisation"] == "row_sum" else "0")]
    lines.append("/* ---- model tables: what boxwood verify reads back ---- */")
    for name, v in macros:
        lines.append("#define %s_%s %s" % (up, name, v))
    _table(lines, "double", "PFX_base", model.base_values, c_double)
    _table(lines, _int_type(0, max(roots)), "PFX_root", roots, str)
    _table(lines, _int_type(0, max(outputs)), "PFX_tree_output", outputs, str)
    _table(lines, _int_type(-1, max(feature)), "PFX_feature", feature, str)
    _table(lines, _int_type(-1, max(left + right)), "PFX_left", left, str)
    _table(lines, _int_type(-1, max(left + right)), "PFX_right", right, str)
    _table(lines, "double", "PFX_value", value, c_double, per_line=4)
    _table(lines, "uint8_t", "PFX_flags", flags, str, per_line=16)
    if cal is not None:
        methods, cal_a, cal_b, knot_start, knot_x, knot_y = [], [], [], [0], [], []
        for params_f, cals in cal["folds"]:
            for one in cals:
                if one[0] == "sigmoid":
                    methods.append(1)
                    cal_a.append(one[1])
                    cal_b.append(one[2])
                else:
                    methods.append(0)
                    cal_a.append(0.0)
                    cal_b.append(0.0)
                    knot_x.extend(one[1])
                    knot_y.extend(one[2])
                knot_start.append(len(knot_x))
        if model.post_transform == "samme":  # AdaBoost: each fold's own total weight
            _table(lines, "double", "PFX_cal_weight", [p["weight_total"] for p, _ in cal["folds"]], c_double,
                   per_line=4)
        _table(lines, "uint8_t", "PFX_cal_method", methods, str, per_line=16)
        _table(lines, "double", "PFX_cal_a", cal_a, c_double, per_line=4)
        _table(lines, "double", "PFX_cal_b", cal_b, c_double, per_line=4)
        _table(lines, _int_type(0, knot_start[-1]), "PFX_cal_knot_start", knot_start, str)
        _table(lines, "double", "PFX_cal_x", knot_x, c_double, per_line=4)
        _table(lines, "double", "PFX_cal_y", knot_y, c_double, per_line=4)
    if model.combine == "mean":
        counts = [outputs.count(j) if trees else 0 for j in range(k)]
        _table(lines, _int_type(0, max(counts)), "PFX_trees_per_output", counts, str)
    if model.target_steps:  # per step its op code, and one constant per output (0 for exp, expm1)
        _table(lines, "uint8_t", "PFX_target_op", [TARGET_STEP_CODES[op] for op, _ in model.target_steps], str,
               per_line=16)
        _table(lines, "double", "PFX_target_value", [v for op, c in model.target_steps for v in (c or [0.0] * k)],
               c_double, per_line=4)
    labels = []
    if has_cats:
        starts, values, unseen = [0], [], []
        for j, (_, _, cats, text) in enumerate(plan):
            if cats is not None:
                values.extend(float(i) if text else float(c) for i, c in enumerate(cats))
                for c in cats:
                    _check_label(_label_text(c), "a category of feature %r" % model.feature_names[j])
                    labels.append(_label_text(c))
            starts.append(len(values))
            unseen.append(1 if model._unseen_missing[j] else 0)
        _table(lines, _int_type(0, starts[-1]), "PFX_cat_start", starts, str)
        _table(lines, "double", "PFX_cat_value", values, c_double, per_line=4)
        _table(lines, "uint8_t", "PFX_cat_unseen_missing", unseen, str, per_line=16)
        _table(lines, "uint32_t", "PFX_catset", catset, lambda w: "0x%08xu" % w, per_line=6)
    if has_steps:
        fields, starts, kinds, svalue, sflags, smissing, sunknown, cstart, cvals = [], [0], [], [], [], [], [], [0], []
        results = []
        for field, steps, _, _ in plan:
            fields.append(field)
            for st in steps:
                if st[0] == "impute":
                    kinds.append(0)
                    svalue.append(st[1])
                    sflags.append(0)
                    smissing.append(0.0)
                    sunknown.append(0.0)
                elif st[0] == "arithmetic":  # kinds 3..7: sub, div, mul, add, clip (high bound in step_unknown)
                    _, name, c, hi, first = st
                    kinds.append(ARITHMETIC_KINDS[name])
                    svalue.append(c)
                    sflags.append(4 if first else 0)
                    smissing.append(0.0)
                    sunknown.append(hi)
                else:
                    op, cats, unknown, has_missing, missing, values = st
                    kinds.append(1 if op == "encode" else 2)
                    svalue.append(0.0)
                    sflags.append((1 if has_missing else 0) | (2 if unknown == "error" else 0))
                    smissing.append(missing if has_missing else 0.0)
                    sunknown.append(0.0 if unknown == "error" else unknown)
                    cvals.extend(cats)
                    results.extend(values)
                cstart.append(len(cvals))
            starts.append(len(kinds))
        if not kinds:  # a pipeline of pass-through fields: keep the step tables legal C
            kinds, svalue, sflags, smissing, sunknown, cstart = [0], [0.0], [0], [0.0], [0.0], [0, 0]
        _table(lines, _int_type(0, max(fields)), "PFX_source_field", fields, str)
        _table(lines, _int_type(0, starts[-1] + 1), "PFX_step_start", starts, str)
        _table(lines, "uint8_t", "PFX_step_kind", kinds, str, per_line=16)
        _table(lines, "double", "PFX_step_value", svalue, c_double, per_line=4)
        _table(lines, "uint8_t", "PFX_step_flags", sflags, str, per_line=16)
        _table(lines, "double", "PFX_step_missing", smissing, c_double, per_line=4)
        _table(lines, "double", "PFX_step_unknown", sunknown, c_double, per_line=4)
        _table(lines, _int_type(0, cstart[-1] + 1), "PFX_step_cat_start", cstart, str)
        _table(lines, "double", "PFX_step_cat", cvals, c_double, per_line=4)
        _table(lines, "double", "PFX_step_cat_value", results, c_double, per_line=4)
    for name in model.input_names:
        _check_label(name, "the input name %r" % name[:60])
    _table(lines, "char *const", "PFX_input_names", model.input_names, c_string, static=False, per_line=1)
    n_classes = len(model.classes) if model.classes else 0
    if n_classes:
        for c in model.classes:
            _check_label(_label_text(c), "a class label")
        _table(lines, "char *const", "PFX_class_labels", [_label_text(c) for c in model.classes], c_string,
               static=False, per_line=1)
    if labels:
        _table(lines, "char *const", "PFX_category_labels", labels, c_string, static=False, per_line=1)

    title = "%s model" % model.task.replace("_", " ")
    head = [
        "/* %s: %s.c, a %s compiled to C99 by boxwood %s." % (MARKER, prefix, title, SCORER_VERSION),
        " * Generated: boxwood verify reads the tables back and checks the scoring code byte for byte;",
        " * change the model and export again instead of editing this file.",
        " *",
    ] + [" * " + line for line in CAUTION.split("\n")] + [
        " *",
        " * model: " + _meta(model, plan),
        " */",
        '#include "%s.h"' % prefix,
        "#include <float.h>",
        "#include <math.h>",
        "#include <stdint.h>",
        "",
    ]
    c_text = "\n".join(head + lines) + "\n" + ENGINE
    c_text = c_text.replace("PFXU_", up + "_").replace("PFX_", prefix + "_")
    h_text = header(prefix, model.task, model.preprocesses, n_inputs, n_exact,
                    n_classes if cal is not None else model.n_outputs, n_classes, bool(labels), cal is not None)
    return c_text, h_text


def header(prefix, task, preprocesses, n_inputs, n_exact, n_predictions, n_classes, has_labels, calibrated=False):
    """The text of PREFIX.h (the reader rebuilds it to check a header byte for byte)."""
    up = prefix.upper()
    inputs = "the features" if not preprocesses else "the raw fields (the pipeline's steps run in C)"
    out = ["/* %s: %s.h, the interface of the scoring code." % (MARKER, prefix), " *"]
    out += [" * " + line for line in CAUTION.split("\n")]
    out += [
        " *",
        " * x[j] is input j, in the order of %s_input_names: %s. NaN means missing." % (prefix, inputs),
        " * A categorical input with numeric categories carries the category value; one with text",
        " * categories carries the category's position (0, 1, ...) among that feature's categories;",
        " * %s_category_labels lists the categorical inputs' labels one input after another." % prefix,
        " * Every function returns %s_OK (0) or one of the %s_ERR_ codes below; on an error" % (up, up),
        " * nothing is written for that record.",
        " */",
        "#ifndef %s_H_INCLUDED" % up,
        "#define %s_H_INCLUDED" % up,
        "",
        "#include <stddef.h>",
        "",
        "#ifdef __cplusplus",
        'extern "C" {',
        "#endif",
        "",
        "#define %s_N_FEATURES %d /* values in x */" % (up, n_inputs),
        "#define %s_N_OUTPUTS %d /* values %s_raw writes (decision_function's columns) */" % (up, n_exact, prefix),
        "#define %s_N_PREDICTIONS %d /* values %s_predict writes */" % (up, n_predictions, prefix),
    ]
    if n_classes:
        out.append("#define %s_N_CLASSES %d /* labels in %s_class_labels */" % (up, n_classes, prefix))
    for name, code, what in ERROR_CODES:
        out.append("#define %s_%s %d /* %s */" % (up, name, code, what))
    what = {"regression": "predictions", "classification": "class probabilities (a binary model with one "
            "raw score: the positive class's)", "outlier_detection": "score_samples"}[task]
    if calibrated:
        what = "calibrated class probabilities of all classes (CalibratedClassifierCV.predict_proba)"
    out += [
        "",
        "/* Raw scores: bit for bit what the source model computes before its output transform. */",
        "int %s_raw(const double *x, double *raw);" % prefix,
        "/* %s. */" % (what[0].upper() + what[1:]),
        "int %s_predict(const double *x, double *out);" % prefix,
    ]
    if n_classes:
        out += ["/* The predicted class: an index into %s_class_labels. */" % prefix,
                "int %s_label(const double *x, int *label);" % prefix]
    out += [
        "/* n records, row after row in x: raw, out, label and status may each be NULL. A record",
        " * that cannot be scored gets NaN values, label -1 and its code in status; returns how",
        " * many could not be scored. */",
        "size_t %s_score_many(size_t n, const double *x, double *raw, double *out, int *label, int *status);"
        % prefix,
        "/* The native batch engine's entry: the raw sums for n rows of prepared values (category",
        " * codes, float-rounded where the model compares in float; see docs/c-target.md). */",
        "size_t %s_walk_many(size_t n, const double *v, double *sums);" % prefix,
        "",
        "extern const char *const %s_input_names[%d];" % (prefix, n_inputs),
    ]
    if n_classes:
        out.append("extern const char *const %s_class_labels[%d];" % (prefix, n_classes))
    if has_labels:
        out.append("extern const char *const %s_category_labels[];" % prefix)
    out += ["", "#ifdef __cplusplus", "}", "#endif", "", "#endif", ""]
    return "\n".join(out)


def _num(v):
    if isinstance(v, str):
        return {"inf": math.inf, "-inf": -math.inf}[v]
    return v


def _depth(tree):
    feature, left, right = tree["feature"], tree["left"], tree["right"]
    best = 0
    stack = [(0, 0)]
    while stack:
        node, d = stack.pop()
        if feature[node] < 0:
            best = max(best, d)
        else:
            stack.append((left[node], d + 1))
            stack.append((right[node], d + 1))
    return best
