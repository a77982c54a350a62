"""Read scikit-learn's CalibratedClassifierCV into the hub (one Ensemble, all folds).

``calibrated_classifiers_`` holds one (fitted classifier, calibrators) pair per fold
(``ensemble=True``), or one pair (``ensemble=False``, or a ``FrozenEstimator``: scikit-learn
1.9 expresses "prefit" so; ``cv="prefit"`` is gone). Each fold's classifier is read by the
ordinary readers; their trees go into one Ensemble, fold f's raw outputs the contiguous
slice ``f * m .. f * m + m - 1``. The calibrators become ``Ensemble.calibration``
(docs/calibration.md). What must be the same for every fold (features, categories, raw
fields and their preprocessing, classes, precision, missing-value policy, post-transform)
is checked, and a difference is refused by name.
"""
from __future__ import annotations

from typing import Any, Dict, List, Optional

from ..ir import Ensemble
from . import boosting, forests, pipeline
from .common import UnsupportedModel, plain

# The classifiers a calibrated model may wrap (and pipelines ending in one).
INNER_READERS = (boosting.read, forests.read, pipeline.read)

# The fields every fold's Ensemble must agree on (the artefact states them once).
_SHARED = ("task", "compare_precision", "missing_values", "combine", "post_transform", "softmax_sum",
           "binary_rule", "accepts_infinity", "fields")


def _calibrator(cal: Any, where: str) -> Dict[str, Any]:
    from sklearn.calibration import _SigmoidCalibration
    from sklearn.isotonic import IsotonicRegression

    if isinstance(cal, IsotonicRegression):
        if cal.out_of_bounds != "clip":
            raise UnsupportedModel("%s: IsotonicRegression with out_of_bounds=%r (CalibratedClassifierCV "
                                   "uses 'clip')" % (where, cal.out_of_bounds))
        x = [float(v) for v in cal.X_thresholds_]
        y = [float(v) for v in cal.y_thresholds_]
        if str(cal.X_thresholds_.dtype) != "float64" or str(cal.y_thresholds_.dtype) != "float64":
            raise UnsupportedModel("%s: isotonic knots of dtype %s/%s (float64 expected)"
                                   % (where, cal.X_thresholds_.dtype, cal.y_thresholds_.dtype))
        return {"method": "isotonic", "x": x, "y": y}
    if isinstance(cal, _SigmoidCalibration):
        return {"method": "sigmoid", "a": float(cal.a_), "b": float(cal.b_)}
    raise UnsupportedModel("%s: calibrator %s is not supported (isotonic and sigmoid are)"
                           % (where, type(cal).__name__))


def _same(name: str, f: int, a: Any, b: Any) -> None:
    if a != b:
        raise UnsupportedModel("CalibratedClassifierCV: fold %d differs from fold 0 in %s (%r vs %r); the "
                               "artefact states it once for all folds" % (f, name, b, a))


def read(model: Any) -> Optional[Ensemble]:
    """Return the Ensemble for a fitted CalibratedClassifierCV, or None for other models."""
    from sklearn.calibration import CalibratedClassifierCV

    if not isinstance(model, CalibratedClassifierCV):
        return None
    if model.method not in ("isotonic", "sigmoid"):
        raise UnsupportedModel("CalibratedClassifierCV with method=%r is not supported (isotonic and sigmoid "
                               "are)" % (model.method,))
    classes = [plain(c) for c in model.classes_]
    folds: List[Dict[str, Any]] = []
    parts: List[Ensemble] = []
    response = None
    for f, cc in enumerate(model.calibrated_classifiers_):
        est = cc.estimator
        inner = getattr(est, "estimator", None)
        if type(est).__name__ == "FrozenEstimator" and inner is not None:
            est = inner  # sklearn.frozen.FrozenEstimator: the prefit classifier
        try:
            ens = next((e for e in (r(est) for r in INNER_READERS) if e is not None), None)
        except UnsupportedModel as exc:
            raise UnsupportedModel("CalibratedClassifierCV fold %d: %s" % (f, exc))
        if ens is None:
            raise UnsupportedModel("CalibratedClassifierCV fold %d wraps %s, which is not a tree classifier "
                                   "boxwood reads" % (f, type(est).__name__))
        if ens.task != "classification":
            raise UnsupportedModel("CalibratedClassifierCV fold %d holds a %s, not a classifier" % (f, ens.task))
        if [plain(c) for c in est.classes_] != classes:
            raise UnsupportedModel("CalibratedClassifierCV fold %d: its classifier knows the classes %r, the "
                                   "calibrated model %r" % (f, [plain(c) for c in est.classes_], classes))
        # _get_response_values(..., ["decision_function", "predict_proba"]): the first one it has
        kind = "decision" if hasattr(est, "decision_function") else "probability"
        if response is None:
            response = kind
        _same("response method", f, response, kind)
        if parts:
            base = parts[0]
            for name in _SHARED:
                _same(name, f, getattr(base, name), getattr(ens, name))
            _same("features (names, kinds, categories, preprocessing)", f,
                  [(x.name, x.kind, x.categories, x.source) for x in base.features],
                  [(x.name, x.kind, x.categories, x.source) for x in ens.features])
            _same("raw outputs", f, base.n_outputs, ens.n_outputs)
        n_cal = 1 if len(classes) == 2 else len(classes)
        if len(cc.calibrators) != n_cal:
            raise UnsupportedModel("CalibratedClassifierCV fold %d has %d calibrators, %d expected"
                                   % (f, len(cc.calibrators), n_cal))
        cals = [_calibrator(c, "CalibratedClassifierCV fold %d class %d" % (f, i))
                for i, c in enumerate(cc.calibrators)]
        folds.append({"post_transform_params": dict(ens.post_transform_params), "calibrators": cals})
        parts.append(ens)
    first = parts[0]
    m = first.n_outputs
    trees, base_values, names = [], [], []
    for f, ens in enumerate(parts):
        for t in ens.trees:
            t.output += f * m
            trees.append(t)
        base_values += list(ens.base_values)
        names += ["fold%d:%s" % (f, n) for n in (ens.output_names or ["output_%d" % j for j in range(m)])]
    params = {"calibration_method": model.method, "calibration_folds": len(parts),
              "calibration_response": response, "calibration_ensemble": plain(model.ensemble)}
    prov = dict(first.provenance)
    prov["estimator"] = "sklearn.calibration.CalibratedClassifierCV[%s]" % first.provenance.get("estimator")
    prov["parameters"] = dict(prov.get("parameters") or {}, **params)
    return Ensemble(
        task="classification", features=first.features, trees=trees, base_values=base_values,
        post_transform=first.post_transform, combine=first.combine, compare_precision=first.compare_precision,
        missing_values=first.missing_values, classes=classes, binary_rule=first.binary_rule,
        output_names=names, accepts_infinity=first.accepts_infinity,
        post_transform_params=dict(first.post_transform_params), softmax_sum=first.softmax_sum,
        fields=first.fields, provenance=prov,
        calibration={"response": response, "normalisation": "complement" if len(classes) == 2 else "row_sum",
                     "folds": folds},
    ).check()
