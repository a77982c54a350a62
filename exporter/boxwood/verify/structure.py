"""Structural proof: compare two ensembles tree by tree and node by node, exactly.

``prove(source, artefact, input_precision)`` pairs the source model's
:class:`~boxwood.ir.Ensemble` with the one read back from an artefact and returns a
:class:`Proof`: every difference found (with its location) and, per output, a certified
upper bound on ``|raw_artefact - raw_source|`` over ALL inputs of the domain, carried
through the post-transform (see :mod:`boxwood.verify.bounds`). Nothing is sampled.

How splits are compared. A numeric split sends left ``{x : round_p(x) <= t}``; over
float64 inputs that is the half-line ``x <= B`` with ``B = t`` for p = float64 and
``B = floats.float32_left_boundary(t)`` for p = float32. Two splits send the same inputs
left iff no input of the domain lies between their two ``B`` (``Domain.any_between``):
a threshold moved by one float64 step in a float32-compared model usually changes
nothing, and the proof says so. The domain is what both sides accept: float64 or
float32 values (the evaluator's input precision), finite or not, inside the float32
range where a side compares in float32, NaN where both route missing values. A
categorical split is compared value by value over the union of both sides' category
values plus "missing" and "unseen" (both follow the node's missing-value direction,
as in scikit-learn). A difference counts only where an input can reach it: the
region of inputs reaching each node is carried down from the root.

How the bound is formed (per output, exact rational arithmetic, rounded up once):

* a tree pair whose routing agrees everywhere contributes its largest leaf difference;
* a pair whose routing differs (or whose shapes differ) contributes the largest
  ``|leaf_source - leaf_artefact|`` over leaf pairs that one input can reach together,
  found by walking both trees at once with the region of inputs narrowed at each split
  (when the walk exceeds ``PAIR_BUDGET`` steps it falls back to the widest leaf gap);
* an unpaired tree (dropped or added) contributes its largest ``|leaf|``;
* plus ``|base_source - base_artefact|``;
* plus a rounding term when the two sums are not provably identical (see
  :func:`rounding_term`); it is zero when every term is bit-identical and both sides
  add in float64 in the same order, since IEEE 754 operations are correctly rounded
  (IEEE 754-2019 clause 4.3): the same operations on the same operands give the same bits.
"""
from __future__ import annotations

import difflib
import math
import struct
from dataclasses import dataclass, field
from fractions import Fraction
from typing import Any, Dict, List, Optional, Sequence, Tuple

from ..ir import LEAF, Ensemble, Tree
from . import floats
from .floats import Domain, numeric_domain

# Steps of the joint walk of one tree pair before falling back to the widest leaf gap.
PAIR_BUDGET = 200_000
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

    @property
    def routing_ok(self) -> bool:
        return self.count("fail") == 0


# ----------------------------------------------------------------------------- helpers
def _bits(values: Sequence[float]) -> bytes:
    return struct.pack("<%dd" % len(values), *values)


def _fingerprint(t: Tree) -> Tuple[Any, ...]:
    return (tuple(t.feature), _bits(t.threshold), tuple(t.left), tuple(t.right), tuple(t.missing_left),
            _bits(t.value), tuple(t.left_categories))


def _same_bits(a: float, b: float) -> bool:
    return struct.pack("<d", a) == struct.pack("<d", b)


def _fmt(x: float) -> str:
    return repr(float(x))


def _leaf_values(t: Tree) -> List[float]:
    return [t.value[i] for i in range(t.n_nodes) if t.feature[i] == LEAF]


class _Context:
    """Domains and routing rules shared by the walks over one pair of ensembles."""

    def __init__(self, src: Side, art: Side, input_precision: str):
        self.src, self.art = src, art
        es, ea = src.ensemble, art.ensemble
        self.missing = es.missing_values == "route" and ea.missing_values == "route"
        accepts_inf = es.accepts_infinity and ea.accepts_infinity
        precisions = {src.compare_precision, art.compare_precision}
        self.features = es.features
        self.domains: List[Optional[Domain]] = []
        self.tokens: List[Optional[frozenset]] = []
        self.codes: Dict[str, List[Optional[Dict[Any, int]]]] = {"s": [], "a": []}
        for j, f in enumerate(es.features):
            fa = ea.features[j]
            if not f.is_categorical:
                self.domains.append(numeric_domain(input_precision, precisions, accepts_inf, self.missing))
                self.tokens.append(None)
                self.codes["s"].append(None)
                self.codes["a"].append(None)
                continue
            self.domains.append(None)
            values = list(f.categories) + [c for c in fa.categories if c not in set(f.categories)]
            toks = {("v", v) for v in values}
            if self.missing:
                toks |= {MISSING, UNSEEN}
            self.tokens.append(frozenset(toks))
            self.codes["s"].append({v: i for i, v in enumerate(f.categories)})
            self.codes["a"].append({v: i for i, v in enumerate(fa.categories)})
        self.precision = {"s": src.compare_precision, "a": art.compare_precision}
        # Identical trees route identically only if codes mean the same category values.
        self.same_codes = all(list(f.categories) == list(fa.categories)
                              for f, fa in zip(es.features, ea.features) if f.is_categorical)
        self.boundary_cache: Dict[Tuple[str, float], float] = {}

    def boundary(self, side: str, t: float) -> float:
        key = (side, t)
        b = self.boundary_cache.get(key)
        if b is None:
            b = floats.left_boundary(t, self.precision[side])
            self.boundary_cache[key] = b
        return b

    def goes_left(self, side: str, tree: Tree, node: int, token: Tuple[Any, ...]) -> bool:
        """Route of a categorical token at a categorical split (missing/unseen/unknown
        values follow the missing-value direction, as in scikit-learn)."""
        if token is MISSING or token is UNSEEN or token[0] != "v":
            return tree.missing_left[node]
        code = self.codes[side][tree.feature[node]].get(token[1])
        if code is None:
            return tree.missing_left[node]
        return code in tree.left_categories[node]

    # -- regions: per feature, numeric (lo_excl, hi_incl, missing) or a set of tokens
    def initial(self, f: int) -> Any:
        d = self.domains[f]
        if d is not None:
            return (None, d.hi, d.missing)
        return self.tokens[f]

    def nonempty(self, f: int, state: Any) -> bool:
        d = self.domains[f]
        if d is not None:
            lo, hi, miss = state
            return miss or d.any_between(lo, hi)
        return bool(state)

    def split(self, side: str, tree: Tree, node: int, region: Dict[int, Any]):
        """The (child, region) pairs of a split that some input of ``region`` reaches."""
        f = tree.feature[node]
        state = region.get(f)
        if state is None:
            state = self.initial(f)
        if tree.left_categories[node] is None:
            b = self.boundary(side, tree.threshold[node])
            lo, hi, miss = state
            ml = tree.missing_left[node]
            left = (lo, min(hi, b), miss and ml)
            right = (b if lo is None else max(lo, b), hi, miss and not ml)
        else:
            left = frozenset(t for t in state if self.goes_left(side, tree, node, t))
            right = state - left
        out = []
        for child, st in ((tree.left[node], left), (tree.right[node], right)):
            if self.nonempty(f, st):
                sub = dict(region)
                sub[f] = st
                out.append((child, sub))
        return out


# ----------------------------------------------------------------------------- tree pairs
@dataclass
class _PairResult:
    worst: Fraction
    same_bits: bool  # every input gets bit-identical leaf values from both trees
    nodes: int
    coarse: bool = False
    # every input gets leaf values that agree within float32 rounding, |a - b| <= 2**-24 max(|a|, |b|)
    # (the unit roundoff of binary32, IEEE 754-2019 3.6): a tree rewritten with other nodes
    # (e.g. categorical sets as equality chains) whose leaves were rounded to float32
    close: bool = False


def _compare_pair(ctx: _Context, proof: Proof, output: int, si: int, ai: int, ts: Tree, ta: Tree) -> _PairResult:
    """Walk both trees node by node along the same paths; record findings; bound the pair."""
    names = [f.name for f in ctx.features]
    routing_differs = False
    leaf_worst = Fraction(0)
    values_equal = True
    nodes = 0
    pending: List[Finding] = []  # routing findings, demoted to notes if they have no effect
    stack: List[Tuple[int, int, str, Dict[int, Any]]] = [(0, 0, "", {})]
    while stack:
        ns, na, path, region = stack.pop()
        nodes += 1
        fs, fa = ts.feature[ns], ta.feature[na]
        where = dict(output=output, tree=si, artefact_tree=ai, node=ns, artefact_node=na, path=path or "root")
        if fs == LEAF and fa == LEAF:
            vs, va = ts.value[ns], ta.value[na]
            if not _same_bits(vs, va):
                values_equal = False
                d = abs(Fraction(vs) - Fraction(va))
                leaf_worst = max(leaf_worst, d)
                proof.add(Finding("leaf value", "value", "leaf value %s in the source, %s in the artefact "
                                  "(difference %.3g, %s)" % (_fmt(vs), _fmt(va), float(d), _ulps_text(vs, va)), **where))
            continue
        if (fs == LEAF) != (fa == LEAF):
            routing_differs = True
            pending.append(Finding("tree shape", "fail", "a %s in the source, a %s in the artefact"
                                   % ("leaf" if fs == LEAF else "split", "leaf" if fa == LEAF else "split"), **where))
            continue
        if fs != fa:
            routing_differs = True
            pending.append(Finding("split feature", "fail", "splits on %r in the source, on %r in the artefact"
                                   % (names[fs], names[fa]), feature=names[fs], **where))
            continue
        f = fs
        state = region.get(f, ctx.initial(f))
        d = ctx.domains[f]
        if d is not None:
            bs, ba = ctx.boundary("s", ts.threshold[ns]), ctx.boundary("a", ta.threshold[na])
            t_s, t_a = ts.threshold[ns], ta.threshold[na]
            if bs != ba:
                lo, hi = min(bs, ba), max(bs, ba)
                if d.any_between(lo, hi):
                    first = d.first_above(lo)
                    reach = d.any_between(lo if state[0] is None else max(state[0], lo), min(state[1], hi))
                    msg = ("sends %s left in the source, %s in the artefact: inputs in (%s, %s] go %s "
                           "(the first is %s)" % (_left_text(t_s, ctx.precision["s"]), _left_text(t_a, ctx.precision["a"]),
                                                  _fmt(lo), _fmt(hi),
                                                  "right in the source and left in the artefact" if bs < ba
                                                  else "left in the source and right in the artefact", _fmt(first)))
                    if reach:
                        routing_differs = True
                        pending.append(Finding("threshold", "fail", msg, feature=names[f], **where))
                    else:
                        proof.add(Finding("threshold", "note", msg + "; no input reaching this node is affected",
                                          feature=names[f], **where))
                elif not _same_bits(t_s, t_a):
                    proof.add(Finding("threshold", "note", "threshold %s in the source, %s in the artefact, but no "
                                      "input of the domain (%s) lies between: the same inputs go left"
                                      % (_fmt(t_s), _fmt(t_a), d.describe()), feature=names[f], **where))
            elif not _same_bits(t_s, t_a):
                proof.add(Finding("threshold", "note", "threshold %s in the source, %s in the artefact: the same "
                                  "inputs go left" % (_fmt(t_s), _fmt(t_a)), feature=names[f], **where))
            if d.missing and ts.missing_left[ns] != ta.missing_left[na]:
                msg = "missing values go %s in the source, %s in the artefact" % (
                    "left" if ts.missing_left[ns] else "right", "left" if ta.missing_left[na] else "right")
                if state[2]:
                    routing_differs = True
                    pending.append(Finding("missing direction", "fail", msg, feature=names[f], **where))
                else:
                    proof.add(Finding("missing direction", "note", msg + "; no missing value reaches this node",
                                      feature=names[f], **where))
        else:
            differ = [tok for tok in ctx.tokens[f]
                      if ctx.goes_left("s", ts, ns, tok) != ctx.goes_left("a", ta, na, tok)]
            if differ:
                reach = [tok for tok in differ if tok in state]
                kind = ("missing direction" if all(t is MISSING or t is UNSEEN for t in differ)
                        else "categories")
                msg = "; ".join(_token_text(ctx, ts, ns, tok) for tok in differ[:8])
                if len(differ) > 8:
                    msg += "; and %d more" % (len(differ) - 8)
                if reach:
                    routing_differs = True
                    pending.append(Finding(kind, "fail", msg, feature=names[f], **where))
                else:
                    proof.add(Finding(kind, "note", msg + "; no such input reaches this node", feature=names[f], **where))
        for child_s, child_a, sub in _children(ctx, ts, ns, ta, na, region):
            stack.append((child_s, child_a, path + ("L" if child_s == ts.left[ns] else "R"), sub))
    if not routing_differs:
        return _PairResult(leaf_worst, values_equal, nodes)
    result = _joint_worst(ctx, ts, ta)
    for f in pending:
        if result.same_bits:
            f.severity = "note"
            f.message += " (no effect: every input reaching here gets equal leaf values from both trees)"
        elif result.close:
            f.severity = "note"
            f.message += (" (the trees are shaped differently, but every input gets leaf values that agree "
                          "within float32 rounding; the value differences are bounded below)")
        proof.add(f)
    result.nodes = nodes
    return result


def _children(ctx: _Context, ts: Tree, ns: int, ta: Tree, na: int, region: Dict[int, Any]):
    """Paired children (left with left, right with right) with the source-side region."""
    out = []
    for child, sub in ctx.split("s", ts, ns, region):
        other = ta.left[na] if child == ts.left[ns] else ta.right[na]
        out.append((child, other, sub))
    return out


def _joint_worst(ctx: _Context, ts: Tree, ta: Tree) -> _PairResult:
    """Largest |leaf_s - leaf_a| over leaf pairs one input reaches together (exact)."""
    worst = Fraction(0)
    same = True
    close = True
    steps = 0
    stack: List[Tuple[int, int, Dict[int, Any]]] = [(0, 0, {})]
    seen_pairs = set()
    while stack:
        steps += 1
        if steps > PAIR_BUDGET:
            vs, va = _leaf_values(ts), _leaf_values(ta)
            gap = max(Fraction(max(vs)) - Fraction(min(va)), Fraction(max(va)) - Fraction(min(vs)))
            return _PairResult(abs(gap), False, 0, coarse=True)
        ns, na, region = stack.pop()
        if ts.feature[ns] != LEAF:
            for child, sub in ctx.split("s", ts, ns, region):
                stack.append((child, na, sub))
        elif ta.feature[na] != LEAF:
            for child, sub in ctx.split("a", ta, na, region):
                stack.append((ns, child, sub))
        elif (ns, na) not in seen_pairs:
            seen_pairs.add((ns, na))
            vs, va = ts.value[ns], ta.value[na]
            if not _same_bits(vs, va):
                same = False
                gap = abs(Fraction(vs) - Fraction(va))
                worst = max(worst, gap)
                close = close and gap <= Fraction(1, 2 ** 24) * max(abs(Fraction(vs)), abs(Fraction(va)))
    return _PairResult(worst, same, 0, close=close and not same)


def _left_text(t: float, precision: str) -> str:
    if precision == "float32":
        return "float32(x) <= %s (x <= %s)" % (_fmt(t), _fmt(floats.float32_left_boundary(t)))
    return "x <= %s" % _fmt(t)


def _token_text(ctx: _Context, ts: Tree, ns: int, tok: Tuple[Any, ...]) -> str:
    s = "left" if ctx.goes_left("s", ts, ns, tok) else "right"
    a = "right" if s == "left" else "left"
    if tok is MISSING or tok is UNSEEN:
        what = "missing values go" if tok is MISSING else "unseen categories go"
    else:
        what = "category %r goes" % (tok[1],)
    return "%s %s in the source, %s in the artefact" % (what, s, a)


def _ulps_text(a: float, b: float) -> str:
    n = int(floats.ulp_distance([a], [b])[0])
    return "%d ulp%s" % (n, "" if n == 1 else "s")


# ----------------------------------------------------------------------------- metadata
def _compare_metadata(proof: Proof, es: Ensemble, ea: Ensemble, src: Side, art: Side, input_precision: str) -> None:
    def fail(kind, msg):
        proof.add(Finding(kind, "fail", msg))

    def note(kind, msg):
        proof.add(Finding(kind, "note", msg))

    if es.task != ea.task:
        fail("task", "the source is a %s model, the artefact a %s model" % (es.task, ea.task))
    if len(es.features) != len(ea.features):
        fail("features", "the source takes %d features, the artefact %d" % (len(es.features), len(ea.features)))
        proof.comparable = False
    else:
        for j, (fs, fa) in enumerate(zip(es.features, ea.features)):
            if fs.name != fa.name:
                fail("features", "feature %d is %r in the source, %r in the artefact" % (j, fs.name, fa.name))
            if fs.kind != fa.kind:
                fail("features", "feature %r is %s in the source, %s in the artefact" % (fs.name, fs.kind, fa.kind))
                proof.comparable = False
            elif fs.is_categorical:
                only_s = [c for c in fs.categories if c not in set(fa.categories)]
                only_a = [c for c in fa.categories if c not in set(fs.categories)]
                if only_s or only_a:
                    note("categories", "feature %r: categories only the source knows: %r; only the artefact knows: "
                         "%r (they are routed as unseen on the other side; effect judged split by split)"
                         % (fs.name, only_s, only_a))
                elif list(fs.categories) != list(fa.categories):
                    note("categories", "feature %r lists the same categories in another order (codes differ; "
                         "splits are compared by category value)" % fs.name)
    if es.n_outputs != ea.n_outputs:
        fail("outputs", "the source has %d raw outputs, the artefact %d" % (es.n_outputs, ea.n_outputs))
        proof.comparable = False
    if es.classes != ea.classes:
        fail("classes", "class labels in output order: source %r, artefact %r" % (es.classes, ea.classes))
    if es.binary_rule != ea.binary_rule:
        fail("binary rule", "binary decision rule: source %s, artefact %s" % (es.binary_rule, ea.binary_rule))
    if es.post_transform != ea.post_transform:
        fail("post-transform", "post-transform: source %s, artefact %s" % (es.post_transform, ea.post_transform))
    if es.combine != ea.combine:
        fail("combine", "trees combined by %s in the source, by %s in the artefact" % (es.combine, ea.combine))
        proof.comparable = False
    ps = dict(getattr(es, "post_transform_params", {}) or {})
    pa = dict(getattr(ea, "post_transform_params", {}) or {})
    for key in sorted(set(ps) | set(pa)):
        a, b = ps.get(key), pa.get(key)
        if a is None or b is None or not _same_bits(a, b):
            # the offset moves the decision threshold itself; the others scale values (bounded)
            sev = "fail" if key == "offset" or a is None or b is None else "value"
            proof.add(Finding("post-transform parameter", sev, "%s: source %r, artefact %r" % (key, a, b)))
    fields_s, fields_a = getattr(es, "fields", None), getattr(ea, "fields", None)
    if fields_s is not None and fields_a is None and (ea.provenance or {}).get("preprocessing"):
        # a pipeline's tree part (boxwood's ONNX graphs): the proof covers the trees on the
        # preprocessed features; the preprocessing itself is outside the artefact
        note("preprocessing", "the artefact holds the tree part only (%s); the proof compares the trees on "
             "the preprocessed features, not the preprocessing" % ea.provenance["preprocessing"])
    elif fields_s != fields_a:
        fail("fields", "raw record fields: source %r, artefact %r" % (fields_s, fields_a))
    elif len(es.features) == len(ea.features):
        for fs, fa in zip(es.features, ea.features):
            if getattr(fs, "source", None) != getattr(fa, "source", None):
                fail("preprocessing", "feature %r is computed as %r in the source, %r in the artefact"
                     % (fs.name, getattr(fs, "source", None), getattr(fa, "source", None)))
    if es.missing_values == "route" and ea.missing_values != "route":
        fail("missing values", "the source routes missing values, the artefact refuses them")
    elif es.missing_values != ea.missing_values:
        note("missing values", "the artefact routes missing values, which the source refuses "
             "(equivalence is proven over the inputs the source accepts)")
    if es.accepts_infinity and not ea.accepts_infinity:
        fail("infinity", "the source accepts infinite inputs, the artefact refuses them")
    elif es.accepts_infinity != ea.accepts_infinity:
        note("infinity", "the artefact accepts infinite inputs, which the source refuses")
    if src.compare_precision != art.compare_precision:
        note("compare precision", "the source compares inputs as %s, the artefact's evaluator as %s; each split "
             "is judged exactly over the common input domain" % (src.compare_precision, art.compare_precision))
    if es.output_names and ea.output_names and list(es.output_names) != list(ea.output_names):
        note("output names", "output names: source %r, artefact %r" % (es.output_names, ea.output_names))
    if input_precision == "float32":
        note("input domain", "the evaluator takes float32 inputs: the proof covers float32-representable "
             "inputs only")


# ----------------------------------------------------------------------------- leaf patterns
def _leaf_pattern(proof: Proof, pairs: List[Tuple[float, float]]) -> None:
    """Name a pattern shared by every differing leaf: float32 rounding or one scale factor."""
    differing = [(s, a) for s, a in pairs if not _same_bits(s, a)]
    if not differing:
        return
    if all(floats.round32(s) == a for s, a in differing):
        proof.add(Finding("leaf values", "value", "%d of %d paired leaves differ, each equal to the source's value "
                          "rounded to float32: leaves were stored in float32" % (len(differing), len(pairs))))
        return
    nonzero = [(s, a) for s, a in pairs if s != 0]
    if nonzero and all(not _same_bits(s, a) for s, a in nonzero) and len(differing) == len(nonzero):
        ratios = [Fraction(a) / Fraction(s) for s, a in nonzero]
        lo, hi = min(ratios), max(ratios)
        if lo > 0 and (hi - lo) <= lo * Fraction(1, 2 ** 40):
            proof.add(Finding("leaf values", "value", "every non-zero leaf is scaled by %.9g relative to the source "
                              "(a changed learning rate?)" % float(lo)))


# ----------------------------------------------------------------------------- rounding
def rounding_term(side: Side, n_trees: int, leaf_abs: Fraction, base_abs: Fraction, combine: str) -> Fraction:
    """Bound on |computed raw - exact raw| for one side (Higham 2002, sections 3.1 and 4.2).

    ``leaf_abs`` is the sum over trees of the largest |leaf|, ``base_abs`` is |base|.
    combine "sum": a sum of n = T + 1 terms computed by n - 1 additions, in any order:
    each term passes through at most n - 1 roundings, so by Lemma 3.1 the error is at most
    gamma_{n-1} * sum |terms| (eq. 4.4 for recursive summation; the same argument covers
    any addition tree). A float32 accumulator first rounds each term to float32: one more
    rounding, gamma_n, with u = 2**-24.
    combine "mean": raw = base + (leaf_1 + ... + leaf_T) / T, with T - 1 additions, one
    division and one addition; with M = leaf_abs / T and g = gamma_{T-1}:
    |error| <= g M + u (1 + g) M + u (|base| + (1 + g)(1 + u) M).
    """
    u = floats.UNIT_ROUNDOFF[side.summation_precision]
    extra = 1 if side.summation_precision == "float32" else 0
    if combine == "sum":
        k = n_trees + extra
        return floats.gamma(k, u) * (base_abs + leaf_abs) if k else Fraction(0)
    if n_trees == 0:
        return Fraction(0)
    g = floats.gamma(n_trees - 1 + extra, u) if n_trees - 1 + extra else Fraction(0)
    uf = Fraction(u)
    m = leaf_abs / n_trees
    return g * m + uf * (1 + g) * m + uf * (base_abs + (1 + g) * (1 + uf) * m)


# ----------------------------------------------------------------------------- the proof
def prove(src: Side, art: Side, input_precision: str = "float64") -> Proof:
    """Compare ``src`` with ``art`` over the common input domain and bound the raw difference."""
    proof = Proof()
    es, ea = src.ensemble, art.ensemble
    _compare_metadata(proof, es, ea, src, art, input_precision)
    if not proof.comparable:
        proof.derivation.append("The ensembles take different inputs or give different outputs: no bound exists.")
        for k in range(es.n_outputs):
            proof.outputs.append(OutputBound(k, _out_name(es, k), False, math.inf, math.inf, math.inf, math.inf, [],
                                             (-math.inf, math.inf), (-math.inf, math.inf)))
        return proof
    ctx = _Context(src, art, input_precision)
    for j, f in enumerate(es.features):
        d = ctx.domains[j]
        if d is not None:
            proof.domain.append("%s: %s" % (f.name, d.describe()))
        else:
            proof.domain.append("%s: %d category values%s" % (f.name, len(ctx.tokens[j]) - (2 if ctx.missing else 0),
                                                               ", missing, unseen" if ctx.missing else ""))
    leaf_pairs: List[Tuple[float, float]] = []
    for k in range(es.n_outputs):
        proof.outputs.append(_prove_output(ctx, proof, k, leaf_pairs))
    _leaf_pattern(proof, leaf_pairs)
    _derivation(proof, src, art)
    _decisions(proof, es, ea)
    return proof


def _out_name(e: Ensemble, k: int) -> str:
    return str(e.output_names[k]) if e.output_names and k < len(e.output_names) else "output %d" % k


def _prove_output(ctx: _Context, proof: Proof, k: int, leaf_pairs: List[Tuple[float, float]]) -> OutputBound:
    src, art = ctx.src, ctx.art
    es, ea = src.ensemble, art.ensemble
    trees_s = [(i, t) for i, t in enumerate(es.trees) if t.output == k]
    trees_a = [(i, t) for i, t in enumerate(ea.trees) if t.output == k]
    if len(trees_s) != len(trees_a):
        proof.add(Finding("tree count", "fail", "output %d (%s) has %d trees in the source, %d in the artefact"
                          % (k, _out_name(es, k), len(trees_s), len(trees_a)), output=k))
    fp_s = [_fingerprint(t) for _, t in trees_s]
    fp_a = [_fingerprint(t) for _, t in trees_a]
    matcher = difflib.SequenceMatcher(None, fp_s, fp_a, autojunk=False)
    pairs: List[Tuple[Optional[int], Optional[int]]] = []
    for op, i1, i2, j1, j2 in matcher.get_opcodes():
        if op == "equal":
            pairs += [(i1 + d, j1 + d) for d in range(i2 - i1)]
        elif op == "replace":
            n = min(i2 - i1, j2 - j1)
            pairs += [(i1 + d, j1 + d) for d in range(n)]
            pairs += [(i, None) for i in range(i1 + n, i2)]
            pairs += [(None, j) for j in range(j1 + n, j2)]
        elif op == "delete":
            pairs += [(i, None) for i in range(i1, i2)]
        else:
            pairs += [(None, j) for j in range(j1, j2)]
    in_order = all(a is not None and s is not None and s == a for s, a in pairs)
    leaf_term = Fraction(0)
    same_bits = in_order
    contributions: List[Tuple[Optional[int], Optional[int], Fraction]] = []
    for s, a in pairs:
        if s is not None and a is not None:
            si, ts = trees_s[s]
            ai, ta = trees_a[a]
            proof.trees_compared += 1
            if fp_s[s] == fp_a[a] and src.compare_precision == art.compare_precision and ctx.same_codes:
                proof.nodes_compared += ts.n_nodes
                leaf_pairs += [(v, v) for v in _leaf_values(ts)]
                continue
            r = _compare_pair(ctx, proof, k, si, ai, ts, ta)
            proof.nodes_compared += r.nodes
            proof.coarse_pairs += int(r.coarse)
            if ts.n_nodes == ta.n_nodes and ts.feature == ta.feature:
                leaf_pairs += [(ts.value[i], ta.value[i]) for i in range(ts.n_nodes) if ts.feature[i] == LEAF]
            same_bits = same_bits and r.same_bits
            if r.worst:
                leaf_term += r.worst
                contributions.append((si, ai, r.worst))
            if r.coarse:
                proof.add(Finding("bound", "note", "the joint walk of this tree pair exceeded %d steps; its "
                                  "contribution is the widest leaf gap instead" % PAIR_BUDGET,
                                  output=k, tree=si, artefact_tree=ai))
        else:
            same_bits = False
            if s is not None:
                si, ts = trees_s[s]
                m = max(abs(Fraction(v)) for v in _leaf_values(ts))
                proof.add(Finding("tree missing", "fail", "tree %d (output %d, position %d) of the source has no "
                                  "counterpart in the artefact (largest |leaf| %.3g)" % (si, k, s, float(m)),
                                  output=k, tree=si))
                contributions.append((si, None, m))
            else:
                ai, ta = trees_a[a]
                m = max(abs(Fraction(v)) for v in _leaf_values(ta))
                proof.add(Finding("extra tree", "fail", "artefact tree %d (output %d, position %d) has no "
                                  "counterpart in the source (largest |leaf| %.3g)" % (ai, k, a, float(m)),
                                  output=k, artefact_tree=ai))
                contributions.append((None, ai, m))
            leaf_term += m
    bs, ba = es.base_values[k], ea.base_values[k]
    base_term = abs(Fraction(bs) - Fraction(ba))
    if not _same_bits(bs, ba):
        same_bits = False
        proof.add(Finding("base value", "value", "base value %s in the source, %s in the artefact (difference %.3g, %s)"
                          % (_fmt(bs), _fmt(ba), float(base_term), _ulps_text(bs, ba)), output=k))
    same_sum = all(side.summation_order == "tree" and side.summation_precision == "float64" for side in (src, art))
    exact = same_bits and same_sum
    combine = es.combine
    n_s, n_a = len(trees_s), len(trees_a)
    mag_s, rng_s = _magnitude(es.base_values[k], [t for _, t in trees_s], combine)
    mag_a, rng_a = _magnitude(ea.base_values[k], [t for _, t in trees_a], combine)
    r_s = rounding_term(src, n_s, mag_s, abs(Fraction(bs)), combine)
    r_a = rounding_term(art, n_a, mag_a, abs(Fraction(ba)), combine)
    rounding = Fraction(0) if exact else r_s + r_a
    if combine == "mean":
        if n_s == n_a and n_s > 0:
            leaf_term = leaf_term / n_s
        else:  # different tree counts: the widest gap between the two ranges of leaf means
            leaf_term = max(abs(rng_s[1] - es.base_values[k] - (rng_a[0] - ea.base_values[k])),
                            abs(rng_a[1] - ea.base_values[k] - (rng_s[0] - es.base_values[k])))
        contributions = [(s, a, c / max(n_s, 1)) for s, a, c in contributions]
    total = leaf_term + base_term + rounding
    contributions.sort(key=lambda c: -c[2])
    return OutputBound(
        output=k, name=_out_name(es, k), exact=exact,
        raw_abs=0.0 if exact else floats.round_up(total),
        leaf_term=floats.round_up(leaf_term), base_term=floats.round_up(base_term),
        rounding_term=floats.round_up(rounding),
        contributions=[(s, a, floats.round_up(c)) for s, a, c in contributions[:10]],
        source_range=(-floats.round_up(-(rng_s[0] - r_s)), floats.round_up(rng_s[1] + r_s)),
        artefact_range=(-floats.round_up(-(rng_a[0] - r_a)), floats.round_up(rng_a[1] + r_a)),
    )


def _magnitude(base: float, trees: List[Tree], combine: str) -> Tuple[Fraction, Tuple[Fraction, Fraction]]:
    """(sum over trees of the largest |leaf|, exact raw range [lo, hi] over all inputs)."""
    total_abs = Fraction(0)
    lo = hi = Fraction(0)
    for t in trees:
        vals = _leaf_values(t)
        total_abs += max(abs(Fraction(v)) for v in vals)
        lo += Fraction(min(vals))
        hi += Fraction(max(vals))
    b = Fraction(base)
    if combine == "mean" and trees:
        n = len(trees)
        return total_abs, (b + lo / n, b + hi / n)
    return total_abs, (b + lo, b + hi)


def _derivation(proof: Proof, src: Side, art: Side) -> None:
    d = proof.derivation
    d.append("Raw bound per output = sum over tree pairs of the largest leaf difference one input can reach "
             "(a pair whose splits all send the same inputs the same way: its largest paired-leaf difference) "
             "+ largest |leaf| of each unpaired tree + |base difference| + rounding term.")
    d.append("Split agreement is decided exactly: a split comparing round_p(x) <= t sends left {x : x <= B} "
             "(B = t for p = float64; for p = float32, B is the largest float64 whose float32 rounding "
             "(roundTiesToEven, IEEE 754-2019 clause 4.3.1) is <= t); two splits agree iff no input of the "
             "domain lies between their B.")
    d.append("Rounding term: 0 when every tree gives bit-identical leaf values for every input and both sides "
             "add base then trees in the same order in float64 (IEEE 754-2019 clause 4.3: each operation is "
             "correctly rounded, so identical operations give identical bits). Otherwise, per side, "
             "gamma_{n-1} * (|base| + sum of largest |leaf|), gamma_k = k u / (1 - k u), u = 2**-53 "
             "(float64) or 2**-24 (float32 accumulator, with gamma_n for the rounding of each term): "
             "Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. (2002), Lemma 3.1 and eq. (4.4), "
             "valid for any order of the additions.")
    d.append("Summation: source %s order, %s; artefact evaluator %s order, %s."
             % (src.summation_order, src.summation_precision, art.summation_order, art.summation_precision))


def _decisions(proof: Proof, es: Ensemble, ea: Ensemble) -> None:
    if es.task != "classification":
        proof.decisions = ""
        return
    same_meta = es.classes == ea.classes and es.binary_rule == ea.binary_rule
    if not same_meta:
        proof.decisions = "class labels or the decision rule differ: labels are not proven"
    elif all(o.exact for o in proof.outputs):
        proof.decisions = "labels proven identical for every input (raw scores bit-identical)"
    elif es.n_outputs == 1:
        proof.decisions = ("labels can differ only where |raw score| <= %.3g (the raw bound)"
                           % proof.outputs[0].raw_abs)
    else:
        worst = max(o.raw_abs for o in proof.outputs)
        proof.decisions = ("labels can differ only where the two largest raw scores are within %.3g "
                           "(twice the largest raw bound)" % floats.up(2 * worst))
