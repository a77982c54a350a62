"""Ask the source (scikit-learn) model for its own numbers on rows given in feature order.

Used to embed self-check rows in an artefact, by the verifier (:class:`SourceEvaluator`),
the demo and the tests: it is the reference every evaluator is compared with. Which of
scikit-learn's methods gives which kind of value is this module's; what each kind means
is the output contract's (boxwood.contract).
"""
from __future__ import annotations

from typing import Any, List, Sequence

import numpy as np

from ..contract import Evaluator, OutputContract, Outputs
from ..ir import Ensemble


class SourceModel:
    """Wraps a fitted estimator and the Ensemble read from it."""

    def __init__(self, model: Any, ensemble: Ensemble):
        self.model = model
        self.ensemble = ensemble

    def matrix(self, rows: Sequence[Sequence[Any]]) -> Any:
        """Rows in feature order (None = missing) as the input the estimator was fitted on."""
        feats = self.ensemble.features
        named = getattr(self.model, "feature_names_in_", None) is not None
        if self.ensemble.fields is not None:  # a pipeline: rows hold the raw fields
            import pandas as pd

            if not named:
                return np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)
            columns = {}
            for j, name in enumerate(self.ensemble.fields):
                col = [np.nan if r[j] is None else r[j] for r in rows]
                textual = any(isinstance(v, str) for v in col)
                columns[name] = pd.Series(col, dtype=object if textual else np.float64)
            return pd.DataFrame(columns)
        if named:
            import pandas as pd

            columns = {}
            for j, f in enumerate(feats):
                col = [np.nan if r[j] is None else r[j] for r in rows]
                if f.is_categorical and any(isinstance(c, str) for c in f.categories):
                    columns[f.name] = pd.Series(col, dtype=object)
                else:
                    columns[f.name] = pd.Series(col, dtype=np.float64)
            return pd.DataFrame(columns)
        return np.array([[np.nan if v is None else v for v in r] for r in rows], dtype=np.float64)

    def raw(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        """The values the device must reproduce bit for bit, shape (n_rows, n_values),
        float64 (the device's ``Model.exact_values``): the raw scores of boosted models
        (``decision_function``; ``predict`` before any inverse link), the class
        probabilities of probability-averaging classifiers (trees, forests), AdaBoost's
        ``decision_function``, and an isolation forest's sum of path lengths (computed
        with scikit-learn's own trees, as its ``score_samples`` does before the power)."""
        X = self.matrix(rows)
        if self.ensemble.calibration is not None:
            return calibrated_raw(self.model, self.ensemble, X, len(rows))
        return self.raw_from_matrix(X, len(rows))

    def raw_from_matrix(self, X: Any, n: int) -> np.ndarray:
        """:meth:`raw` for the estimator's input ``X`` of ``n`` rows."""
        m = self.model
        from .wrappers import is_wrapper, raw_scores

        if is_wrapper(m):  # MultiOutputRegressor, TransformedTargetRegressor: the inner raw scores
            out = raw_scores(m, X)
        elif self.ensemble.task == "outlier_detection":
            from .forests import isolation_path_sums

            out = isolation_path_sums(m, X)
        elif self.ensemble.task == "classification" and self.ensemble.post_transform == "identity":
            out = m.predict_proba(X)
        elif self.ensemble.task == "classification":
            out = m.decision_function(X)
        elif self.ensemble.post_transform != "identity":
            out = m._raw_predict(X)  # regressors with a log link predict exp(raw)
        else:
            out = m.predict(X)
        return np.asarray(out, dtype=np.float64).reshape(n, -1)

    def transformed(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        """Post-transformed outputs, shape (n_rows, n_outputs): the prediction, the class
        probabilities (for a binary classifier with one raw output, the positive class
        only), or an isolation forest's ``score_samples``."""
        X = self.matrix(rows)
        if self.ensemble.task == "outlier_detection":
            return np.asarray(self.model.score_samples(X), dtype=np.float64).reshape(len(rows), -1)
        if self.ensemble.calibration is not None:  # CalibratedClassifierCV: all classes
            return np.asarray(self.model.predict_proba(X), dtype=np.float64).reshape(len(rows), -1)
        if self.ensemble.task == "classification":
            return OutputContract(self.ensemble).positive_class(self.model.predict_proba(X))
        return np.asarray(self.model.predict(X), dtype=np.float64).reshape(len(rows), -1)

    def predict(self, rows: Sequence[Sequence[Any]]) -> List[Any]:
        return list(self.model.predict(self.matrix(rows)))


def calibrated_raw(model: Any, ensemble: Ensemble, X: Any, n: int) -> np.ndarray:
    """A CalibratedClassifierCV's exact values: each fold's classifier asked for its own
    (decision_function of boosting and AdaBoost, predict_proba of trees and forests; the
    FrozenEstimator of a prefit model unwrapped), fold after fold."""
    if hasattr(model, "steps"):  # a Pipeline ending in the CalibratedClassifierCV: its steps first
        X = model[:-1].transform(X)
        model = model.steps[-1][1]
    parts = []
    for cc in model.calibrated_classifiers_:
        est = cc.estimator
        if type(est).__name__ == "FrozenEstimator":
            est = est.estimator
        sub = SourceModel(est, _fold_view(ensemble))
        parts.append(sub.raw_from_matrix(X, n))
    return np.concatenate(parts, axis=1)


def _fold_view(ensemble: Ensemble) -> Ensemble:
    """An uncalibrated stand-in with one fold's outputs (for which method gives raw values)."""
    import dataclasses

    return dataclasses.replace(ensemble, calibration=None, trees=[],
                               base_values=ensemble.base_values[:ensemble.fold_outputs],
                               output_names=ensemble.output_names[:ensemble.fold_outputs])


class SourceEvaluator(Evaluator):
    """The fitted source model itself (scikit-learn's own predict / decision_function /
    predict_proba) in the evaluator contract: what the verifier compares artefacts with."""

    transform_implementation = "scikit-learn (numpy.exp; scipy.special.expit for logistic)"
    block_rows = 8192  # scikit-learn's per-call cost (validation, threads) is high

    def __init__(self, model: Any, ensemble: Ensemble):
        self.source = SourceModel(model, ensemble)
        self.ensemble = ensemble
        self.name = ensemble.provenance.get("estimator") or type(model).__name__
        # Boosting adds base value, then trees in order, in float64 (scikit-learn's
        # predict_stages and HistGradientBoosting's _raw_predict). Forests add per-tree
        # predictions through joblib; with n_jobs None or 1 that runs the trees one after
        # the other in order (the conformance suite sees bit-identical means), with more
        # jobs the order depends on the threads (from sklearn.ensemble._forest, stated).
        if ensemble.calibration is not None:  # the first fold's classifier (all folds share its settings)
            model = model.steps[-1][1] if hasattr(model, "steps") else model
            model = model.calibrated_classifiers_[0].estimator
            model = getattr(model, "estimator", model) if type(model).__name__ == "FrozenEstimator" else model
        from .wrappers import tree_models  # the forests inside a pipeline or wrapper

        jobs = {getattr(final, "n_jobs", None) for final in tree_models(model)}
        self.summation_order = "tree" if ensemble.combine == "sum" or jobs <= {None, 1} else "any"

    def evaluate(self, rows: Sequence[Sequence[Any]]) -> Outputs:
        # scikit-learn's finiteness check sums the rows; extreme probes overflow that sum
        # (harmlessly: it then checks each value), which numpy would warn about.
        with np.errstate(over="ignore", invalid="ignore"):
            raw = self.source.raw(rows)
            transformed = self.source.transformed(rows)
            labels = None
            if self.ensemble.task != "regression":
                labels = [_plain(v) for v in self.source.predict(rows)]
        return Outputs(raw, transformed, labels)


def _plain(v: Any) -> Any:
    return v.item() if hasattr(v, "item") and not isinstance(v, (str, bytes)) else v
