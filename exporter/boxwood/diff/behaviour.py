"""Behaviour: the rows both models score (the user's data and probes built from BOTH models'
splits), each model run through the device scorer, and what changes from OLD to NEW.

Rows come from the verifier's machinery, not a copy of it: ``verify.probes.read_data`` reads
a CSV or JSON Lines file as ``boxwood score`` reads it, and ``verify.probes.generate`` makes
the probes (specials per feature: missing where routed, every category, an unseen one,
extremes; for every split of either model a row that reaches the node with the threshold and
its neighbouring floats, and missing where routed; random rows). It is called twice, once
with each model as the "source" side, so that each model's own input domain is probed. A
model with preprocessing (a pipeline) is probed in its feature space and the rows mapped back
to raw fields (``verify.probes.to_field_rows``), as ``verify`` does.

Both models are scored by the device scorer (``formats.json.device``: the project's reference
evaluator) with unseen categories routed as missing; a row one model refuses (a missing value
it rejects, an infinity) is a difference when the other accepts it.
"""
from __future__ import annotations

import math
from typing import Any, Dict, List, Optional, Sequence, Tuple

import numpy as np

from ..formats.json.device import device_model
from ..formats.json.evaluators import DeviceEvaluator
from ..ir import Ensemble, split_counts
from ..verify import probes
from .structure import output_name

BLOCK_ROWS = 1024
MOST_CHANGED = 20
MAX_AUTO_PROBES = 200_000


def auto_budget(old: Ensemble, new: Ensemble) -> int:
    """Enough probe rows for every split of both models (up to 9 boundary values and a
    missing value each), the specials and a share of random rows."""
    splits = sum(split_counts(old)) + sum(split_counts(new))
    per = 10 if "float32" in (old.compare_precision, new.compare_precision) else 5
    return min(MAX_AUTO_PROBES, per * splits + 40 * max(len(old.features), len(new.features)) + 512)


def make_rows(old: Ensemble, new: Ensemble, data: Any, budget: Optional[int], seed: int) -> probes.Rows:
    """The user's rows (read for OLD, as ``boxwood score`` reads them) and the probes of both models."""
    rows = probes.read_data(data, old) if data is not None else probes.Rows()
    n_data = len(rows)
    budget = auto_budget(old, new) if budget is None else budget
    pipeline = old.fields is not None
    for label, first, other in (("OLD", old, new), ("NEW", new, old)):
        sides = [] if pipeline else [(other, other.compare_precision, "NEW" if label == "OLD" else "OLD")]
        if pipeline:
            made = probes.generate(first, sides, [], budget=budget, seed=seed)
            for r, kind, origin in zip(probes.to_field_rows(made.rows, first), made.kinds, made.origins):
                rows.add(r, kind, _origin(origin, label))
            continue
        start = len(rows)
        probes.generate(first, sides, rows.rows[:n_data], budget=budget, seed=seed, out=rows)
        for i in range(start, len(rows)):
            rows.origins[i] = _origin(rows.origins[i], label)
    return rows


def _origin(origin: str, label: str) -> str:
    """The probe generator names its first side "source": here that is OLD or NEW."""
    if origin.startswith("source "):
        return label + origin[len("source"):]
    if origin.startswith(("missing in", "category", "unseen", "extreme", "random")):
        return "%s (%s's domain)" % (origin, label)
    return origin


class Scored:
    """One model's outputs on the rows: exact values, transformed outputs, labels, refusals."""

    def __init__(self, raw: np.ndarray, transformed: np.ndarray, labels: Optional[List[Any]],
                 refused: Dict[int, str]):
        self.raw = raw
        self.transformed = transformed
        self.labels = labels
        self.refused = refused


def score(ensemble: Ensemble, rows: Sequence[Sequence[Any]]) -> Scored:
    """Run the device scorer on ``rows`` in blocks; a block that raises is redone row by row,
    and each row that still raises is kept as refused (its values NaN, its label None)."""
    ev = DeviceEvaluator(device_model(ensemble))
    raws, outs, labels = [], [], []
    refused: Dict[int, str] = {}
    widths: List[int] = []
    pending: List[Tuple[int, int]] = []  # refused rows whose widths are not known yet
    for start in range(0, len(rows), BLOCK_ROWS):
        block = rows[start:start + BLOCK_ROWS]
        try:
            parts = [(start, ev.evaluate(block))]
        except (ValueError, OverflowError, TypeError):
            parts = []
            for i, row in enumerate(block, start):
                try:
                    parts.append((i, ev.evaluate([row])))
                except (ValueError, OverflowError, TypeError) as exc:
                    refused[i] = "%s: %s" % (type(exc).__name__, exc)
                    parts.append((i, None))
        for i, out in parts:
            if out is None:
                pending.append((len(raws), i))
                raws.append(None)
                outs.append(None)
                labels.append(None)
                continue
            if not widths:
                widths = [out.raw.shape[1], out.transformed.shape[1]]
            raws.append(out.raw)
            outs.append(out.transformed)
            labels.extend(out.labels if out.labels is not None else [None] * len(out.raw))
    if not widths:  # every row refused: take the widths from a model's outputs on nothing
        widths = [len(ensemble.base_values), len(ensemble.base_values)]
    nan_raw, nan_out = np.full((1, widths[0]), np.nan), np.full((1, widths[1]), np.nan)
    for pos, _ in pending:
        raws[pos], outs[pos] = nan_raw, nan_out
    raw = np.concatenate(raws) if raws else np.empty((0, widths[0]))
    out = np.concatenate(outs) if outs else np.empty((0, widths[1]))
    decide = ensemble.task != "regression"
    return Scored(raw, out, labels if decide else None, refused)


def columns(e: Ensemble, width: int, kind: str) -> List[str]:
    """A name per value column, the same for both models when the values mean the same thing
    (per class, by the class label; else by output name or position)."""
    if e.task == "classification" and e.classes:
        if width == len(e.classes):
            return ["%s for class %r" % (kind, c) for c in e.classes]
        if width == 1:
            return ["%s (positive class %r)" % (kind, e.classes[-1])]
    if width == e.n_outputs:
        return ["%s %s" % (kind, output_name(e, k)) for k in range(width)]
    return ["%s %d" % (kind, k) for k in range(width)]


def _stats(delta: np.ndarray) -> Dict[str, Any]:
    if delta.size == 0:
        return {"min": None, "median": None, "p90": None, "p99": None, "max": None}
    q = np.quantile(delta, [0.5, 0.9, 0.99])
    return {"min": float(delta.min()), "median": float(q[0]), "p90": float(q[1]), "p99": float(q[2]),
            "max": float(delta.max())}


def _differs(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    """Element-wise: the values are not the same float64 bits (two NaNs count as the same)."""
    return (a.view(np.int64) != b.view(np.int64)) & ~(np.isnan(a) & np.isnan(b))


def compare(old: Ensemble, new: Ensemble, rows: probes.Rows, most: int = MOST_CHANGED
            ) -> Tuple[Dict[str, Any], Dict[str, np.ndarray]]:
    """(the behaviour part of the report, |delta| per compared column over the changed rows)."""
    so, sn = score(old, rows.rows), score(new, rows.rows)
    n = len(rows.rows)
    both = np.array([i not in so.refused and i not in sn.refused for i in range(n)], dtype=bool)
    refusal_changed = np.array([(i in so.refused) != (i in sn.refused) for i in range(n)], dtype=bool)
    outputs, deltas = [], {}
    changed_any = refusal_changed.copy()
    size = np.zeros(n)
    skipped: List[str] = []
    for kind, a, b in (("raw", so.raw, sn.raw), ("output", so.transformed, sn.transformed)):
        ca, cb = columns(old, a.shape[1], kind), columns(new, b.shape[1], kind)
        for j, name in enumerate(ca):
            if name not in cb:
                skipped.append(name)
                continue
            x, y = a[:, j], b[:, cb.index(name)]
            diff = _differs(x, y) & both
            changed_any |= diff
            d = np.abs(y - x)[diff]
            deltas[name] = d
            if kind == "output":
                size = np.maximum(size, np.where(diff, np.nan_to_num(np.abs(y - x), nan=np.inf), 0.0))
            outputs.append(dict({"name": name, "kind": "raw" if kind == "raw" else "transformed",
                                 "compared": int(both.sum()), "changed": int(diff.sum())}, **_stats(d)))
        skipped += [name for name in cb if name not in ca]
    labels_changed = None
    label_diff = np.zeros(n, dtype=bool)
    if so.labels is not None and sn.labels is not None:
        label_diff = np.array([both[i] and not _same_label(so.labels[i], sn.labels[i]) for i in range(n)],
                              dtype=bool)
        labels_changed = int(label_diff.sum())
        changed_any |= label_diff
    order = sorted(np.flatnonzero(changed_any).tolist(),
                   key=lambda i: (-int(refusal_changed[i]), -int(label_diff[i]), -size[i], i))
    top = []
    for i in order[:most]:
        entry = {"row": i, "kind": rows.kinds[i], "origin": rows.origins[i], "values": [_json(v) for v in rows.rows[i]],
                 "old_label": _json(so.labels[i]) if so.labels is not None else None,
                 "new_label": _json(sn.labels[i]) if sn.labels is not None else None,
                 "label_changed": bool(label_diff[i]),
                 "old_outputs": [_json(float(v)) for v in so.transformed[i]],
                 "new_outputs": [_json(float(v)) for v in sn.transformed[i]],
                 "max_abs_change": _json(float(size[i])),
                 "refused": (("OLD refuses: " + so.refused[i]) if i in so.refused else
                             ("NEW refuses: " + sn.refused[i]) if i in sn.refused else None)}
        top.append(entry)
    counts = rows.counts()
    part = {
        "rows": {"total": n, "data": counts["data"], "special": counts["special"], "split": counts["split"],
                 "random": counts["random"], "compared": int(both.sum()), "refused_old": len(so.refused),
                 "refused_new": len(sn.refused)},
        "rows_changed": int(changed_any.sum()),
        "labels_changed": labels_changed,
        "refusals_changed": int(refusal_changed.sum()),
        "outputs": outputs,
        "not_compared": skipped,
        "most_changed": top,
        "output_names_old": columns(old, so.transformed.shape[1], "output"),
        "output_names_new": columns(new, sn.transformed.shape[1], "output"),
    }
    return part, deltas


def _same_label(a: Any, b: Any) -> bool:
    if isinstance(a, float) and isinstance(b, float) and math.isnan(a) and math.isnan(b):
        return True
    return type(a) is type(b) and a == b or (isinstance(a, (int, float)) and isinstance(b, (int, float))
                                             and not isinstance(a, bool) and a == b)


def _json(v: Any) -> Any:
    """A JSON-friendly value: infinities as "inf"/"-inf", NaN as null, numpy scalars as Python's."""
    if isinstance(v, np.generic):
        v = v.item()
    if isinstance(v, float):
        if math.isnan(v):
            return None
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
    return v
