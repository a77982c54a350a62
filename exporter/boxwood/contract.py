"""The output contract: how raw scores become exact values, outputs and labels, and what an
evaluator promises. Written once here for the workstation side.

**From raw scores to what users see.** An ensemble's raw scores (one float64 per output:
``base value + leaves``, or their mean) become, by the ensemble's post-transform:

* *exact values*: what a device must reproduce bit for bit. The raw scores themselves,
  except for AdaBoost (``samme``), whose raw vote sums scikit-learn never shows: there
  they are its decision values ``raw / weight_total`` (two classes: ``-d0 + d1``);
* *decision values* (``decision_function``): the raw scores; AdaBoost as above; an
  isolation forest's ``score_samples - offset``;
* *transformed outputs*: the prediction (after the post-transform, a regressor's target
  steps, element-wise and in order: :func:`apply_target_steps`), the class probabilities (for a binary
  classifier with one raw output, the positive class only), or an isolation forest's
  ``score_samples``;
* *labels*: the class of the largest decision value (first of equal maxima); a binary
  classifier with one raw output by its ``binary_rule``; an outlier detector -1 where
  its decision value is below 0, else 1.

A calibrated classifier (``Ensemble.calibration``, scikit-learn's ``CalibratedClassifierCV``)
has no decision function: its exact values are every fold's own exact values side by side
(fold-major), its transformed outputs the calibrated probabilities of all classes
(:func:`calibrated_probabilities`) and its label the class of the largest probability
(first of equal maxima), as ``CalibratedClassifierCV.predict`` does.

The device side keeps two standalone copies of this contract, because it cannot import
the workstation: ``boxwood_runtime.scorer`` (pure Python, one record) and
``boxwood_runtime.batch`` (numpy). tests/test_contract.py holds all three together on
every task, constant by constant and value by value.

**Evaluators.** Anything that computes a model's outputs (the source model, the device
scorer, onnxruntime, a C build) is an object with:

* ``name`` (str) - shown in reports, e.g. "device scorer";
* ``evaluate(rows) -> Outputs(raw, transformed, labels)`` - exact values (n, n_exact),
  transformed outputs (n, n_transformed), labels (a list) or None for a regressor. Rows
  hold what a record holds: the features in order (numbers, category values, None for
  missing), or the raw fields of a pipeline. A row it refuses raises ``ValueError``;
* for the structural proof, what it does with numbers: ``input_precision`` ("float64",
  or "float32" when it takes float32 inputs), ``compare_precision`` (None: as the
  artefact states), ``summation_order`` ("tree": base value, then each tree in order;
  "any": another order) and ``summation_precision`` ("float64"/"float32").

Subclass :class:`Evaluator` for defaults; :func:`check_evaluator` validates a plug-in.
"""
from __future__ import annotations

from typing import Any, Dict, List, NamedTuple, Optional, Sequence

import numpy as np

from .ir import PER_CLASS_TRANSFORMS, Ensemble

PRECISIONS = ("float64", "float32")
SUMMATION_ORDERS = ("tree", "any")


class Outputs(NamedTuple):
    """What an evaluator returns for a block of rows."""

    raw: np.ndarray  # (n, n_exact) float64: the values a device reproduces bit for bit
    transformed: np.ndarray  # (n, n_transformed) float64
    labels: Optional[List[Any]]  # predicted labels (classes, or -1/1 for outliers); None for regressors


class Evaluator:
    """Base class of evaluators (see the module docstring for the contract)."""

    name = "evaluator"
    input_precision = "float64"
    compare_precision: Optional[str] = None
    summation_order = "tree"
    summation_precision = "float64"
    # A short description of how the post-transform is computed (reports only).
    transform_implementation = "unspecified"
    # Rows handed to evaluate() at once (the verifier's progress bar moves once per block).
    block_rows = 1024

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        raise NotImplementedError

    def properties(self) -> Dict[str, Any]:
        """What the structural proof and the report need to know about this evaluator."""
        return {
            "input_precision": self.input_precision,
            "compare_precision": self.compare_precision,
            "summation_order": self.summation_order,
            "summation_precision": self.summation_precision,
            "transform_implementation": self.transform_implementation,
        }


def check_evaluator(ev: Any) -> None:
    """Raise ValueError unless ``ev`` states valid properties (plug-ins are checked on use)."""
    name = getattr(ev, "name", None)
    if not isinstance(name, str) or not name:
        raise ValueError("an evaluator needs a non-empty name, got %r" % (name,))
    if not callable(getattr(ev, "evaluate", None)):
        raise ValueError("evaluator %r has no evaluate(rows) method" % name)
    for attr, allowed in (("input_precision", PRECISIONS), ("summation_order", SUMMATION_ORDERS),
                          ("summation_precision", PRECISIONS), ("compare_precision", PRECISIONS + (None,))):
        value = getattr(ev, attr, None)
        if value not in allowed:
            raise ValueError("evaluator %r: %s is %r; expected one of %s"
                             % (name, attr, value, ", ".join(map(repr, allowed))))


class OutputContract:
    """The contract for one ensemble: raw scores (n, n_outputs) in, everything else out."""

    def __init__(self, ensemble: Ensemble):
        self.task = ensemble.task
        self.post_transform = ensemble.post_transform
        self.params = dict(ensemble.post_transform_params or {})
        self.n_outputs = ensemble.n_outputs
        self.classes = list(ensemble.classes) if ensemble.classes is not None else None
        self.binary_rule = ensemble.binary_rule
        self.softmax_sum = ensemble.softmax_sum
        self.calibration = ensemble.calibration
        self.fold_outputs = ensemble.fold_outputs
        self.target_steps = [dict(st) for st in (ensemble.target_steps or [])]

    # -- widths --------------------------------------------------------------------
    @property
    def n_exact(self) -> int:
        """Exact values per row."""
        if self.calibration is not None:
            per = 1 if (self.post_transform == "samme" and self.fold_outputs == 2) else self.fold_outputs
            return per * len(self.calibration["folds"])
        return 1 if (self.post_transform == "samme" and self.n_outputs == 2) else self.n_outputs

    @property
    def n_transformed(self) -> int:
        """Transformed outputs per row."""
        if self.calibration is not None:
            return len(self.classes)
        return self.n_outputs

    @property
    def one_score_binary(self) -> bool:
        """A binary classifier with one raw output (its probability column is the positive class)."""
        if self.calibration is not None:
            return False  # calibrated: the probabilities of all classes
        return self.task == "classification" and self.post_transform not in PER_CLASS_TRANSFORMS

    # -- values --------------------------------------------------------------------
    def exact_values(self, raw: np.ndarray) -> np.ndarray:
        raw = _matrix(raw)
        if self.calibration is not None:
            return calibrated_exact_values(self.calibration, self.post_transform, raw)
        if self.post_transform == "samme":
            return samme_decision(raw, self.params["weight_total"])
        return raw

    def decision_values(self, raw: np.ndarray) -> np.ndarray:
        """Decision values; a calibrated classifier has none, its labels come from the
        calibrated probabilities, which this returns for it."""
        raw = _matrix(raw)
        if self.calibration is not None:
            return self.transformed(raw)
        if self.post_transform == "samme":
            return samme_decision(raw, self.params["weight_total"])
        if self.post_transform == "isolation":
            return self.transformed(raw) - self.params["offset"]
        return raw

    def transformed(self, raw: np.ndarray) -> np.ndarray:
        if self.calibration is not None:
            return calibrated_probabilities(self.calibration, self.post_transform, self.softmax_sum,
                                            _matrix(raw), len(self.classes))
        out = transform(self.post_transform, _matrix(raw), self.params, self.softmax_sum)
        return apply_target_steps(self.target_steps, out)

    def positive_class(self, probabilities: np.ndarray) -> np.ndarray:
        """Class probabilities (n, n_classes) as transformed outputs: a one-score binary
        classifier keeps the positive class's column only."""
        p = _matrix(probabilities)
        return p[:, 1:] if self.one_score_binary and p.shape[1] == 2 else p

    def label_index(self, raw: np.ndarray) -> np.ndarray:
        """Index into ``classes`` of the predicted label, per row."""
        raw = _matrix(raw)
        if self.task == "outlier_detection":  # scikit-learn: -1 where the decision is < 0
            return (self.decision_values(raw)[:, 0] >= 0.0).astype(np.intp)
        if self.calibration is not None:
            return np.argmax(self.transformed(raw), axis=1)  # the first of equal maxima
        if raw.shape[1] == 1:
            positive = raw[:, 0] > 0.0 if self.binary_rule == "raw_gt_0" else raw[:, 0] >= 0.0
            return positive.astype(np.intp)
        d = self.decision_values(raw)
        if d.shape[1] == 1:  # AdaBoost, two classes: decision > 0 means the second
            return (d[:, 0] > 0.0).astype(np.intp)
        return np.argmax(d, axis=1)  # the first of equal maxima

    def labels(self, raw: np.ndarray) -> Optional[List[Any]]:
        """Predicted labels, or None for a regressor."""
        if self.task == "regression":
            return None
        return [self.classes[i] for i in self.label_index(raw).tolist()]

    def outputs(self, raw: np.ndarray) -> Outputs:
        """Everything an evaluator returns, from raw scores."""
        raw = _matrix(raw)
        return Outputs(self.exact_values(raw), self.transformed(raw), self.labels(raw))


def _matrix(a: Any) -> np.ndarray:
    a = np.asarray(a, dtype=np.float64)
    return a.reshape(len(a), -1) if a.ndim != 2 else a


def samme_decision(raw: np.ndarray, weight_total: float) -> np.ndarray:
    """AdaBoost (SAMME) decision values from the summed class votes, in scikit-learn's
    order of operations: divide by the total weight; for two classes, -d0 + d1."""
    d = _matrix(raw) / weight_total
    return (-d[:, 0] + d[:, 1])[:, None] if d.shape[1] == 2 else d


def softmax(z: np.ndarray, order: str = "sequential") -> np.ndarray:
    """Softmax per row: shift by the row maximum, exp, add, divide. ``order`` says how the
    exponentials are added: "sequential", left to right; "pairwise", as numpy.sum adds a
    contiguous row (scikit-learn's utils.extmath.softmax does that sum)."""
    e = np.exp(z - z.max(axis=1, keepdims=True))
    if order == "pairwise":
        total = np.ascontiguousarray(e).sum(axis=1)
    else:
        total = e[:, 0].copy()
        for k in range(1, e.shape[1]):
            total += e[:, k]
    return e / total[:, None]


def transform(name: str, raw: np.ndarray, params: Optional[Dict[str, float]] = None,
              softmax_sum: str = "sequential") -> np.ndarray:
    """Apply the post-transform ``name`` to raw scores (n, K); return a new array.
    ``softmax_sum``: how a softmax adds its exponentials (see :func:`softmax`)."""
    raw = _matrix(raw)
    with np.errstate(over="ignore"):
        if name == "identity":
            return raw.copy()
        if name == "exp":
            return np.exp(raw)
        if name == "logistic":  # 1 / (1 + e^-v), as scipy.special.expit
            return 1.0 / (1.0 + np.exp(-raw))
        if name == "logistic_double":  # the exponential loss: logistic(2 v)
            return 1.0 / (1.0 + np.exp(-(2.0 * raw)))
        if name == "softmax":
            return softmax(raw, softmax_sum)
        if name == "samme":  # softmax of the decision scaled by 1 / (K - 1)
            d = samme_decision(raw, params["weight_total"])
            if d.shape[1] == 1:
                return softmax(np.column_stack([-d[:, 0] / 2, d[:, 0] / 2]), softmax_sum)
            return softmax(d / (d.shape[1] - 1), softmax_sum)
        if name == "isolation":  # score_samples: -(2 ** -(path length sum / denominator))
            den = params["denominator"]
            q = raw / den if den != 0.0 else np.ones_like(raw)
            return -(2 ** (-q))
    raise ValueError("unknown post_transform %r" % (name,))


# ----------------------------------------------------------------------------- calibration
# CalibratedClassifierCV (scikit-learn 1.9, sklearn/calibration.py), reproduced operation by
# operation in float64; docs/calibration.md walks through it.
CALIBRATION_ONE_SLACK = 1e-5  # probabilities in (1, 1 + 1e-5] become 1.0 (_CalibratedClassifier)


def isotonic_interpolate(t: np.ndarray, x: Sequence[float], y: Sequence[float]) -> np.ndarray:
    """IsotonicRegression(out_of_bounds="clip").predict: ``t`` clipped to [x[0], x[-1]], then
    scipy's interp1d(kind="linear"), which for float64 knots hands over to numpy.interp:
    with x[j] <= t < x[j + 1], the knot's y[j] when t == x[j] (and y[-1] at the last knot),
    else slope * (t - x[j]) + y[j] with slope = (y[j+1] - y[j]) / (x[j+1] - x[j]); when that
    is NaN, slope * (t - x[j+1]) + y[j+1], and y[j] if still NaN and y[j] == y[j+1]
    (numpy's arr_interp). One knot: the constant y[0] (IsotonicRegression._build_f)."""
    t = np.asarray(t, dtype=np.float64)
    xs = np.asarray(x, dtype=np.float64)
    ys = np.asarray(y, dtype=np.float64)
    n = len(xs)
    if n == 1:
        return np.full(t.shape, ys[0])
    t = np.clip(t, xs[0], xs[-1])
    j = np.clip(np.searchsorted(xs, t, side="right") - 1, 0, n - 1)
    out = ys[j].copy()
    inner = (j < n - 1) & (xs[j] != t) & ~np.isnan(t)
    jj, tt = j[inner], t[inner]
    with np.errstate(all="ignore"):
        slope = (ys[jj + 1] - ys[jj]) / (xs[jj + 1] - xs[jj])
        v = slope * (tt - xs[jj]) + ys[jj]
        again = np.isnan(v)
        if again.any():
            w = slope[again] * (tt[again] - xs[jj[again] + 1]) + ys[jj[again] + 1]
            flat = np.isnan(w) & (ys[jj[again]] == ys[jj[again] + 1])
            w[flat] = ys[jj[again]][flat]
            v[again] = w
    out[inner] = v
    out[np.isnan(t)] = np.nan
    return out


def sigmoid_calibrate(t: np.ndarray, a: float, b: float) -> np.ndarray:
    """_SigmoidCalibration.predict: expit(-(a * t + b)), expit(z) = 1 / (1 + exp(-z))."""
    z = -(a * np.asarray(t, dtype=np.float64) + b)
    with np.errstate(over="ignore"):
        return 1.0 / (1.0 + np.exp(-z))


def apply_calibrator(cal: Dict[str, Any], t: np.ndarray) -> np.ndarray:
    if cal["method"] == "isotonic":
        return isotonic_interpolate(t, cal["x"], cal["y"])
    return sigmoid_calibrate(t, cal["a"], cal["b"])


def _fold_slices(calibration: Dict[str, Any], raw: np.ndarray):
    folds = calibration["folds"]
    m = raw.shape[1] // len(folds)
    for f, fold in enumerate(folds):
        yield fold, raw[:, f * m:(f + 1) * m]


def calibrated_exact_values(calibration: Dict[str, Any], post_transform: str, raw: np.ndarray) -> np.ndarray:
    """Every fold's exact values (its raw scores; AdaBoost's decision values), fold-major."""
    parts = []
    for fold, r in _fold_slices(calibration, _matrix(raw)):
        if post_transform == "samme":
            parts.append(samme_decision(r, fold["post_transform_params"]["weight_total"]))
        else:
            parts.append(r)
    return np.concatenate(parts, axis=1)


def calibration_response(calibration: Dict[str, Any], post_transform: str, softmax_sum: str,
                         fold: Dict[str, Any], raw: np.ndarray) -> np.ndarray:
    """One fold's response from its raw scores: its decision values (decision_function) or its
    probabilities (predict_proba); for two classes the positive class's column only."""
    params = fold["post_transform_params"]
    if calibration["response"] == "decision":
        r = samme_decision(raw, params["weight_total"]) if post_transform == "samme" else raw
    else:
        r = transform(post_transform, raw, params, softmax_sum)
    return r[:, -1:] if calibration["normalisation"] == "complement" else r


def calibrated_probabilities(calibration: Dict[str, Any], post_transform: str, softmax_sum: str,
                             raw: np.ndarray, n_classes: int) -> np.ndarray:
    """CalibratedClassifierCV.predict_proba from the folds' raw scores: per fold, each class's
    calibrator on its response column (two classes: column 1, and column 0 = 1.0 - p1; more:
    divided by the row sum, numpy's pairwise sum, 1 / n_classes where the sum is 0), values in
    (1, 1 + 1e-5] set to 1.0; the folds' probabilities added in fold order from 0.0 and divided
    by the number of folds."""
    raw = _matrix(raw)
    total = np.zeros((raw.shape[0], n_classes))
    for fold, r in _fold_slices(calibration, raw):
        resp = calibration_response(calibration, post_transform, softmax_sum, fold, r)
        proba = np.zeros((raw.shape[0], n_classes))
        for c, cal in enumerate(fold["calibrators"]):
            proba[:, c + 1 if n_classes == 2 else c] = apply_calibrator(cal, resp[:, c])
        if n_classes == 2:
            proba[:, 0] = 1.0 - proba[:, 1]
        else:
            den = np.ascontiguousarray(proba).sum(axis=1)[:, None]
            proba = np.divide(proba, den, out=np.full_like(proba, 1 / n_classes), where=den != 0)
        proba[(1.0 < proba) & (proba <= 1.0 + CALIBRATION_ONE_SLACK)] = 1.0
        total += proba
    total /= len(calibration["folds"])
    return total
def apply_target_steps(steps: Sequence[Dict[str, Any]], values: np.ndarray) -> np.ndarray:
    """Apply a regressor's target steps (ir.TARGET_OPS) to transformed outputs (n, K), in
    order, element-wise in float64: what scikit-learn's TransformedTargetRegressor does with
    ``inverse_func`` (numpy.exp, numpy.expm1) or its scaler's ``inverse_transform`` (one IEEE
    multiplication, addition, subtraction or division per step, with one constant per
    output: StandardScaler ``y *= scale_; y += mean_``, MinMaxScaler ``y -= min_; y /=
    scale_``). Returns a new array when there are steps, ``values`` itself otherwise."""
    if not steps:
        return values
    y = np.array(_matrix(values), dtype=np.float64)
    with np.errstate(over="ignore"):
        for step in steps:
            op = step["op"]
            if op == "exp":
                y = np.exp(y)
            elif op == "expm1":
                y = np.expm1(y)
            elif op in ("mul", "add", "sub", "div"):
                c = np.asarray(step["values"], dtype=np.float64)
                if op == "mul":
                    y *= c
                elif op == "add":
                    y += c
                elif op == "sub":
                    y -= c
                else:
                    y /= c
            else:
                raise ValueError("unknown target step %r" % (op,))
    return y
