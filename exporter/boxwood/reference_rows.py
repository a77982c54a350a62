"""Reference rows: a few deterministic rows that exercise a model, chosen from the hub alone.

Export scores them with the source model and stores them in the artefact (its
self-check); a file read back without a source (an ONNX graph made elsewhere) is given
rows scored by the hub's own trees.
"""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Sequence

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
    feature it feeds (a scaled one, the raw values either side of them). One more row has
    every field missing (except fields whose encoder refuses a missing value)."""
    per_field: List[List[Any]] = [[] for _ in ensemble.fields]
    for j, f in enumerate(ensemble.features):
        fi = ensemble.fields.index(f.source["field"])
        encodes = [st for st in f.source["steps"] if st["op"] in ("encode", "lookup")]
        if encodes:
            per_field[fi] = list(encodes[0]["categories"])
        elif not per_field[fi]:
            ts = [float(np.float32(t)) if ensemble.compare_precision == "float32" else t
                  for t in thresholds[j] if math.isfinite(t)]
            seq = arithmetic_of(f.source["steps"])
            if seq is not None:  # a scaled column: the raw values just either side of each threshold
                ts = [x for t in ts for x in raw_around(seq, t)]
            per_field[fi] = ts or [0.0]
    rows = []
    for r in range(n_rows):
        rows.append([vals[(r * len(vals)) // n_rows] if vals else 0.0 for vals in per_field])
    missing: List[Any] = [None] * len(ensemble.fields)
    for f in ensemble.features:
        steps = f.source["steps"]
        if steps and steps[0]["op"] in ("encode", "lookup") and steps[0]["unknown"] == "error" \
                and "missing" not in steps[0]:
            # an encoder that refuses a missing value (not seen in fitting): keep a category
            missing[ensemble.fields.index(f.source["field"])] = steps[0]["categories"][0]
    rows.append(missing)
    return rows


def arithmetic_of(steps: Sequence[Dict[str, Any]]) -> Optional[List[List[Any]]]:
    """The operations of a feature's "arithmetic" steps, in order, when the feature is a
    scaled number column (arithmetic steps, and imputers, which leave a present number
    as it is); else None."""
    if not any(st["op"] == "arithmetic" for st in steps) or any(
            st["op"] not in ("arithmetic", "impute") for st in steps):
        return None
    return [list(op) for st in steps if st["op"] == "arithmetic" for op in st["sequence"]]


def forward(seq: Sequence[Sequence[Any]], x: float) -> float:
    """An arithmetic sequence on ``x`` in float64, op by op (as the device scorer does)."""
    for op in seq:
        name = op[0]
        if name == "sub":
            x = x - op[1]
        elif name == "div":
            x = x / op[1]
        elif name == "mul":
            x = x * op[1]
        elif name == "add":
            x = x + op[1]
        elif x < op[1]:
            x = op[1]
        elif x > op[2]:
            x = op[2]
    return x


def raw_around(seq: Sequence[Sequence[Any]], t: float, steps: int = 200) -> List[float]:
    """Raw values ``a < b`` next to each other (float64 neighbours) whose transformed
    values bracket ``t``: ``forward(a) <= t < forward(b)`` (for a decreasing transform the
    other way round). Found by undoing the operations, then moving one float64 step at a
    time until the forward transform brackets ``t``; [] when no raw value reaches t (a
    clipped range) or the search does not settle."""
    x = t
    for op in reversed(seq):
        name = op[0]
        if name == "sub":
            x = x + op[1]
        elif name == "div":
            x = x * op[1]
        elif name == "mul":
            x = x / op[1] if op[1] != 0.0 else x
        elif name == "add":
            x = x - op[1]
    if not math.isfinite(x):
        return []
    up = forward(seq, math.nextafter(x, math.inf)) >= forward(seq, x)
    left = (lambda v: forward(seq, v) <= t) if up else (lambda v: forward(seq, v) > t)
    for _ in range(steps):
        if not left(x):
            x = math.nextafter(x, -math.inf)
        elif left(math.nextafter(x, math.inf)):
            x = math.nextafter(x, math.inf)
        else:
            return [x, math.nextafter(x, math.inf)]
        if not math.isfinite(x):
            break
    return []
