"""Reference rows: a few deterministic rows that exercise a model, chosen from the hub alone.

Export scores them with the source model and stores them in the artefact (its
self-check); a file read back without a source (an ONNX graph made elsewhere) is given
rows scored by the hub's own trees.
"""
from __future__ import annotations

import math
from typing import Any, List

import numpy as np

from .ir import Ensemble


def probe_rows(ensemble: Ensemble, n_rows: int = 6) -> List[List[Any]]:
    """A few deterministic rows that exercise the model: values exactly at split
    thresholds and one float step above them, each category in turn, and (where the
    model routes missing values) one row of all-missing values."""
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
