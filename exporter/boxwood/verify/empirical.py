"""Compare an evaluator's numbers with the source's, row by row: errors, ulps, flips."""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence

import numpy as np

from .. import numerics

EXAMPLES = 5  # rows listed per metric in reports


@dataclass
class Metrics:
    """Differences between an evaluator's values and the source's for one output."""

    rows: int
    max_abs: float
    max_rel: float
    max_ulp: int
    over: int  # rows with |a - s| > max(abs_tol, rel_tol |s|)
    worst_row: Optional[int]  # the row of the largest |a - s| (None when all equal)
    worst_source: Optional[float]
    worst_value: Optional[float]
    examples: List[int] = field(default_factory=list)  # first rows over the tolerance

    def to_dict(self, origins: Sequence[str]) -> Dict[str, Any]:
        return {
            "rows": self.rows, "max_abs_error": self.max_abs, "max_rel_error": self.max_rel,
            "max_ulp": self.max_ulp, "over_tolerance": self.over,
            "worst": None if self.worst_row is None else {
                "row": self.worst_row, "origin": origins[self.worst_row],
                "source": self.worst_source, "evaluator": self.worst_value},
            "examples": [{"row": r, "origin": origins[r]} for r in self.examples],
        }


def measure(source: np.ndarray, got: np.ndarray, abs_tol: float, rel_tol: float) -> Metrics:
    """Metrics for two float64 vectors of equal length (NaN equals NaN; inf equals inf)."""
    s = np.asarray(source, dtype=np.float64)
    a = np.asarray(got, dtype=np.float64)
    n = s.shape[0]
    if n == 0:
        return Metrics(0, 0.0, 0.0, 0, 0, None, None, None)
    equal = (s == a) | (np.isnan(s) & np.isnan(a))
    with np.errstate(invalid="ignore", over="ignore", divide="ignore"):
        diff = np.abs(a - s)
        diff = np.where(equal, 0.0, diff)
        diff = np.where(np.isnan(diff), np.inf, diff)
        rel = np.where(equal, 0.0, diff / np.abs(s))
        rel = np.where(np.isnan(rel), np.inf, rel)
        allowed = np.maximum(abs_tol, rel_tol * np.abs(s))
    over = ~equal & ~(diff <= allowed)
    ulps = numerics.ulp_distance(a, s)
    worst = int(np.argmax(diff)) if diff.max() > 0 else None
    return Metrics(
        rows=n, max_abs=float(diff.max()), max_rel=float(rel.max()), max_ulp=int(ulps.max()),
        over=int(over.sum()), worst_row=worst,
        worst_source=None if worst is None else float(s[worst]),
        worst_value=None if worst is None else float(a[worst]),
        examples=[int(i) for i in np.flatnonzero(over)[:EXAMPLES]],
    )


def decisions(source_labels: Sequence[Any], labels: Sequence[Any], source_raw: np.ndarray, raw: np.ndarray,
              binary_rule: Optional[str]) -> Dict[str, Any]:
    """Label flips, and for a binary model the raw-score crossings of the source's rule
    (the same rule applied to both raw scores: a crossing is a flip caused by the numbers,
    a flip without a crossing comes from the labels or the rule)."""
    flips = [i for i, (x, y) in enumerate(zip(source_labels, labels)) if x != y]
    out: Dict[str, Any] = {"flips": len(flips), "flip_rows": flips[:EXAMPLES]}
    if binary_rule is not None:
        s, a = source_raw[:, 0], raw[:, 0]
        if binary_rule == "raw_gt_0":
            ps, pa = s > 0.0, a > 0.0
        else:
            ps, pa = s >= 0.0, a >= 0.0
        cross = np.flatnonzero(ps != pa)
        out["crossings"] = int(cross.size)
        out["crossing_rows"] = [int(i) for i in cross[:EXAMPLES]]
    return out
