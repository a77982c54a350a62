"""Ask the source (scikit-learn) model for its own numbers on rows given in feature order.

Used to embed self-check rows in an artefact, by the demo, and by the tests: it is
the reference every evaluator is compared with.
"""
from __future__ import annotations

from typing import Any, List, Sequence

import numpy as np

from .ir import Ensemble


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
        m = self.model
        if self.ensemble.task == "outlier_detection":
            from .readers.sklearn_forests import isolation_path_sums

            out = isolation_path_sums(m, X)
        elif self.ensemble.task == "classification" and self.ensemble.post_transform == "identity":
            out = m.predict_proba(X)
        elif self.ensemble.task == "classification":
            out = m.decision_function(X)
        elif self.ensemble.post_transform != "identity":
            out = m._raw_predict(X)  # regressors with a log link predict exp(raw)
        else:
            out = m.predict(X)
        return np.asarray(out, dtype=np.float64).reshape(len(rows), -1)

    def transformed(self, rows: Sequence[Sequence[Any]]) -> np.ndarray:
        """Post-transformed outputs, shape (n_rows, n_outputs): the prediction, the class
        probabilities (for a binary classifier with one raw output, the positive class
        only), or an isolation forest's ``score_samples``."""
        X = self.matrix(rows)
        if self.ensemble.task == "outlier_detection":
            return np.asarray(self.model.score_samples(X), dtype=np.float64).reshape(len(rows), -1)
        if self.ensemble.task == "classification":
            p = np.asarray(self.model.predict_proba(X), dtype=np.float64)
            return p[:, 1:] if self.ensemble.n_outputs == 1 else p
        return np.asarray(self.model.predict(X), dtype=np.float64).reshape(len(rows), -1)

    def predict(self, rows: Sequence[Sequence[Any]]) -> List[Any]:
        return list(self.model.predict(self.matrix(rows)))


def probe_rows(ensemble: Ensemble, n_rows: int = 6) -> List[List[Any]]:
    """A few deterministic rows that exercise the model: values exactly at split
    thresholds and one float step above them, each category in turn, and (where the
    model routes missing values) one row of all-missing values."""
    import math

    thresholds = [sorted({t.threshold[i] for t in ensemble.trees for i in range(t.n_nodes)
                          if t.feature[i] == j and t.left_categories[i] is None
                          and math.isfinite(t.threshold[i])})
                  for j in range(len(ensemble.features))]
    if ensemble.fields is not None:
        return _raw_field_rows(ensemble, thresholds, n_rows)
    rows = []
    for r in range(n_rows):
        row: List[Any] = []
        for j, f in enumerate(ensemble.features):
            if f.is_categorical:
                row.append(f.categories[r % len(f.categories)])
                continue
            ts = thresholds[j]
            if not ts:
                row.append(0.0)
                continue
            v = ts[(r * len(ts)) // n_rows]
            if ensemble.compare_precision == "float32":
                v = float(np.float32(v))
            row.append(float(np.nextafter(v, np.inf)) if r % 2 else v)
        rows.append(row)
    if ensemble.missing_values == "route":
        rows.append([None] * len(ensemble.features))
    return rows


def _raw_field_rows(ensemble: Ensemble, thresholds: List[List[float]], n_rows: int) -> List[List[Any]]:
    """Reference rows for an ensemble with preprocessing: raw field values. A field that
    is encoded cycles through its categories; a numeric field takes the thresholds of the
    feature it feeds. One more row has every field missing."""
    import math

    per_field: List[List[Any]] = [[] for _ in ensemble.fields]
    for j, f in enumerate(ensemble.features):
        fi = ensemble.fields.index(f.source["field"])
        encodes = [st for st in f.source["steps"] if st["op"] == "encode"]
        if encodes:
            per_field[fi] = list(encodes[0]["categories"])
        elif not per_field[fi]:
            per_field[fi] = [float(np.float32(t)) if ensemble.compare_precision == "float32" else t
                             for t in thresholds[j] if math.isfinite(t)] or [0.0]
    rows = []
    for r in range(n_rows):
        rows.append([vals[(r * len(vals)) // n_rows] if vals else 0.0 for vals in per_field])
    rows.append([None] * len(ensemble.fields))
    return rows
