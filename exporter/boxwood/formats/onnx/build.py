"""The graph pieces both ONNX writers share (boxwood.formats.onnx.exact, the ai.onnx.ml opset-5
graph, and boxwood.formats.onnx.legacy, the float32 opset-3 graph): input preparation, the
post-transform and label ops, metadata, assembly. What each piece computes and why it is
exact is in :mod:`boxwood.formats.onnx.exact` and docs/onnx.md.
"""
from __future__ import annotations

import json
import math
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ...ir import LEAF, Ensemble, ModelError

ONNX_OPSET = 21
ONNX_ML_OPSET = 5
INPUT_TYPES = ("float64", "float32")
# metadata_props keys (values are strings; the JSON ones are documented in docs/onnx.md)
META_FORMAT = "boxwood.format"
META_FORMAT_VALUE = "boxwood.onnx-tree-ensemble/1"
META_VERSION = "boxwood.version"
META_ESTIMATOR = "boxwood.source_estimator"
META_FEATURES = "boxwood.feature_names"
META_CATEGORIES = "boxwood.categories"
META_SEMANTICS = "boxwood.semantics"
META_PROVENANCE = "boxwood.provenance"
META_REFERENCE = "boxwood.reference"
META_ERROR_BOUND = "boxwood.raw_error_bound"
# Names of the graph's input and outputs.
INPUT_NAME = "input"
RAW_NAME = "raw_score"
TREE_NODE_NAME = "tree_ensemble"
# Node modes of ai.onnx.ml TreeEnsemble (opset 5), as uint8 enumeration values.
MODE_LEQ = 0
MODE_MEMBER = 6
# A category code c is written as the set member c + CODE_OFFSET (see module docstring).
CODE_OFFSET = 1.0
# The lone member of a categorical split that sends no category left.
NEVER_MEMBER = -1.0
META_PREPROCESSING = "boxwood.preprocessing"
# Names of the extra outputs of AdaBoost (samme) and isolation forest graphs.
DECISION_NAME = "decision"
SCORE_NAME = "score"


def _onnx():
    import onnx

    return onnx


# ----------------------------------------------------------------------------- graph kit
class GraphKit:
    """Collects nodes and constants and hands out unique value names."""

    def __init__(self, float_type: int):
        self.onnx = _onnx()
        self.float_type = float_type  # TensorProto.DOUBLE or TensorProto.FLOAT
        self.np_float = np.float64 if float_type == self.onnx.TensorProto.DOUBLE else np.float32
        self.nodes: List[Any] = []
        self.initializers: List[Any] = []
        self._names: Dict[str, int] = {}

    def name(self, stem: str) -> str:
        n = self._names.get(stem, 0)
        self._names[stem] = n + 1
        return stem if n == 0 else "%s_%d" % (stem, n)

    def const(self, stem: str, values: Any, dtype: Any = None) -> str:
        array = np.asarray(values, dtype=dtype if dtype is not None else self.np_float)
        name = self.name(stem)
        if array.dtype.kind in "OU":
            tensor = self.onnx.helper.make_tensor(name, self.onnx.TensorProto.STRING, array.shape,
                                                  [str(v).encode("utf-8") for v in array.ravel()])
        else:
            tensor = self.onnx.numpy_helper.from_array(array, name)
        self.initializers.append(tensor)
        return name

    def op(self, op_type: str, inputs: Sequence[str], stem: str, output: Optional[str] = None,
           domain: str = "", **attrs: Any) -> str:
        out = output or self.name(stem)
        self.nodes.append(self.onnx.helper.make_node(op_type, list(inputs), [out], name=self.name("n_" + stem),
                                                     domain=domain, **attrs))
        return out


# ----------------------------------------------------------------------------- preparation
def prepare_input(kit: GraphKit, ensemble: Ensemble, x: str, input_float_type: int,
                  round_to_float32: bool) -> str:
    """The ops between the graph input and the tree operator; returns the tree's input name.

    ``round_to_float32``: a float64 input must be rounded to float32 first (the source
    compares float32 inputs). ``input_float_type``: the graph input's element type.
    """
    T = kit.onnx.TensorProto
    if input_float_type != kit.float_type:
        if kit.float_type == T.DOUBLE:
            x = kit.op("Cast", [x], "input_as_double", to=T.DOUBLE)
        else:
            x = kit.op("Cast", [x], "input_as_float", to=T.FLOAT)
    elif round_to_float32 and kit.float_type == T.DOUBLE:
        x = kit.op("Cast", [x], "rounded_to_float32", to=T.FLOAT)
        x = kit.op("Cast", [x], "rounded_as_double", to=T.DOUBLE)
    if any(f.is_categorical for f in ensemble.features):
        x = _sanitize_codes(kit, ensemble, x)
    return x


def _sanitize_codes(kit: GraphKit, ensemble: Ensemble, x: str) -> str:
    """Category codes outside 0..n-1 (or not whole numbers) become NaN; codes shift by +1.

    Numeric columns pass unchanged (lower bound -inf, upper bound +inf, no whole-number
    test, offset 0.0; NaN stays NaN)."""
    lo, hi, numeric, offset = [], [], [], []
    for f in ensemble.features:
        if f.is_categorical:
            lo.append(0.0)
            hi.append(float(len(f.categories) - 1))
            numeric.append(False)
            offset.append(CODE_OFFSET)
        else:
            lo.append(-math.inf)
            hi.append(math.inf)
            numeric.append(True)
            offset.append(0.0)
    ge = kit.op("GreaterOrEqual", [x, kit.const("code_low", lo)], "code_not_below")
    le = kit.op("LessOrEqual", [x, kit.const("code_high", hi)], "code_not_above")
    whole = kit.op("Equal", [kit.op("Floor", [x], "floor"), x], "code_is_whole")
    whole = kit.op("Or", [whole, kit.const("numeric_column", numeric, dtype=np.bool_)], "whole_or_numeric")
    ok = kit.op("And", [kit.op("And", [ge, le], "code_in_range"), whole], "code_known")
    shifted = kit.op("Add", [x, kit.const("code_offset", offset)], "code_shifted")
    return kit.op("Where", [ok, shifted, kit.const("missing", np.nan)], "unknown_codes_missing")


# ----------------------------------------------------------------------------- tree operator
def _preorder(tree) -> List[int]:
    """IR node indices in depth-first order, left branch first (the order written)."""
    order, stack = [], [0]
    while stack:
        node = stack.pop()
        order.append(node)
        if tree.feature[node] != LEAF:
            stack.append(tree.right[node])
            stack.append(tree.left[node])
    return order


def finish_mean(kit: GraphKit, ensemble: Ensemble, summed: str, output: str) -> str:
    """combine == "mean": raw = base + (sum of the output's trees) / (their count)."""
    counts = [0] * ensemble.n_outputs
    for t in ensemble.trees:
        counts[t.output] += 1
    mean = kit.op("Div", [summed, kit.const("tree_count", [float(max(c, 1)) for c in counts])], "tree_mean")
    return kit.op("Add", [mean, kit.const("base_values", ensemble.base_values)], "with_base", output=output)


# ----------------------------------------------------------------------------- outputs
def _label_tensor(classes: List[Any]) -> Tuple[np.ndarray, int]:
    """Class labels as a constant and its ONNX element type."""
    T = _onnx().TensorProto
    if all(isinstance(c, bool) for c in classes):
        return np.asarray(classes, dtype=np.bool_), T.BOOL
    if all(isinstance(c, int) and not isinstance(c, bool) for c in classes):
        return np.asarray(classes, dtype=np.int64), T.INT64
    if all(isinstance(c, str) for c in classes):
        return np.asarray(classes, dtype=object), T.STRING
    if all(isinstance(c, (int, float)) and not isinstance(c, bool) for c in classes):
        return np.asarray(classes, dtype=np.float64), T.DOUBLE
    raise ModelError("class labels must be all numbers or all strings to be written to ONNX: %r" % (classes,))


def refuse_unsupported(ensemble: Ensemble) -> None:
    """Raise ModelError for what the ONNX writers cannot state (every post-transform of the hub is
    written; ``Ensemble.check`` has refused unknown ones).

    A pipeline's preprocessing is not refused: the graph holds the tree part only and its
    input is the preprocessed feature vector (metadata ``boxwood.preprocessing`` says how
    each feature is computed from the raw fields; docs/onnx.md, "Pipelines")."""
    if ensemble.post_transform == "isolation" and ensemble.post_transform_params["denominator"] == 0.0:
        raise ModelError("an isolation forest fitted on single-sample trees (denominator 0: scikit-learn sets "
                         "every score to -1) is not written to ONNX")
    if getattr(ensemble, "calibration", None) is not None:
        raise ModelError("CalibratedClassifierCV (calibration: %d folds, %s) is not written to ONNX: the isotonic "
                         "interpolation (a knot search, then numpy.interp's formula) and the fold average have no "
                         "exact ai.onnx.ml form boxwood builds yet; export to JSON (boxwood export MODEL -o "
                         "model.json) or C instead" % (len(ensemble.calibration["folds"]), ", ".join(sorted({
                             c["method"] for f in ensemble.calibration["folds"] for c in f["calibrators"]}))))
    refuse_target_steps(ensemble)


# Target steps (ir.TARGET_OPS) as standard ONNX ops on double tensors: each is one IEEE
# operation (Mul, Add, Sub, Div by a constant per output) or exp (Exp). expm1 has no standard
# operator, and Exp followed by Sub 1 is not expm1 (it loses the digits of results near 0).
TARGET_STEP_OPS = {"exp": "Exp", "mul": "Mul", "add": "Add", "sub": "Sub", "div": "Div"}


def refuse_target_steps(ensemble: Ensemble, float_type_is_double: bool = True) -> None:
    """Raise ModelError for target steps an ONNX graph cannot compute exactly: expm1 (no
    operator), and any step in the legacy float32 graph (its constants and arithmetic would be
    float32)."""
    steps = ensemble.target_steps or []
    wrapper = (ensemble.provenance or {}).get("estimator", "the model")
    for i, st in enumerate(steps):
        if st["op"] not in TARGET_STEP_OPS:
            raise ModelError("%s: target step %d (%s, the inverse of a TransformedTargetRegressor) has no exact ONNX "
                             "operator (Exp then Sub 1 is not expm1); export it as JSON or C instead"
                             % (wrapper, i, st["op"]))
    if steps and not float_type_is_double:
        raise ModelError("%s: the legacy float32 ONNX graph cannot apply target steps (a TransformedTargetRegressor's "
                         "inverse) exactly; write the exact graph instead (without --legacy-float32)" % wrapper)


def _target_steps(kit: GraphKit, ensemble: Ensemble, transformed: str) -> str:
    """The target steps after the post-transform; the last writes the output "prediction"."""
    steps = ensemble.target_steps
    out = transformed
    for i, st in enumerate(steps):
        name = "prediction" if i == len(steps) - 1 else None
        if st["op"] == "exp":
            out = kit.op("Exp", [out], "target_exp", output=name)
        else:
            c = kit.const("target_%s_values" % st["op"], [float(v) for v in st["values"]])
            out = kit.op(TARGET_STEP_OPS[st["op"]], [out, c], "target_%s" % st["op"], output=name)
    return out


def add_outputs(kit: GraphKit, ensemble: Ensemble, raw: str) -> List[Any]:
    """Post-transform and label ops after the raw scores; returns the graph outputs."""
    helper, T = kit.onnx.helper, kit.onnx.TensorProto
    k = ensemble.n_outputs
    post = ensemble.post_transform
    raw_info = helper.make_tensor_value_info(RAW_NAME, kit.float_type, ["N", k])
    if ensemble.task == "regression":
        if ensemble.target_steps:  # post-transform, then the steps (docs/wrappers.md)
            refuse_target_steps(ensemble, kit.float_type == T.DOUBLE)
            first = kit.op("Exp" if post == "exp" else "Identity", [raw], "transformed")
            _target_steps(kit, ensemble, first)
        elif post == "exp":
            kit.op("Exp", [raw], "exp", output="prediction")
        else:
            kit.op("Identity", [raw], "prediction", output="prediction")
        return [helper.make_tensor_value_info("prediction", kit.float_type, ["N", k]), raw_info]
    if ensemble.task == "outlier_detection":
        return _isolation_outputs(kit, ensemble, raw, raw_info)
    if post == "samme":
        return _samme_outputs(kit, ensemble, raw, raw_info)
    if ensemble.task != "classification":
        raise ModelError("the ONNX writer does not support task %r yet" % ensemble.task)
    classes = list(ensemble.classes)
    labels, label_type = _label_tensor(classes)
    label_const = kit.const("class_labels", labels, dtype=labels.dtype)
    if k == 1:
        scaled = raw
        if post == "logistic_double":
            scaled = kit.op("Mul", [raw, kit.const("two", 2.0)], "raw_times_two")
        elif post != "logistic":
            raise ModelError("a binary classifier with one raw output needs a logistic post-transform")
        # 1 / (1 + exp(-x)): scipy.special.expit's formula, which scikit-learn uses.
        # (onnxruntime's double Sigmoid kernel is accurate only to about 2**-52 absolute:
        # it returns 0 below x = -36.7, where the true value is about 1e-16.)
        denominator = kit.op("Add", [kit.const("one", 1.0), kit.op("Exp", [kit.op("Neg", [scaled], "minus_raw")],
                                                                    "exp_minus_raw")], "one_plus_exp")
        p = kit.op("Div", [kit.const("one", 1.0), denominator], "positive_probability")
        q = kit.op("Sub", [kit.const("one", 1.0), p], "negative_probability")
        kit.op("Concat", [q, p], "probabilities", output="probabilities", axis=1)
        cmp = "Greater" if ensemble.binary_rule == "raw_gt_0" else "GreaterOrEqual"
        positive = kit.op(cmp, [raw, kit.const("zero", 0.0)], "is_positive")
        index = kit.op("Cast", [positive], "class_index_2d", to=T.INT64)
        index = kit.op("Reshape", [index, kit.const("flat", [-1], dtype=np.int64)], "class_index")
    else:
        if post == "softmax":
            # onnxruntime's double Softmax is within 3 ulps of scikit-learn's here (the
            # same as exp(x - max) / sum written out with ReduceMax/Exp/ReduceSum/Div).
            kit.op("Softmax", [raw], "probabilities", output="probabilities", axis=1)
        elif post == "identity":
            kit.op("Identity", [raw], "probabilities", output="probabilities")
        else:
            raise ModelError("post_transform %r does not fit a classifier with %d raw outputs" % (post, k))
        index = kit.op("ArgMax", [raw], "class_index", axis=1, keepdims=0)
    kit.op("Gather", [label_const, index], "label", output="label", axis=0)
    return [helper.make_tensor_value_info("label", label_type, ["N"]),
            helper.make_tensor_value_info("probabilities", kit.float_type, ["N", len(classes)]),
            raw_info]


def _isolation_outputs(kit: GraphKit, ensemble: Ensemble, raw: str, raw_info: Any) -> List[Any]:
    """IsolationForest: raw = summed path lengths; score = -(2 ** -(raw / denominator))
    (scikit-learn's score_samples, same operations in the same order), decision =
    score - offset (decision_function), label -1 where decision < 0, else 1 (predict)."""
    helper, T = kit.onnx.helper, kit.onnx.TensorProto
    params = ensemble.post_transform_params
    q = kit.op("Div", [raw, kit.const("isolation_denominator", params["denominator"])], "mean_path_ratio")
    power = kit.op("Pow", [kit.const("two", 2.0), kit.op("Neg", [q], "minus_ratio")], "two_to_minus_ratio")
    score = kit.op("Neg", [power], SCORE_NAME, output=SCORE_NAME)
    decision = kit.op("Sub", [score, kit.const("isolation_offset", params["offset"])], DECISION_NAME,
                      output=DECISION_NAME)
    inlier = kit.op("GreaterOrEqual", [decision, kit.const("zero", 0.0)], "is_inlier")  # not (decision < 0)
    index = kit.op("Cast", [inlier], "label_index_2d", to=T.INT64)
    index = kit.op("Reshape", [index, kit.const("flat", [-1], dtype=np.int64)], "label_index")
    kit.op("Gather", [kit.const("outlier_labels", [-1, 1], dtype=np.int64), index], "label", output="label", axis=0)
    return [helper.make_tensor_value_info("label", T.INT64, ["N"]),
            helper.make_tensor_value_info(SCORE_NAME, kit.float_type, ["N", 1]),
            helper.make_tensor_value_info(DECISION_NAME, kit.float_type, ["N", 1]),
            raw_info]


def _samme_outputs(kit: GraphKit, ensemble: Ensemble, raw: str, raw_info: Any) -> List[Any]:
    """AdaBoost (SAMME): raw = per-class vote sums; decision d = raw / weight_total (two
    classes: -d0 + d1, in that order), probabilities softmax(d / (K - 1)) (two classes:
    softmax([-d / 2, d / 2])), label argmax d (two classes: d > 0 -> classes[1]): the
    operations of scikit-learn's AdaBoostClassifier.decision_function / predict_proba /
    predict (and of boxwood_runtime.scorer.samme_decision / transform)."""
    helper, T = kit.onnx.helper, kit.onnx.TensorProto
    k = ensemble.n_outputs
    classes = list(ensemble.classes)
    labels, label_type = _label_tensor(classes)
    label_const = kit.const("class_labels", labels, dtype=labels.dtype)
    d = kit.op("Div", [raw, kit.const("samme_weight_total", ensemble.post_transform_params["weight_total"])],
               "class_decision")
    if k == 2:
        d0 = kit.op("Gather", [d, kit.const("column_0", [0], dtype=np.int64)], "decision_0", axis=1)
        d1 = kit.op("Gather", [d, kit.const("column_1", [1], dtype=np.int64)], "decision_1", axis=1)
        decision = kit.op("Add", [kit.op("Neg", [d0], "minus_decision_0"), d1], DECISION_NAME, output=DECISION_NAME)
        pair = kit.op("Concat", [kit.op("Neg", [decision], "minus_decision"), decision], "decision_pair", axis=1)
        scaled = kit.op("Div", [pair, kit.const("two", 2.0)], "decision_halves")
        positive = kit.op("Greater", [decision, kit.const("zero", 0.0)], "is_positive")
        index = kit.op("Cast", [positive], "class_index_2d", to=T.INT64)
        index = kit.op("Reshape", [index, kit.const("flat", [-1], dtype=np.int64)], "class_index")
        width = 1
    else:
        decision = kit.op("Identity", [d], DECISION_NAME, output=DECISION_NAME)
        scaled = kit.op("Div", [decision, kit.const("classes_minus_one", float(k - 1))], "decision_scaled")
        index = kit.op("ArgMax", [decision], "class_index", axis=1, keepdims=0)
        width = k
    kit.op("Softmax", [scaled], "probabilities", output="probabilities", axis=1)
    kit.op("Gather", [label_const, index], "label", output="label", axis=0)
    return [helper.make_tensor_value_info("label", label_type, ["N"]),
            helper.make_tensor_value_info("probabilities", kit.float_type, ["N", len(classes)]),
            helper.make_tensor_value_info(DECISION_NAME, kit.float_type, ["N", width]),
            raw_info]


# ----------------------------------------------------------------------------- metadata
def _json_number(v: Any) -> Any:
    if isinstance(v, float) and not math.isfinite(v):
        return None if math.isnan(v) else ("inf" if v > 0 else "-inf")
    return v


def metadata(ensemble: Ensemble, leading_base_trees: int, input_type: str, variant: str,
             extra: Optional[Dict[str, str]] = None) -> Dict[str, str]:
    """metadata_props: what the graph cannot say itself (names, categories, provenance,
    the source's reference rows) and a statement of the semantics written."""
    from ... import __version__

    prov = ensemble.provenance or {}
    semantics = {
        "task": ensemble.task,
        "variant": variant,
        "input_type": input_type,
        "compare_precision": ensemble.compare_precision,
        "missing_values": ensemble.missing_values,
        "accepts_infinity": ensemble.accepts_infinity,
        "combine": ensemble.combine,
        "post_transform": ensemble.post_transform,
        "classes": ensemble.classes,
        "binary_rule": ensemble.binary_rule,
        "softmax_sum": ensemble.softmax_sum,
        "output_names": list(ensemble.output_names),
        "leading_base_trees": leading_base_trees,
        "category_code_offset": CODE_OFFSET,
        "post_transform_params": dict(ensemble.post_transform_params),
    }
    if ensemble.target_steps:
        semantics["target_steps"] = [dict(st) for st in ensemble.target_steps]
    meta = {
        META_FORMAT: META_FORMAT_VALUE,
        META_VERSION: __version__,
        META_ESTIMATOR: str(prov.get("estimator", "unknown")),
        META_FEATURES: json.dumps([f.name for f in ensemble.features]),
        META_CATEGORIES: json.dumps({f.name: f.categories for f in ensemble.features if f.is_categorical}),
        META_SEMANTICS: json.dumps(semantics, sort_keys=True),
        META_PROVENANCE: json.dumps(prov, sort_keys=True, default=str),
    }
    ref = ensemble.reference
    rows = ref.rows if ref is not None else None
    if ensemble.fields is not None:
        meta[META_PREPROCESSING] = json.dumps(preprocessing_statement(ensemble), sort_keys=True, allow_nan=False)
        if ref is not None:
            from ..json.device import feature_preparer

            prepare = feature_preparer(ensemble)
            rows = [prepare(row, i) for i, row in enumerate(ref.rows)]
    if ref is not None:
        meta[META_REFERENCE] = json.dumps({
            "rows": [[_json_number(v) for v in row] for row in rows],
            "raw": [[_json_number(v) for v in r] for r in ref.raw],
            "transformed": [[_json_number(v) for v in r] for r in ref.transformed],
        }, allow_nan=False)
    meta.update(extra or {})
    return meta


def preprocessing_statement(ensemble: Ensemble) -> Dict[str, Any]:
    """What metadata ``boxwood.preprocessing`` says for a pipeline's ensemble: the graph
    holds the tree part only; its input is the preprocessed feature vector; per feature,
    the raw field it comes from and the steps (the JSON artefact's ``source``)."""
    return {
        "in_graph": False,
        "graph_input": "the preprocessed feature vector (after imputation, encoding and scaling), in feature order",
        "fields": list(ensemble.fields or []),
        "features": [{"name": f.name, "source": f.source} for f in ensemble.features],
    }


def assemble(kit: GraphKit, ensemble: Ensemble, input_type: int, outputs: List[Any],
             meta: Dict[str, str], opsets: Dict[str, int], doc: str, ir_version: int = 10) -> Any:
    """The ModelProto from the collected nodes, checked by onnx.checker."""
    onnx = kit.onnx
    helper = onnx.helper
    x = helper.make_tensor_value_info(INPUT_NAME, input_type, ["N", len(ensemble.features)])
    graph = helper.make_graph(kit.nodes, "boxwood_tree_ensemble", [x], outputs, kit.initializers)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid(d, v) for d, v in opsets.items()],
                              producer_name="boxwood", producer_version=meta[META_VERSION], doc_string=doc)
    model.ir_version = ir_version  # 10 goes with opset 21; older runtimes want 7 (opset 13)
    for key, value in meta.items():
        entry = model.metadata_props.add()
        entry.key, entry.value = key, value
    onnx.checker.check_model(model, full_check=True)
    return model


def _doc(ensemble: Ensemble) -> str:
    names = ", ".join(f.name + (" (category code)" if f.is_categorical else "") for f in ensemble.features)
    return ("Tree ensemble exported by boxwood from %s. Input columns in this order: %s. "
            "Missing values are NaN; a categorical column takes the index of the category in "
            "metadata boxwood.categories." % (ensemble.provenance.get("estimator", "a model"), names)
            + (" The model's preprocessing is NOT in this graph: the input is the preprocessed feature "
               "vector (after imputation, encoding and scaling); metadata boxwood.preprocessing lists each feature's "
               "raw field and steps." if ensemble.fields is not None else ""))
