"""The hub: one in-memory form of an additive tree ensemble.

Readers build an :class:`Ensemble`; writers and evaluators consume it. Nothing here
imports scikit-learn or writes files. Every decision rule that an evaluator needs is
stated as data instead of being left to whoever reads the model:

* a numeric split sends a record left when ``x <= threshold``, where ``x`` is the
  input first rounded to ``Ensemble.compare_precision`` ("float64": as given;
  "float32": rounded to the nearest float32, as scikit-learn's classic trees do);
* a missing value (NaN or an absent reading) goes left or right as the node's
  ``missing_left`` flag says, or is refused outright when
  ``Ensemble.missing_values == "reject"``;
* a categorical split sends a record left when its category code is in the node's
  ``left_categories``; a missing or unseen category follows ``missing_left``;
* the raw score of output ``k`` is ``base_values[k]`` plus the leaf values of the
  trees whose ``output == k``, added one by one in tree order in float64
  (``combine == "sum"``), or their mean (``combine == "mean"``);
* the post-transform maps raw scores to the user-facing output;
* a calibrated classifier (``Ensemble.calibration``, scikit-learn's
  ``CalibratedClassifierCV``) holds several folds: fold ``f``'s raw outputs are the
  contiguous slice ``f * m .. f * m + m - 1`` (``m = fold_outputs``), each fold's raw
  scores give its response (decision values or probabilities, by the post-transform),
  per-class calibrators map the response to probabilities, and the folds' probabilities
  are averaged (docs/calibration.md; the arithmetic is ``contract.calibrated_probabilities``).
* the target steps (regressors only, ``Ensemble.target_steps``) then map each output
  element-wise, in order, the way a wrapper undoes its target transform (see
  :data:`TARGET_OPS`); raw scores never pass through them.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

TASKS = ("regression", "classification", "outlier_detection")
PRECISIONS = ("float64", "float32")
COMBINES = ("sum", "mean")
MISSING_POLICIES = ("route", "reject")
# identity: raw score as is (for a classifier: the raw scores are the class
# probabilities); exp: math.exp(raw); logistic: 1 / (1 + exp(-raw)); logistic_double:
# logistic(2 * raw) (exponential loss); softmax: over the outputs; samme: AdaBoost's
# decision raw / weight_total and its softmax probabilities; isolation: an isolation
# forest's score -(2 ** -(raw / denominator)), decision score - offset.
POST_TRANSFORMS = ("identity", "exp", "logistic", "logistic_double", "softmax", "samme", "isolation")
TRANSFORM_PARAMS = {"samme": ("weight_total",), "isolation": ("denominator", "offset")}
# Classifiers whose raw scores hold one value per class even for two classes.
PER_CLASS_TRANSFORMS = ("identity", "softmax", "samme")
# How a softmax (softmax, samme) adds its exponentials: "sequential", left to right (the
# histogram boosters' own loop), or "pairwise", the order numpy.sum takes along a row
# (scikit-learn's utils.extmath.softmax: classic boosting, AdaBoost); they differ in the
# last bits from 8 classes on.
SOFTMAX_SUMS = ("sequential", "pairwise")
# How a binary classifier turns its raw score into the positive class.
BINARY_RULES = ("raw_gt_0", "raw_ge_0")
# Calibration (CalibratedClassifierCV): what feeds the calibrators ("decision": the fold
# classifier's decision_function; "probability": its predict_proba), the calibrator kinds,
# and how the per-class probabilities are completed ("complement": two classes, p0 = 1 - p1;
# "row_sum": divided by their row sum, numpy's pairwise sum, 1 / n_classes where it is 0).
CALIBRATION_RESPONSES = ("decision", "probability")
CALIBRATION_METHODS = ("isotonic", "sigmoid")
CALIBRATION_NORMALISATIONS = ("complement", "row_sum")

LEAF = -1

# Target steps: what a TransformedTargetRegressor's inverse does to each prediction, after
# the post-transform, one step after the other, element-wise in float64 (docs/wrappers.md):
#   {"op": "exp"}: exp(y) (numpy.exp); {"op": "expm1"}: exp(y) - 1 computed as numpy.expm1;
#   {"op": "mul" | "add" | "sub" | "div", "values": [c_0, ..., c_{K-1}]}: y_k * c_k, y_k + c_k,
#   y_k - c_k, y_k / c_k (one IEEE operation; one finite constant per output).
# Every step is monotone (non-decreasing for exp, expm1, add, sub and for mul/div by a
# positive constant; non-increasing for a negative one), so it never changes which side of
# a threshold a prediction lands on relative to its neighbours' order.
TARGET_OPS = ("exp", "expm1", "mul", "add", "sub", "div")
TARGET_OPS_WITH_VALUES = ("mul", "add", "sub", "div")


class ModelError(ValueError):
    """An ensemble that breaks the hub's rules (raised by :meth:`Ensemble.check`)."""


@dataclass
class Feature:
    """One input column as the source model sees it.

    ``categories`` is None for a numeric feature; for a categorical feature it lists
    the category values (strings or numbers) in code order: code ``i`` stands for
    ``categories[i]``.
    """

    name: str
    kind: str = "numeric"  # "numeric" or "categorical"
    categories: Optional[List[Any]] = None
    # Where the value comes from when the ensemble carries preprocessing: the raw record
    # field ``source["field"]`` (a name in ``Ensemble.fields``) passed through the steps
    # ``source["steps"]`` in order. Each step is a dict:
    #   {"op": "impute", "value": v, ["replaces": "nan" | "none"]}: the value the imputer
    #    treats as missing (NaN, the default, or Python None) becomes v;
    #   {"op": "encode", "categories": [...], "unknown": "error" | number | None,
    #    ["missing": number | None], ["none": number]}: a value becomes float(its index
    #    in categories); NaN becomes "missing" when that key is present (None = NaN), a
    #    Python None becomes "none" when present (its fitted code); else they count as
    #    unknown; an unknown value is an error or becomes "unknown".
    #   {"op": "lookup", "categories": [...], "values": [...], "unknown": "error" | number,
    #    ["missing": number], ["none": number]}: a value becomes values[its index in
    #    categories] (one output column of a OneHotEncoder or TargetEncoder); NaN, None
    #    and unseen values as for "encode" (format version 3);
    #   {"op": "arithmetic", "sequence": [[operation, constant...], ...]}: float64
    #    operations in order on a number ("sub" x - c, "div" x / c, "mul" x * c, "add"
    #    x + c, "clip" [lo, hi]: below lo becomes lo, above hi becomes hi, NaN stays):
    #    an affine scaler's transform, op for op (format version 3).
    source: Optional[Dict[str, Any]] = None

    @property
    def is_categorical(self) -> bool:
        return self.kind == "categorical"


@dataclass
class Tree:
    """One regression tree in parallel arrays, node 0 is the root.

    For a leaf: ``feature[i] == LEAF``, ``left[i] == right[i] == LEAF`` and
    ``value[i]`` is what the leaf adds to its output (learning rate already applied).
    For a split node: ``value[i]`` is 0.0 and ignored. ``left_categories[i]`` is
    None for a numeric split and a sorted tuple of category codes for a categorical
    split (then ``threshold[i]`` is ignored and written as 0.0).
    """

    output: int
    feature: List[int]
    threshold: List[float]
    left: List[int]
    right: List[int]
    missing_left: List[bool]
    value: List[float]
    left_categories: List[Optional[Tuple[int, ...]]] = field(default_factory=list)

    def __post_init__(self) -> None:
        if not self.left_categories:
            self.left_categories = [None] * len(self.feature)

    @property
    def n_nodes(self) -> int:
        return len(self.feature)

    def depth(self) -> int:
        """Number of splits on the longest root-to-leaf path."""
        best = 0
        stack = [(0, 0)]
        while stack:
            node, d = stack.pop()
            if self.feature[node] == LEAF:
                best = max(best, d)
            else:
                stack.append((self.left[node], d + 1))
                stack.append((self.right[node], d + 1))
        return best


@dataclass
class Reference:
    """Reference rows scored by the source model, carried so a device can test itself.

    ``rows`` are records in feature order (numbers, category values, None for
    missing); ``raw`` holds the source's raw scores per row (one per output) and
    ``transformed`` its post-transformed outputs per row (for a binary classifier
    the positive-class probability).
    """

    rows: List[List[Any]]
    raw: List[List[float]]
    transformed: List[List[float]]


@dataclass
class Ensemble:
    """An additive tree ensemble with its decision semantics spelled out."""

    task: str
    features: List[Feature]
    trees: List[Tree]
    base_values: List[float]
    post_transform: str = "identity"
    combine: str = "sum"
    compare_precision: str = "float64"
    missing_values: str = "route"
    classes: Optional[List[Any]] = None
    binary_rule: Optional[str] = None
    output_names: List[str] = field(default_factory=list)
    accepts_infinity: bool = True
    post_transform_params: Dict[str, float] = field(default_factory=dict)
    softmax_sum: str = "sequential"  # one of SOFTMAX_SUMS (used by softmax and samme)
    # Raw record fields, when the ensemble carries preprocessing (a scikit-learn Pipeline);
    # then every feature has a ``source``. None: records hold the features themselves.
    fields: Optional[List[str]] = None
    # CalibratedClassifierCV: {"response": one of CALIBRATION_RESPONSES, "normalisation": one
    # of CALIBRATION_NORMALISATIONS, "folds": [{"post_transform_params": {...}, "calibrators":
    # [{"method": "isotonic", "x": [...], "y": [...]} | {"method": "sigmoid", "a": a, "b": b},
    # one per class (one for two classes: the positive class)]}, ...]}. None: not calibrated.
    calibration: Optional[Dict[str, Any]] = None
    # Element-wise steps applied to the transformed outputs of a regressor (TARGET_OPS).
    target_steps: List[Dict[str, Any]] = field(default_factory=list)
    provenance: Dict[str, Any] = field(default_factory=dict)
    reference: Optional["Reference"] = None

    @property
    def n_outputs(self) -> int:
        return len(self.base_values)

    @property
    def n_nodes(self) -> int:
        return sum(t.n_nodes for t in self.trees)

    @property
    def n_folds(self) -> int:
        """Calibrated folds (1 for an ensemble without calibration)."""
        return len(self.calibration["folds"]) if self.calibration else 1

    @property
    def fold_outputs(self) -> int:
        """Raw outputs per fold (all of them without calibration)."""
        return self.n_outputs // self.n_folds if self.calibration else self.n_outputs

    def max_depth(self) -> int:
        return max((t.depth() for t in self.trees), default=0)

    def check(self) -> "Ensemble":
        """Raise :class:`ModelError` unless every rule of the hub holds; return self."""
        _one_of("task", self.task, TASKS)
        _one_of("post_transform", self.post_transform, POST_TRANSFORMS)
        _one_of("combine", self.combine, COMBINES)
        _one_of("compare_precision", self.compare_precision, PRECISIONS)
        _one_of("missing_values", self.missing_values, MISSING_POLICIES)
        _one_of("softmax_sum", self.softmax_sum, SOFTMAX_SUMS)
        if not self.features:
            raise ModelError("the ensemble has no input features")
        names = [f.name for f in self.features]
        if len(set(names)) != len(names):
            raise ModelError("feature names repeat: %r" % names)
        for f in self.features:
            _one_of("feature kind of %r" % f.name, f.kind, ("numeric", "categorical"))
            if f.is_categorical and not f.categories:
                raise ModelError("categorical feature %r lists no categories" % f.name)
            _check_source(f, self.fields)
        k = self.n_outputs
        if k < 1:
            raise ModelError("the ensemble has no outputs (no base values)")
        if self.calibration is not None:
            _check_calibration(self)
            k = self.fold_outputs  # the rules below hold per fold
        if not all(isinstance(b, float) and math.isfinite(b) for b in self.base_values):
            raise ModelError("base values must be finite floats: %r" % self.base_values)
        wanted = TRANSFORM_PARAMS.get(self.post_transform, ())
        if sorted(self.post_transform_params) != sorted(wanted) or not all(
                isinstance(v, float) and math.isfinite(v) for v in self.post_transform_params.values()):
            raise ModelError("post_transform %r takes the finite float parameters %s, not %r"
                             % (self.post_transform, list(wanted), self.post_transform_params))
        if self.task == "classification":
            if not self.classes or len(self.classes) < 2:
                raise ModelError("a classifier needs at least two class labels")
            if len(self.classes) == 2 and self.post_transform not in PER_CLASS_TRANSFORMS:
                if k != 1:
                    raise ModelError("a binary classifier has one raw output, not %d" % k)
                _one_of("binary_rule", self.binary_rule, BINARY_RULES)
            elif k != len(self.classes):
                raise ModelError("%d classes but %d raw outputs" % (len(self.classes), k))
            _one_of("post_transform of a classifier", self.post_transform,
                    ("identity", "logistic", "logistic_double", "softmax", "samme"))
        elif self.task == "outlier_detection":
            if self.post_transform != "isolation" or k != 1 or self.classes != [-1, 1]:
                raise ModelError("an outlier detector has one raw output, the isolation "
                                 "post-transform and the labels [-1, 1]")
        else:
            if self.classes is not None:
                raise ModelError("a regressor carries no class labels")
            _one_of("post_transform of a regressor", self.post_transform, ("identity", "exp"))
        if self.binary_rule is not None and not (self.task == "classification" and k == 1):
            raise ModelError("binary_rule belongs to binary classifiers with one raw output only")
        if self.post_transform == "softmax" and k < 2:
            raise ModelError("softmax needs two or more outputs")
        if self.output_names and len(self.output_names) != self.n_outputs:
            raise ModelError("%d output names for %d outputs" % (len(self.output_names), self.n_outputs))
        for index, tree in enumerate(self.trees):
            _check_tree(tree, index, self.features, self.n_outputs)
        check_target_steps(self.target_steps, self.task, self.n_outputs)
        if self.post_transform == "isolation" and (
                any(b < 0.0 for b in self.base_values)
                or any(v < 0.0 for t in self.trees for f, v in zip(t.feature, t.value) if f == LEAF)):
            raise ModelError("an isolation forest's leaves and base value are path lengths; a negative one "
                             "is not (the device scorer refuses it too)")
        return self


def _finite(v: Any) -> bool:
    return isinstance(v, float) and math.isfinite(v)


def _check_calibration(e: "Ensemble") -> None:
    """The rules of ``Ensemble.calibration`` (see the field's comment)."""
    cal = e.calibration
    if not isinstance(cal, dict) or set(cal) != {"response", "normalisation", "folds"}:
        raise ModelError("calibration needs exactly the keys response, normalisation, folds; got %r"
                         % (sorted(cal) if isinstance(cal, dict) else cal,))
    if e.task != "classification" or not e.classes:
        raise ModelError("calibration belongs to classifiers only")
    _one_of("calibration.response", cal["response"], CALIBRATION_RESPONSES)
    want = "complement" if len(e.classes) == 2 else "row_sum"
    if cal["normalisation"] != want:
        raise ModelError("calibration.normalisation is %r; %d classes need %r"
                         % (cal["normalisation"], len(e.classes), want))
    folds = cal["folds"]
    if not isinstance(folds, list) or not folds:
        raise ModelError("calibration lists no folds")
    if e.n_outputs % len(folds):
        raise ModelError("%d raw outputs do not split into %d folds" % (e.n_outputs, len(folds)))
    per = 1 if len(e.classes) == 2 else len(e.classes)
    wanted = TRANSFORM_PARAMS.get(e.post_transform, ())
    for f, fold in enumerate(folds):
        where = "calibration.folds[%d]" % f
        if not isinstance(fold, dict) or set(fold) != {"post_transform_params", "calibrators"}:
            raise ModelError("%s needs exactly the keys post_transform_params, calibrators" % where)
        params = fold["post_transform_params"]
        if not isinstance(params, dict) or sorted(params) != sorted(wanted) or not all(
                _finite(v) for v in params.values()):
            raise ModelError("%s.post_transform_params: %r takes the finite float parameters %s"
                             % (where, e.post_transform, list(wanted)))
        cals = fold["calibrators"]
        if not isinstance(cals, list) or len(cals) != per:
            raise ModelError("%s: %d classes need %d calibrators" % (where, len(e.classes), per))
        for c, cal_c in enumerate(cals):
            _check_calibrator(cal_c, "%s.calibrators[%d]" % (where, c))
    if dict(e.post_transform_params) != dict(folds[0]["post_transform_params"]):
        raise ModelError("post_transform_params must be fold 0's (calibration.folds[0])")


def _check_calibrator(cal: Any, where: str) -> None:
    method = cal.get("method") if isinstance(cal, dict) else None
    if method == "sigmoid":
        if set(cal) != {"method", "a", "b"} or not (_finite(cal["a"]) and _finite(cal["b"])):
            raise ModelError("%s: a sigmoid calibrator has the finite floats a and b" % where)
    elif method == "isotonic":
        x, y = cal.get("x"), cal.get("y")
        if (set(cal) != {"method", "x", "y"} or not isinstance(x, list) or not isinstance(y, list)
                or not x or len(x) != len(y) or not all(_finite(v) for v in x + y)):
            raise ModelError("%s: an isotonic calibrator has equally long, non-empty lists x and y of "
                             "finite floats" % where)
        bad = next((i for i in range(1, len(x)) if not x[i - 1] < x[i]), None)
        if bad is not None:
            raise ModelError("%s: knot x[%d] = %r does not follow x[%d] = %r (strictly increasing)"
                             % (where, bad, x[bad], bad - 1, x[bad - 1]))
    else:
        raise ModelError("%s: method is %r; expected one of %s" % (where, method, ", ".join(
            map(repr, CALIBRATION_METHODS))))


def check_target_steps(steps: Any, task: str, n_outputs: int) -> None:
    """Raise :class:`ModelError` unless ``steps`` are valid target steps (see TARGET_OPS)."""
    if not isinstance(steps, list):
        raise ModelError("target_steps must be a list, not %r" % (steps,))
    if steps and task != "regression":
        raise ModelError("target steps belong to regressors only (task is %r)" % task)
    for i, step in enumerate(steps):
        op = step.get("op") if isinstance(step, dict) else None
        if op not in TARGET_OPS:
            raise ModelError("target_steps[%d]: op %r; expected one of %s" % (i, op, ", ".join(TARGET_OPS)))
        wanted = {"op", "values"} if op in TARGET_OPS_WITH_VALUES else {"op"}
        if set(step) != wanted:
            raise ModelError("target_steps[%d] (%s) takes the keys %s, not %s"
                             % (i, op, sorted(wanted), sorted(step)))
        if op in TARGET_OPS_WITH_VALUES:
            values = step["values"]
            if not (isinstance(values, list) and len(values) == n_outputs
                    and all(isinstance(v, float) and math.isfinite(v) for v in values)):
                raise ModelError("target_steps[%d] (%s) needs %d finite floats (one per output), not %r"
                                 % (i, op, n_outputs, values))
            if op == "div" and any(v == 0.0 for v in values):
                raise ModelError("target_steps[%d] divides by zero" % i)


def _check_source(f: Feature, fields: Optional[List[str]]) -> None:
    if fields is None:
        if f.source is not None:
            raise ModelError("feature %r has a source but the ensemble lists no raw fields" % f.name)
        return
    src = f.source
    if not isinstance(src, dict) or src.get("field") not in fields or not isinstance(src.get("steps"), list):
        raise ModelError("feature %r needs a source naming one of the raw fields %r" % (f.name, fields))
    for step in src["steps"]:
        op = step.get("op")
        if op == "impute":
            ok = (set(step) - {"replaces"} == {"op", "value"} and isinstance(step["value"], (int, float, str))
                  and step.get("replaces", "nan") in ("nan", "none"))
        elif op == "encode":
            ok = (set(step) - {"missing", "none"} == {"op", "categories", "unknown"}
                  and isinstance(step["categories"], list) and step["categories"]
                  and (step["unknown"] in ("error", None) or isinstance(step["unknown"], float)))
        elif op == "lookup":
            ok = (set(step) - {"missing", "none"} == {"op", "categories", "values", "unknown"}
                  and isinstance(step["categories"], list) and step["categories"]
                  and isinstance(step["values"], list) and len(step["values"]) == len(step["categories"])
                  and all(_finite(v) for v in step["values"])
                  and all(_finite(step[k]) for k in ("missing", "none") if k in step)
                  and (step["unknown"] == "error" or _finite(step["unknown"])))
        elif op == "arithmetic":
            seq = step.get("sequence")
            ok = (set(step) == {"op", "sequence"} and isinstance(seq, list) and bool(seq)
                  and all(isinstance(s, list) and s and s[0] in ARITHMETIC_OPS
                          and len(s) == (3 if s[0] == "clip" else 2) and all(_finite(c) for c in s[1:])
                          for s in seq))
        else:
            ok = False
        if not ok:
            raise ModelError("feature %r: malformed preprocessing step %r" % (f.name, step))


# The operations of an "arithmetic" preprocessing step.
ARITHMETIC_OPS = ("sub", "div", "mul", "add", "clip")
# Steps a format version 2 artefact cannot carry.
FORMAT_3_STEPS = ("lookup", "arithmetic")


def _finite(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool) and math.isfinite(v)


def _one_of(what: str, value: Any, allowed: Sequence[Any]) -> None:
    if value not in allowed:
        raise ModelError("%s is %r; expected one of %s" % (what, value, ", ".join(map(repr, allowed))))


def _check_tree(tree: Tree, index: int, features: List[Feature], n_outputs: int) -> None:
    where = "tree %d" % index
    n = tree.n_nodes
    arrays = (tree.threshold, tree.left, tree.right, tree.missing_left, tree.value, tree.left_categories)
    if n == 0 or any(len(a) != n for a in arrays):
        raise ModelError("%s: node arrays are empty or of unequal length" % where)
    if not 0 <= tree.output < n_outputs:
        raise ModelError("%s: output %d out of range 0..%d" % (where, tree.output, n_outputs - 1))
    seen = [False] * n
    stack = [0]
    while stack:
        node = stack.pop()
        if seen[node]:
            raise ModelError("%s: node %d is reached twice (not a tree)" % (where, node))
        seen[node] = True
        f = tree.feature[node]
        if f == LEAF:
            if tree.left[node] != LEAF or tree.right[node] != LEAF:
                raise ModelError("%s: leaf %d has children" % (where, node))
            if not math.isfinite(tree.value[node]):
                raise ModelError("%s: leaf %d value is not finite" % (where, node))
            continue
        if tree.value[node] != 0.0:
            raise ModelError("%s: split node %d carries a value (only leaves do)" % (where, node))
        if not 0 <= f < len(features):
            raise ModelError("%s: node %d splits on feature %d, out of range" % (where, node, f))
        cats = tree.left_categories[node]
        if features[f].is_categorical != (cats is not None):
            raise ModelError("%s: node %d split kind does not match feature %r" % (where, node, features[f].name))
        if cats is not None and not all(0 <= c < len(features[f].categories) for c in cats):
            raise ModelError("%s: node %d has a category code out of range" % (where, node))
        if cats is None and math.isnan(tree.threshold[node]):
            raise ModelError("%s: node %d threshold is NaN" % (where, node))
        for child in (tree.left[node], tree.right[node]):
            if not 0 < child < n:
                raise ModelError("%s: node %d has child %d out of range" % (where, node, child))
            stack.append(child)
    if not all(seen):
        raise ModelError("%s: node %d is unreachable" % (where, seen.index(False)))


def split_counts(ensemble: Ensemble) -> List[int]:
    """How many split nodes use each feature, across all trees (index = feature index)."""
    counts = [0] * len(ensemble.features)
    for tree in ensemble.trees:
        for f in tree.feature:
            if f != LEAF and 0 <= f < len(counts):
                counts[f] += 1
    return counts
