"""One tree pair, node by node: the routing rules of both sides over the input domain
(:class:`Context`), the walk along the paths both trees share, and the joint walk that bounds
the leaf difference where routing differs (:func:`compare_pair`). Used by :mod:`.structure`."""
from __future__ import annotations

from dataclasses import dataclass
from fractions import Fraction
from typing import Any, Dict, List, Optional, Tuple

from .. import numerics
from ..ir import LEAF, Tree
from ..numerics import Domain, numeric_domain
from .findings import MISSING, UNSEEN, Finding, Proof, Side, fmt, identical_bits, leaf_values

# Steps of the joint walk of one tree pair before falling back to the widest leaf gap.
PAIR_BUDGET = 200_000

class Context:
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
            b = numerics.left_boundary(t, self.precision[side])
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


def compare_pair(ctx: Context, proof: Proof, output: int, si: int, ai: int, ts: Tree, ta: Tree) -> _PairResult:
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
            if not identical_bits(vs, va):
                values_equal = False
                d = abs(Fraction(vs) - Fraction(va))
                leaf_worst = max(leaf_worst, d)
                proof.add(Finding("leaf value", "value", "leaf value %s in the source, %s in the artefact "
                                  "(difference %.3g, %s)" % (fmt(vs), fmt(va), float(d), ulps_text(vs, va)), **where))
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
                           "(the first is %s)" % (left_text(t_s, ctx.precision["s"]), left_text(t_a, ctx.precision["a"]),
                                                  fmt(lo), fmt(hi),
                                                  "right in the source and left in the artefact" if bs < ba
                                                  else "left in the source and right in the artefact", fmt(first)))
                    if reach:
                        routing_differs = True
                        pending.append(Finding("threshold", "fail", msg, feature=names[f], **where))
                    else:
                        proof.add(Finding("threshold", "note", msg + "; no input reaching this node is affected",
                                          feature=names[f], **where))
                elif not identical_bits(t_s, t_a):
                    proof.add(Finding("threshold", "note", "threshold %s in the source, %s in the artefact, but no "
                                      "input of the domain (%s) lies between: the same inputs go left"
                                      % (fmt(t_s), fmt(t_a), d.describe()), feature=names[f], **where))
            elif not identical_bits(t_s, t_a):
                proof.add(Finding("threshold", "note", "threshold %s in the source, %s in the artefact: the same "
                                  "inputs go left" % (fmt(t_s), fmt(t_a)), feature=names[f], **where))
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


def _children(ctx: Context, ts: Tree, ns: int, ta: Tree, na: int, region: Dict[int, Any]):
    """Paired children (left with left, right with right) with the source-side region."""
    out = []
    for child, sub in ctx.split("s", ts, ns, region):
        other = ta.left[na] if child == ts.left[ns] else ta.right[na]
        out.append((child, other, sub))
    return out


def _joint_worst(ctx: Context, ts: Tree, ta: Tree) -> _PairResult:
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
            vs, va = leaf_values(ts), leaf_values(ta)
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
            if not identical_bits(vs, va):
                same = False
                gap = abs(Fraction(vs) - Fraction(va))
                worst = max(worst, gap)
                close = close and gap <= Fraction(1, 2 ** 24) * max(abs(Fraction(vs)), abs(Fraction(va)))
    return _PairResult(worst, same, 0, close=close and not same)


def left_text(t: float, precision: str) -> str:
    if precision == "float32":
        return "float32(x) <= %s (x <= %s)" % (fmt(t), fmt(numerics.float32_left_boundary(t)))
    return "x <= %s" % fmt(t)


def _token_text(ctx: Context, ts: Tree, ns: int, tok: Tuple[Any, ...]) -> str:
    s = "left" if ctx.goes_left("s", ts, ns, tok) else "right"
    a = "right" if s == "left" else "left"
    if tok is MISSING or tok is UNSEEN:
        what = "missing values go" if tok is MISSING else "unseen categories go"
    else:
        what = "category %r goes" % (tok[1],)
    return "%s %s in the source, %s in the artefact" % (what, s, a)


def ulps_text(a: float, b: float) -> str:
    n = int(numerics.ulp_distance([a], [b])[0])
    return "%d ulp%s" % (n, "" if n == 1 else "s")


