"""Read a C target file (``NAME.c``) back into the hub by parsing what the compiler compiles.

Never trusting the writer: everything that decides a number is read from the C text the
compiler sees, the ``#define`` lines and the ``const`` tables, and the scoring code below them
must equal :data:`boxwood_runtime.c_engine.ENGINE` byte for byte (with the file's prefix). The
JSON comment at the top supplies only what computes nothing: names, class labels, provenance
and the reference rows. The tables section may hold nothing but those defines and tables; any
other line is refused, so nothing can hide between them.
"""
from __future__ import annotations

import json
import math
import re
from pathlib import Path
from typing import Any, Dict, List, Optional, Tuple, Union

from boxwood_runtime.c_engine import ENGINE
from boxwood_runtime.csource import (ARITHMETIC_KINDS, BINARY_RULE_CODES, MARKER, TARGET_STEP_CODES, TASK_CODES,
                                     TRANSFORM_CODES, engine_id)

from ...ir import LEAF, Ensemble, Feature, ModelError, Reference, Tree
from ..registry import DamagedArtefact, FormatError

TABLES_START = "/* ---- model tables: what boxwood verify reads back ---- */"
ENGINE_START = "/* ---- scoring code: the same for every model (boxwood verify checks it byte for byte) ---- */"
MAX_BYTES = 1 << 30
_DEFINE = re.compile(r"^#define ([A-Za-z][A-Za-z0-9_]*) (\S+)$")
_TABLE = re.compile(r"^(static )?const (double|u?int(?:8|16|32)_t|char \*const) ([A-Za-z][A-Za-z0-9_]*)\[(\d+)\] = \{$")
_HEX = re.compile(r"^-?0x[0-9a-f]\.[0-9a-f]*p[+-]\d+$")
_INT = re.compile(r"^-?\d+$")
_WORD = re.compile(r"^0x[0-9a-f]{8}u$")
_STRING = re.compile(r'^"((?:[ !#-\[\]-~]|\\[0-7]{3})*)"$')
_TRANSFORMS = {v: k for k, v in TRANSFORM_CODES.items()}
_TASKS = {v: k for k, v in TASK_CODES.items()}
_RULES = {v: k for k, v in BINARY_RULE_CODES.items()}


def _double(tok: str, where: str) -> float:
    if tok == "NAN":
        return math.nan
    if tok in ("INFINITY", "-INFINITY"):
        return math.inf if tok[0] == "I" else -math.inf
    if _HEX.match(tok):
        return float.fromhex(tok)
    raise FormatError("%s: %r is not a hexadecimal double literal" % (where, tok))


def _string(tok: str, where: str) -> str:
    m = _STRING.match(tok)
    if not m:
        raise FormatError("%s: %r is not a string literal as boxwood writes them" % (where, tok[:80]))
    body = m.group(1)
    out = bytearray()
    i = 0
    while i < len(body):
        if body[i] == "\\":
            out.append(int(body[i + 1:i + 4], 8))
            i += 4
        else:
            out.append(ord(body[i]))
            i += 1
    try:
        return out.decode("utf-8")
    except UnicodeDecodeError:
        raise FormatError("%s: a string literal is not UTF-8" % where)


def _split_values(body: str) -> List[str]:
    """The comma-separated tokens of a table body (string literals hold no raw commas: boxwood
    escapes everything but printable ASCII, and a comma inside quotes is kept whole)."""
    tokens, cur, quoted = [], [], False
    for ch in body:
        if ch == '"':
            quoted = not quoted
        if ch == "," and not quoted:
            tokens.append("".join(cur).strip())
            cur = []
        else:
            cur.append(ch)
    tail = "".join(cur).strip()
    if tail:
        tokens.append(tail)
    return tokens


def parse(text: str, where: str = "C file") -> Tuple[str, Dict[str, str], Dict[str, Tuple[str, list]], Dict[str, Any]]:
    """(prefix, defines, tables, metadata) of a C target file; FormatError when the file is not
    one boxwood wrote or its scoring code differs from boxwood's."""
    if MARKER not in text[:400]:
        raise FormatError("%s is not a boxwood C target file (no %r line at the top)" % (where, MARKER))
    meta_line = re.search(r"^ \* model: (\{.*\})$", text, re.M)
    if not meta_line:
        raise FormatError("%s has no model description comment" % where)
    try:
        meta = json.loads(meta_line.group(1))
    except ValueError as exc:
        raise FormatError("%s: the model description comment is not JSON (%s)" % (where, exc))
    if not isinstance(meta, dict) or meta.get("format") != MARKER:
        raise FormatError("%s: the model description is not one this boxwood reads" % where)
    start = text.find("\n" + TABLES_START + "\n")
    stop = text.find("\n" + ENGINE_START + "\n")
    if start < 0 or stop < start:
        raise FormatError("%s: the tables or the scoring code section is missing" % where)
    m = re.search(r"^static const double ([A-Za-z][A-Za-z0-9_]*)_base\[", text[start:stop], re.M)
    if not m:
        raise FormatError("%s: no base-value table" % where)
    prefix = m.group(1)
    engine = ENGINE.replace("PFXU_", prefix.upper() + "_").replace("PFX_", prefix + "_")
    if meta.get("engine") != engine_id():
        raise FormatError("%s was written with another version of boxwood's scoring code (%s; this boxwood's is "
                          "%s): export it again with this boxwood to verify it" % (where, meta.get("engine"), engine_id()))
    if text[stop:] != engine:
        got, want = text[stop:].split("\n"), engine.split("\n")
        line = next((i for i, (a, b) in enumerate(zip(got, want)) if a != b), min(len(got), len(want)))
        first = text[:stop].count("\n") + line + 1
        raise DamagedArtefact("%s: the scoring code differs from boxwood's at line %d (%r); boxwood verifies "
                          "only the code it wrote" % (where, first, got[line][:80] if line < len(got) else ""))
    defines: Dict[str, str] = {}
    tables: Dict[str, Tuple[str, list]] = {}
    lines = text[start + 1:stop].split("\n")
    first_line = text[:start + 1].count("\n") + 1
    i = 1
    up = prefix.upper() + "_"
    while i < len(lines):
        line = lines[i]
        at = "%s line %d" % (where, first_line + i)
        d = _DEFINE.match(line)
        t = _TABLE.match(line)
        if not line:
            i += 1
        elif d:
            if not d.group(1).startswith(up) or d.group(1) in defines:
                raise FormatError("%s: unexpected or repeated #define %s" % (at, d.group(1)))
            defines[d.group(1)[len(up):]] = d.group(2)
            i += 1
        elif t:
            name = t.group(3)
            if not name.startswith(prefix + "_") or name[len(prefix) + 1:] in tables:
                raise FormatError("%s: unexpected or repeated table %s" % (at, name))
            j = i + 1
            while j < len(lines) and lines[j] != "};":
                j += 1
            if j == len(lines):
                raise FormatError("%s: table %s is not closed" % (at, name))
            values = _split_values("\n".join(lines[i + 1:j]))
            if len(values) != int(t.group(4)):
                raise FormatError("%s: table %s declares %s entries and holds %d" % (at, name, t.group(4), len(values)))
            ctype = t.group(2)
            if ctype == "double":
                parsed: list = [_double(v, at) for v in values]
            elif ctype == "char *const":
                parsed = [_string(v, at) for v in values]
            elif ctype == "uint32_t":
                if not all(_WORD.match(v) for v in values):
                    raise FormatError("%s: table %s holds a bad bit-set word" % (at, name))
                parsed = [int(v[2:10], 16) for v in values]
            else:
                if not all(_INT.match(v) for v in values):
                    raise FormatError("%s: table %s holds a value that is not an integer" % (at, name))
                parsed = [int(v) for v in values]
            tables[name[len(prefix) + 1:]] = (ctype, parsed)
            i = j + 1
        else:
            raise DamagedArtefact("%s: unexpected text in the tables section: %r" % (at, line[:80]))
    return prefix, defines, tables, meta


class _Tables:
    def __init__(self, defines: Dict[str, str], tables: Dict[str, Tuple[str, list]], where: str):
        self.defines, self.tables, self.where = defines, tables, where

    def int(self, name: str) -> int:
        v = self.defines.get(name)
        if v is None or not _INT.match(v):
            raise FormatError("%s: #define %s is missing or not an integer" % (self.where, name))
        return int(v)

    def flag(self, name: str) -> bool:
        v = self.int(name)
        if v not in (0, 1):
            raise FormatError("%s: #define %s must be 0 or 1, not %d" % (self.where, name, v))
        return v == 1

    def double(self, name: str) -> float:
        if name not in self.defines:
            raise FormatError("%s: #define %s is missing" % (self.where, name))
        return _double(self.defines[name], "%s #define %s" % (self.where, name))

    def table(self, name: str, n: Optional[int] = None) -> list:
        if name not in self.tables:
            raise FormatError("%s: table %s is missing" % (self.where, name))
        values = self.tables[name][1]
        if n is not None and len(values) < n:
            raise FormatError("%s: table %s holds %d entries, %d are used" % (self.where, name, len(values), n))
        return values if n is None else values[:n]


def _index(values: list, i: int, what: str, where: str) -> Any:
    if not 0 <= i < len(values):
        raise FormatError("%s: %s index %d is out of range" % (where, what, i))
    return values[i]


def to_ensemble(text: str, where: str = "C file") -> Ensemble:
    """The Ensemble that the C text computes (see the module docstring)."""
    prefix, defines, tables, meta = parse(text, where)
    check_head(text, where)
    tb = _Tables(defines, tables, where)
    n_feat, k, n_trees, n_nodes = (tb.int(n) for n in ("N_TREE_FEATURES", "N_RAW", "N_TREES", "N_NODES"))
    feats_meta = meta.get("features")
    if not isinstance(feats_meta, list) or len(feats_meta) != n_feat or n_feat < 1 or k < 1:
        raise FormatError("%s: the description lists %s features, the tables %d"
                          % (where, len(feats_meta) if isinstance(feats_meta, list) else "no", n_feat))
    task = _TASKS.get(tb.int("TASK"))
    transform = _TRANSFORMS.get(tb.int("TRANSFORM"))
    if task is None or transform is None or tb.int("BINARY_RULE") not in _RULES:
        raise FormatError("%s: unknown TASK, TRANSFORM or BINARY_RULE code" % where)
    if task != meta.get("task"):
        raise FormatError("%s: the tables compute a %s model, the description says %r" % (where, task, meta.get("task")))
    params = {"samme": {"weight_total": tb.double("WEIGHT_TOTAL")},
              "isolation": {"denominator": tb.double("DENOMINATOR"), "offset": tb.double("OFFSET")}}.get(transform, {})
    has_cats, has_steps = tb.flag("HAS_CATEGORIES"), tb.flag("HAS_STEPS")

    # -- features: categories from the value tables (text categories from their labels) ----
    features: List[Feature] = []
    unseen: List[int] = [0] * n_feat
    words: Dict[int, int] = {}
    if has_cats:
        starts = tb.table("cat_start", n_feat + 1)
        values = tb.table("cat_value")
        unseen = tb.table("cat_unseen_missing", n_feat)
        labels = tables.get("category_labels", ("", []))[1]
    for j, fm in enumerate(feats_meta):
        if not isinstance(fm, dict) or not isinstance(fm.get("name"), str):
            raise FormatError("%s: feature %d of the description has no name" % (where, j))
        cats = None
        if has_cats and starts[j + 1] > starts[j]:
            lo, hi = starts[j], starts[j + 1]
            if not 0 <= lo < hi <= len(values) or hi > len(labels):
                raise FormatError("%s: feature %r: category ranges out of bounds" % (where, fm["name"]))
            if fm.get("text_categories"):
                if values[lo:hi] != [float(i) for i in range(hi - lo)]:
                    raise FormatError("%s: feature %r has text categories but its value table is not 0, 1, ..."
                                      % (where, fm["name"]))
                cats = list(labels[lo:hi])
            else:
                cats = list(values[lo:hi])
            words[j] = (len(cats) + 31) // 32
        if (cats is not None) != (fm.get("kind") == "categorical"):
            raise FormatError("%s: feature %r is %s in the description but not in the tables"
                              % (where, fm["name"], fm.get("kind")))
        features.append(Feature(fm["name"], "categorical" if cats is not None else "numeric", cats))

    # -- preprocessing steps ------------------------------------------------------------------
    fields = meta.get("fields")
    if has_steps != (fields is not None):
        raise FormatError("%s: HAS_STEPS and the description's fields disagree" % where)
    if has_steps:
        if not isinstance(fields, list) or not all(isinstance(f, str) for f in fields):
            raise FormatError("%s: the description's fields are malformed" % where)
        src, sstart, kinds = tb.table("source_field", n_feat), tb.table("step_start", n_feat + 1), tb.table("step_kind")
        svalue, sflags = tb.table("step_value"), tb.table("step_flags")
        smissing, sunknown = tb.table("step_missing"), tb.table("step_unknown")
        cstart, cvals = tb.table("step_cat_start"), tb.table("step_cat")
        cresults = tb.table("step_cat_value", len(cvals))
        arith_names = {k: name for name, k in ARITHMETIC_KINDS.items()}
        for j, f in enumerate(features):
            steps: List[Dict[str, Any]] = []
            for s in range(sstart[j], sstart[j + 1]):
                kind = _index(kinds, s, "step", where)
                if kind == 0:
                    steps.append({"op": "impute", "value": _index(svalue, s, "step", where), "replaces": "nan"})
                elif kind in arith_names:
                    flags = _index(sflags, s, "step", where)
                    op = [arith_names[kind], _index(svalue, s, "step", where)]
                    if kind == ARITHMETIC_KINDS["clip"]:
                        op.append(_index(sunknown, s, "step", where))
                    if flags & 4 or not steps or steps[-1]["op"] != "arithmetic":
                        if not flags & 4:
                            raise FormatError("%s: step %d continues a scaler step that was not started" % (where, s))
                        steps.append({"op": "arithmetic", "sequence": []})
                    steps[-1]["sequence"].append(op)
                elif kind in (1, 2):
                    flags = _index(sflags, s, "step", where)
                    lo, hi = _index(cstart, s, "step", where), _index(cstart, s + 1, "step", where)
                    if not 0 <= lo <= hi <= len(cvals):
                        raise FormatError("%s: step %d's categories are out of bounds" % (where, s))
                    unknown = sunknown[s]
                    step = {"op": "encode", "categories": list(cvals[lo:hi]),
                            "unknown": "error" if flags & 2 else (None if unknown != unknown else unknown)}
                    if flags & 1:
                        step["missing"] = None if smissing[s] != smissing[s] else smissing[s]
                    if kind == 2:
                        step["op"] = "lookup"
                        step["values"] = list(cresults[lo:hi])
                    elif list(cresults[lo:hi]) != [float(i) for i in range(hi - lo)]:
                        raise FormatError("%s: step %d encodes, but its value table is not 0, 1, ..." % (where, s))
                    steps.append(step)
                else:
                    raise FormatError("%s: step %d has an unknown kind %r" % (where, s, kind))
            if any(st["op"] == "encode" for st in steps) != bool(unseen[j]) and has_cats:
                raise FormatError("%s: feature %r: the unseen-category flag disagrees with its steps" % (where, f.name))
            f.source = {"field": _index(fields, src[j], "field", where), "steps": steps}
    elif has_cats and any(unseen):
        raise FormatError("%s: an unseen-category flag is set on a model without preprocessing" % where)

    # -- trees --------------------------------------------------------------------------------
    roots = tb.table("root", n_trees)
    outputs = tb.table("tree_output", n_trees)
    feature, left, right = tb.table("feature", n_nodes), tb.table("left", n_nodes), tb.table("right", n_nodes)
    value, flags = tb.table("value", n_nodes), tb.table("flags", n_nodes)
    catset = tables.get("catset", ("", []))[1]
    ends = list(roots[1:]) + [n_nodes]
    trees: List[Tree] = []
    for t in range(n_trees):
        lo, hi = roots[t], ends[t]
        if not 0 <= lo < hi <= n_nodes:
            raise FormatError("%s: tree %d's node range %d..%d is not inside the tables" % (where, t, lo, hi))
        tree = Tree(output=outputs[t], feature=[], threshold=[], left=[], right=[], missing_left=[], value=[])
        for n in range(lo, hi):
            f = feature[n]
            if f == LEAF:
                if left[n] != LEAF or right[n] != LEAF or flags[n] != 0:
                    raise FormatError("%s: tree %d leaf %d has children or flags" % (where, t, n - lo))
                tree.feature.append(LEAF)
                tree.threshold.append(0.0)
                tree.left.append(LEAF)
                tree.right.append(LEAF)
                tree.missing_left.append(False)
                tree.value.append(value[n])
                tree.left_categories.append(None)
                continue
            if not (lo < left[n] < hi and lo < right[n] < hi) or flags[n] & ~3 or not 0 <= f < n_feat:
                raise FormatError("%s: tree %d node %d points outside its tree or has bad flags" % (where, t, n - lo))
            tree.feature.append(f)
            tree.left.append(left[n] - lo)
            tree.right.append(right[n] - lo)
            tree.missing_left.append(bool(flags[n] & 1))
            tree.value.append(0.0)
            if flags[n] & 2:
                if f not in words:
                    raise FormatError("%s: tree %d node %d is a categorical split on a numeric feature" % (where, t, n - lo))
                off = value[n]
                if off != int(off) or not 0 <= int(off) <= len(catset) - words[f]:
                    raise FormatError("%s: tree %d node %d's category set is out of bounds" % (where, t, n - lo))
                codes = tuple(c for c in range(len(features[f].categories))
                              if catset[int(off) + c // 32] >> (c % 32) & 1)
                tree.threshold.append(0.0)
                tree.left_categories.append(codes)
            else:
                tree.threshold.append(value[n])
                tree.left_categories.append(None)
        trees.append(tree)
    base = tb.table("base", k)
    combine = "mean" if tb.flag("COMBINE_MEAN") else "sum"
    if combine == "mean":
        counts = tb.table("trees_per_output", k)
        if counts != [outputs.count(j) for j in range(k)]:
            raise FormatError("%s: trees_per_output does not count the trees of each output" % where)
    depth = max((t.depth() for t in trees), default=0) if all(_acyclic(t) for t in trees) else None
    if depth is None:
        raise FormatError("%s: a tree's nodes do not form a tree" % where)
    if tb.int("MAX_DEPTH") < depth:
        raise FormatError("%s: MAX_DEPTH is %d but a tree is %d deep: the code would refuse records"
                          % (where, tb.int("MAX_DEPTH"), depth))
    target_steps = _target_steps(tb, k, where)
    classes = meta.get("classes")
    calibration = _calibration(tb, k, transform, classes, params) if tb.flag("CALIBRATED") else None
    reference = None
    ref = meta.get("self_check")
    if isinstance(ref, dict) and ref.get("rows"):
        num = lambda v: {"inf": math.inf, "-inf": -math.inf}[v] if isinstance(v, str) else float(v)  # noqa: E731
        reference = Reference(rows=[list(r) for r in ref["rows"]], raw=[[num(v) for v in r] for r in ref["raw"]],
                              transformed=[[num(v) for v in r] for r in ref["transformed"]])
    try:
        return Ensemble(
            task=task, features=features, trees=trees, base_values=list(base), post_transform=transform,
            combine=combine, compare_precision="float32" if tb.flag("COMPARE_FLOAT32") else "float64",
            missing_values="reject" if tb.flag("MISSING_REJECT") else "route",
            classes=list(classes) if isinstance(classes, list) else None,
            binary_rule=_RULES[tb.int("BINARY_RULE")], output_names=list(meta.get("output_names") or []),
            accepts_infinity=tb.flag("ACCEPTS_INFINITY"), post_transform_params=params,
            softmax_sum="pairwise" if tb.flag("SOFTMAX_PAIRWISE") else "sequential",
            fields=list(fields) if has_steps else None, provenance=dict(meta.get("provenance") or {}),
            target_steps=target_steps, calibration=calibration, reference=reference).check()
    except (ModelError, TypeError, KeyError) as exc:
        raise FormatError("%s: the tables do not describe a valid ensemble: %s" % (where, exc))


_TARGET_OPS = {v: k for k, v in TARGET_STEP_CODES.items()}


def _target_steps(tb: "_Tables", k: int, where: str) -> List[Dict[str, Any]]:
    """A regressor's target steps from N_TARGET_STEPS, target_op and target_value (the
    constants of exp and expm1 steps must be 0: the code ignores them)."""
    n = tb.int("N_TARGET_STEPS")
    if n == 0:
        return []
    ops, values = tb.table("target_op", n), tb.table("target_value", n * k)
    steps: List[Dict[str, Any]] = []
    for s, code in enumerate(ops):
        op = _TARGET_OPS.get(code)
        if op is None:
            raise FormatError("%s: target_op[%d] is %d, not a target step code" % (where, s, code))
        c = values[s * k:(s + 1) * k]
        if op in ("exp", "expm1"):
            if any(v != 0.0 for v in c):
                raise FormatError("%s: target step %d (%s) has constants" % (where, s, op))
            steps.append({"op": op})
        else:
            steps.append({"op": op, "values": [float(v) for v in c]})
    return steps
def _calibration(tb: _Tables, k: int, transform: str, classes: Any, params: Dict[str, float]) -> Dict[str, Any]:
    """Ensemble.calibration from the PFX_cal_ tables (CalibratedClassifierCV, docs/calibration.md)."""
    where = tb.where
    n_folds, fold_raw, fold_exact = tb.int("N_FOLDS"), tb.int("FOLD_RAW"), tb.int("FOLD_EXACT")
    n_cls = tb.int("N_CAL_CLASSES")
    if not isinstance(classes, list) or n_cls != len(classes) or n_cls < 2:
        raise FormatError("%s: N_CAL_CLASSES does not count the description's classes" % where)
    if n_folds < 1 or fold_raw < 1 or n_folds * fold_raw != k:
        raise FormatError("%s: %d folds of %d raw outputs are not the %d raw outputs" % (where, n_folds, fold_raw, k))
    if fold_exact != (1 if transform == "samme" and fold_raw == 2 else fold_raw):
        raise FormatError("%s: FOLD_EXACT %d does not fit the folds' raw outputs" % (where, fold_exact))
    if tb.flag("CAL_ROW_SUM") != (n_cls > 2):
        raise FormatError("%s: CAL_ROW_SUM must be 1 exactly when there are more than two classes" % where)
    per = 1 if n_cls == 2 else n_cls
    weights = tb.table("cal_weight", n_folds) if transform == "samme" else None
    method, a, b = tb.table("cal_method", n_folds * per), tb.table("cal_a", n_folds * per), tb.table("cal_b", n_folds * per)
    start = tb.table("cal_knot_start", n_folds * per + 1)
    xs, ys = tb.table("cal_x"), tb.table("cal_y")
    if start[0] != 0 or start[-1] > min(len(xs), len(ys)) or any(start[i] > start[i + 1] for i in range(len(start) - 1)):
        raise FormatError("%s: the calibrators' knot ranges are out of bounds" % where)
    folds = []
    for f in range(n_folds):
        cals = []
        for c in range(per):
            i = f * per + c
            lo, hi = start[i], start[i + 1]
            if method[i] == 1 and lo == hi:
                cals.append({"method": "sigmoid", "a": a[i], "b": b[i]})
            elif method[i] == 0 and lo < hi and a[i] == 0.0 and b[i] == 0.0:
                cals.append({"method": "isotonic", "x": list(xs[lo:hi]), "y": list(ys[lo:hi])})
            else:
                raise FormatError("%s: fold %d calibrator %d: method %r with %d knots is not one the code "
                                  "computes" % (where, f, c, method[i], hi - lo))
        fp = {"weight_total": weights[f]} if weights is not None else {}
        folds.append({"post_transform_params": fp, "calibrators": cals})
    if folds[0]["post_transform_params"] != params:
        raise FormatError("%s: WEIGHT_TOTAL is not fold 0's weight total" % where)
    return {"response": "probability" if tb.flag("CAL_PROBABILITY") else "decision",
            "normalisation": "row_sum" if n_cls > 2 else "complement", "folds": folds}


def widths(e: Ensemble) -> Tuple[int, int]:
    """(values PREFIX_raw writes, values PREFIX_predict writes) per record: a calibrated
    classifier writes every fold's exact values and the probabilities of all classes."""
    fold = e.fold_outputs
    per = 1 if e.post_transform == "samme" and fold == 2 else fold
    if e.calibration is not None:
        return per * e.n_folds, len(e.classes)
    return per, e.n_outputs


def _acyclic(tree: Tree) -> bool:
    seen = [False] * tree.n_nodes
    stack = [0]
    while stack:
        n = stack.pop()
        if seen[n]:
            return False
        seen[n] = True
        if tree.feature[n] != LEAF:
            stack.extend((tree.left[n], tree.right[n]))
    return all(seen)


def read_text(path: Union[str, Path]) -> str:
    path = Path(path)
    if not path.is_file():
        raise FormatError("%s is not a file" % path)
    if path.stat().st_size > MAX_BYTES:
        raise FormatError("%s is larger than %d bytes" % (path, MAX_BYTES))
    try:
        return path.read_bytes().decode("utf-8")
    except UnicodeDecodeError:
        raise FormatError("%s is not UTF-8 text" % path)


def read_c(path: Union[str, Path]) -> Ensemble:
    """Read ``NAME.c`` back into an Ensemble (FormatError when it is not a file boxwood wrote)."""
    return to_ensemble(read_text(path), str(path))


_HEAD_INCLUDES = ["#include <float.h>", "#include <math.h>", "#include <stdint.h>", ""]


def check_head(text: str, where: str = "C file") -> str:
    """Refuse anything but the comment block and the four include lines above the tables;
    return the header file name the source includes."""
    start = text.find("\n" + TABLES_START + "\n")
    lines = text[:start + 1].split("\n")[:-1]
    end = next((i for i, line in enumerate(lines) if line == " */"), None)
    if end is None or not lines[0].startswith("/* ") or any(
            not line.startswith(" *") or "*/" in line for line in lines[1:end]) or "*/" in lines[0]:
        raise DamagedArtefact("%s: the comment at the top is not the one boxwood writes" % where)
    rest = lines[end + 1:]
    m = re.match(r'^#include "([A-Za-z0-9_.+-]+\.h)"$', rest[0]) if rest else None
    if not m or rest[1:] != _HEAD_INCLUDES:
        raise DamagedArtefact("%s: only the header and <float.h>, <math.h>, <stdint.h> may be included above the "
                          "tables" % where)
    return m.group(1)


def expected_header(text: str, ensemble: Ensemble) -> str:
    """The header boxwood writes for the C text (compared byte for byte before compiling)."""
    from boxwood_runtime.csource import header

    prefix, _, tables, _ = parse(text)
    n_exact, n_out = widths(ensemble)
    n_inputs = len(ensemble.fields) if ensemble.fields is not None else len(ensemble.features)
    return header(prefix, ensemble.task, ensemble.fields is not None, n_inputs, n_exact, n_out,
                  len(ensemble.classes or []), "category_labels" in tables, ensemble.calibration is not None)
