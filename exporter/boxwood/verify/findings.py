"""What the structural proof reports: findings with their location, the two sides compared,
the certified bound per output and the proof itself; and the exact bit-level helpers the
proof's modules share."""
from __future__ import annotations

import math
import struct
from dataclasses import dataclass, field
from typing import Any, Dict, List, Optional, Sequence, Tuple

from ..ir import LEAF, Ensemble, Tree

# Findings kept with full detail per kind (all are counted).
FINDINGS_PER_KIND = 25

MISSING = ("missing",)
UNSEEN = ("unseen",)

# Severity of a finding:
#   "fail"  - inputs the source accepts are treated differently (routing, metadata);
#   "value" - a leaf or base value differs: judged by the certified bound and tolerance;
#   "note"  - a difference without effect on any output, or information.
SEVERITIES = ("fail", "value", "note")


@dataclass
class Finding:
    kind: str
    severity: str
    message: str
    output: Optional[int] = None
    tree: Optional[int] = None
    artefact_tree: Optional[int] = None
    node: Optional[int] = None
    artefact_node: Optional[int] = None
    path: Optional[str] = None
    feature: Optional[str] = None

    def location(self) -> str:
        parts = []
        if self.tree is not None or self.artefact_tree is not None:
            if self.tree is not None and self.artefact_tree not in (None, self.tree):
                parts.append("tree %d (artefact tree %d)" % (self.tree, self.artefact_tree))
            elif self.tree is not None:
                parts.append("tree %d" % self.tree)
            else:
                parts.append("artefact tree %d" % self.artefact_tree)
        if self.node is not None or self.artefact_node is not None:
            if self.node is not None and self.artefact_node not in (None, self.node):
                parts.append("node %d (artefact node %d)" % (self.node, self.artefact_node))
            elif self.node is not None:
                parts.append("node %d" % self.node)
            else:
                parts.append("artefact node %d" % self.artefact_node)
        if self.path:
            parts.append("path %s" % self.path)
        if self.feature is not None:
            parts.append("feature %r" % self.feature)
        if self.output is not None and not parts:
            parts.append("output %d" % self.output)
        return ", ".join(parts) or "model"

    def to_dict(self) -> Dict[str, Any]:
        return {"kind": self.kind, "severity": self.severity, "location": self.location(),
                "message": self.message, "output": self.output, "tree": self.tree,
                "artefact_tree": self.artefact_tree, "node": self.node, "artefact_node": self.artefact_node,
                "path": self.path, "feature": self.feature}


@dataclass
class Side:
    """One side of the comparison: an ensemble and how it is evaluated."""

    ensemble: Ensemble
    compare_precision: str
    summation_order: str = "tree"
    summation_precision: str = "float64"


@dataclass
class OutputBound:
    """Certified bound for one output (all values are upper bounds, float64 rounded up)."""

    output: int
    name: str
    exact: bool  # raw scores proven bit-identical over all inputs
    raw_abs: float
    leaf_term: float
    base_term: float
    rounding_term: float
    contributions: List[Tuple[Optional[int], Optional[int], float]]  # (tree, artefact tree, bound), largest first
    source_range: Tuple[float, float]  # every raw score the source can compute lies in here
    artefact_range: Tuple[float, float]
    transformed_abs: float = math.inf
    transformed_rel: float = math.inf

    def to_dict(self) -> Dict[str, Any]:
        return {
            "output": self.output, "name": self.name, "exact": self.exact,
            "raw_abs": self.raw_abs, "leaf_term": self.leaf_term, "base_term": self.base_term,
            "rounding_term": self.rounding_term,
            "largest_contributions": [{"tree": s, "artefact_tree": a, "bound": b} for s, a, b in self.contributions],
            "source_range": list(self.source_range), "artefact_range": list(self.artefact_range),
        }


@dataclass
class Proof:
    findings: List[Finding] = field(default_factory=list)
    counts: Dict[str, int] = field(default_factory=dict)  # per "severity:kind"
    outputs: List[OutputBound] = field(default_factory=list)
    derivation: List[str] = field(default_factory=list)
    domain: List[str] = field(default_factory=list)  # per feature, what inputs were covered
    trees_compared: int = 0
    nodes_compared: int = 0
    coarse_pairs: int = 0
    decisions: str = ""
    comparable: bool = True  # False: features/outputs differ so much that no bound exists

    def add(self, f: Finding) -> None:
        key = "%s:%s" % (f.severity, f.kind)
        self.counts[key] = self.counts.get(key, 0) + 1
        if self.counts[key] <= FINDINGS_PER_KIND:
            self.findings.append(f)

    def count(self, severity: str) -> int:
        return sum(n for k, n in self.counts.items() if k.startswith(severity + ":"))


# ----------------------------------------------------------------------------- helpers
def bits(values: Sequence[float]) -> bytes:
    return struct.pack("<%dd" % len(values), *values)


def fingerprint(t: Tree) -> Tuple[Any, ...]:
    return (tuple(t.feature), bits(t.threshold), tuple(t.left), tuple(t.right), tuple(t.missing_left),
            bits(t.value), tuple(t.left_categories))


def identical_bits(a: float, b: float) -> bool:
    return struct.pack("<d", a) == struct.pack("<d", b)


def fmt(x: float) -> str:
    return repr(float(x))


def leaf_values(t: Tree) -> List[float]:
    return [t.value[i] for i in range(t.n_nodes) if t.feature[i] == LEAF]
