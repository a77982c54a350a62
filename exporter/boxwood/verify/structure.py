"""Structural proof: compare two ensembles tree by tree and node by node, exactly.

``prove(source, artefact, input_precision)`` pairs the source model's
:class:`~boxwood.ir.Ensemble` with the one read back from an artefact and returns a
:class:`Proof`: every difference found (with its location) and, per output, a certified
upper bound on ``|raw_artefact - raw_source|`` over ALL inputs of the domain, carried
through the post-transform (see :mod:`boxwood.verify.bounds`). Nothing is sampled.

How splits are compared. A numeric split sends left ``{x : round_p(x) <= t}``; over
float64 inputs that is the half-line ``x <= B`` with ``B = t`` for p = float64 and
``B = numerics.float32_left_boundary(t)`` for p = float32. Two splits send the same inputs
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
from fractions import Fraction
from typing import List, Optional, Tuple

from .. import numerics
from ..ir import LEAF, Ensemble, Tree
from . import calibration
from .findings import Finding, OutputBound, Proof, Side, fingerprint, fmt, identical_bits, leaf_values
from .pairs import PAIR_BUDGET, Context, compare_pair, ulps_text

__all__ = ["prove", "rounding_term", "Finding", "OutputBound", "Proof", "Side"]


# ----------------------------------------------------------------------------- metadata
def _compare_target_steps(proof: Proof, es: Ensemble, ea: Ensemble) -> None:
    """Target steps (a regressor's inverse target transform, ir.TARGET_OPS) must be the same
    operations with bit-identical constants: they act after the post-transform, on every
    output, so any difference changes predictions and fails."""
    ss, sa = list(getattr(es, "target_steps", None) or []), list(getattr(ea, "target_steps", None) or [])
    ops_s, ops_a = [s["op"] for s in ss], [s["op"] for s in sa]
    if ops_s != ops_a:
        proof.add(Finding("target steps", "fail", "target steps: source %s, artefact %s"
                          % (ops_s or "none", ops_a or "none")))
        return
    for i, (a, b) in enumerate(zip(ss, sa)):
        va, vb = list(a.get("values") or []), list(b.get("values") or [])
        if len(va) != len(vb) or not all(identical_bits(x, y) for x, y in zip(va, vb)):
            proof.add(Finding("target steps", "fail", "target step %d (%s): constants %r in the source, %r in the "
                              "artefact" % (i, a["op"], va, vb)))


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
    _compare_target_steps(proof, es, ea)
    if es.combine != ea.combine:
        fail("combine", "trees combined by %s in the source, by %s in the artefact" % (es.combine, ea.combine))
        proof.comparable = False
    ps = dict(getattr(es, "post_transform_params", {}) or {})
    pa = dict(getattr(ea, "post_transform_params", {}) or {})
    for key in sorted(set(ps) | set(pa)):
        a, b = ps.get(key), pa.get(key)
        if a is None or b is None or not identical_bits(a, b):
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
    differing = [(s, a) for s, a in pairs if not identical_bits(s, a)]
    if not differing:
        return
    if all(numerics.round32(s) == a for s, a in differing):
        proof.add(Finding("leaf values", "value", "%d of %d paired leaves differ, each equal to the source's value "
                          "rounded to float32: leaves were stored in float32" % (len(differing), len(pairs))))
        return
    nonzero = [(s, a) for s, a in pairs if s != 0]
    if nonzero and all(not identical_bits(s, a) for s, a in nonzero) and len(differing) == len(nonzero):
        ratios = [Fraction(a) / Fraction(s) for s, a in nonzero]
        lo, hi = min(ratios), max(ratios)
        if lo > 0 and (hi - lo) <= lo * Fraction(1, 2 ** 40):
            proof.add(Finding("leaf values", "value", "every non-zero leaf is scaled by %.9g relative to the source "
                              "(a changed learning rate?)" % float(lo)))


# ----------------------------------------------------------------------------- rounding
def _in_float32(base: float, trees: List[Tuple[int, Tree]]) -> bool:
    """Whether the base value and every leaf are float32 values (rounding them to float32 is exact)."""
    return numerics.round32(base) == base and all(numerics.round32(v) == v for _, t in trees for v in leaf_values(t))


def rounding_term(side: Side, n_trees: int, leaf_abs: Fraction, base_abs: Fraction, combine: str,
                  terms_in_float32: bool = False) -> Fraction:
    """Bound on |computed raw - exact raw| for one side (Higham 2002, sections 3.1 and 4.2).

    ``leaf_abs`` is the sum over trees of the largest |leaf|, ``base_abs`` is |base|.
    combine "sum": a sum of n = T + 1 terms computed by n - 1 additions, in any order:
    each term passes through at most n - 1 roundings, so by Lemma 3.1 the error is at most
    gamma_{n-1} * sum |terms| (eq. 4.4 for recursive summation; the same argument covers
    any addition tree). A float32 accumulator first rounds each term to float32: one more
    rounding, gamma_n, with u = 2**-24 - unless every term already is a float32 value
    (``terms_in_float32``: a float32 graph's leaves and base values), when that rounding is exact.
    combine "mean": raw = base + (leaf_1 + ... + leaf_T) / T, with T - 1 additions, one
    division and one addition; with M = leaf_abs / T and g = gamma_{T-1}:
    |error| <= g M + u (1 + g) M + u (|base| + (1 + g)(1 + u) M).
    """
    u = numerics.UNIT_ROUNDOFF[side.summation_precision]
    extra = 1 if side.summation_precision == "float32" and not terms_in_float32 else 0
    if combine == "sum":
        k = n_trees + extra
        return numerics.gamma(k, u) * (base_abs + leaf_abs) if k else Fraction(0)
    if n_trees == 0:
        return Fraction(0)
    g = numerics.gamma(n_trees - 1 + extra, u) if n_trees - 1 + extra else Fraction(0)
    uf = Fraction(u)
    m = leaf_abs / n_trees
    return g * m + uf * (1 + g) * m + uf * (base_abs + (1 + g) * (1 + uf) * m)


# ----------------------------------------------------------------------------- the proof
def prove(src: Side, art: Side, input_precision: str = "float64") -> Proof:
    """Compare ``src`` with ``art`` over the common input domain and bound the raw difference."""
    proof = Proof()
    es, ea = src.ensemble, art.ensemble
    _compare_metadata(proof, es, ea, src, art, input_precision)
    calibration.compare(proof, es, ea)  # CalibratedClassifierCV's calibrators, bit for bit
    if not proof.comparable:
        proof.derivation.append("The ensembles take different inputs or give different outputs: no bound exists.")
        for k in range(es.n_outputs):
            proof.outputs.append(OutputBound(k, _out_name(es, k), False, math.inf, math.inf, math.inf, math.inf, [],
                                             (-math.inf, math.inf), (-math.inf, math.inf)))
        return proof
    ctx = Context(src, art, input_precision)
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


def _prove_output(ctx: Context, proof: Proof, k: int, leaf_pairs: List[Tuple[float, float]]) -> OutputBound:
    src, art = ctx.src, ctx.art
    es, ea = src.ensemble, art.ensemble
    trees_s = [(i, t) for i, t in enumerate(es.trees) if t.output == k]
    trees_a = [(i, t) for i, t in enumerate(ea.trees) if t.output == k]
    if len(trees_s) != len(trees_a):
        proof.add(Finding("tree count", "fail", "output %d (%s) has %d trees in the source, %d in the artefact"
                          % (k, _out_name(es, k), len(trees_s), len(trees_a)), output=k))
    fp_s = [fingerprint(t) for _, t in trees_s]
    fp_a = [fingerprint(t) for _, t in trees_a]
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
                leaf_pairs += [(v, v) for v in leaf_values(ts)]
                continue
            r = compare_pair(ctx, proof, k, si, ai, ts, ta)
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
                m = max(abs(Fraction(v)) for v in leaf_values(ts))
                proof.add(Finding("tree missing", "fail", "tree %d (output %d, position %d) of the source has no "
                                  "counterpart in the artefact (largest |leaf| %.3g)" % (si, k, s, float(m)),
                                  output=k, tree=si))
                contributions.append((si, None, m))
            else:
                ai, ta = trees_a[a]
                m = max(abs(Fraction(v)) for v in leaf_values(ta))
                proof.add(Finding("extra tree", "fail", "artefact tree %d (output %d, position %d) has no "
                                  "counterpart in the source (largest |leaf| %.3g)" % (ai, k, a, float(m)),
                                  output=k, artefact_tree=ai))
                contributions.append((None, ai, m))
            leaf_term += m
    bs, ba = es.base_values[k], ea.base_values[k]
    base_term = abs(Fraction(bs) - Fraction(ba))
    if not identical_bits(bs, ba):
        same_bits = False
        proof.add(Finding("base value", "value", "base value %s in the source, %s in the artefact (difference %.3g, %s)"
                          % (fmt(bs), fmt(ba), float(base_term), ulps_text(bs, ba)), output=k))
    same_sum = all(side.summation_order == "tree" and side.summation_precision == "float64" for side in (src, art))
    exact = same_bits and same_sum
    combine = es.combine
    n_s, n_a = len(trees_s), len(trees_a)
    mag_s, rng_s = _magnitude(es.base_values[k], [t for _, t in trees_s], combine)
    mag_a, rng_a = _magnitude(ea.base_values[k], [t for _, t in trees_a], combine)
    r_s = rounding_term(src, n_s, mag_s, abs(Fraction(bs)), combine, _in_float32(bs, trees_s))
    r_a = rounding_term(art, n_a, mag_a, abs(Fraction(ba)), combine, _in_float32(ba, trees_a))
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
        raw_abs=0.0 if exact else numerics.round_up(total),
        leaf_term=numerics.round_up(leaf_term), base_term=numerics.round_up(base_term),
        rounding_term=numerics.round_up(rounding),
        contributions=[(s, a, numerics.round_up(c)) for s, a, c in contributions[:10]],
        source_range=(-numerics.round_up(-(rng_s[0] - r_s)), numerics.round_up(rng_s[1] + r_s)),
        artefact_range=(-numerics.round_up(-(rng_a[0] - r_a)), numerics.round_up(rng_a[1] + r_a)),
    )


def _magnitude(base: float, trees: List[Tree], combine: str) -> Tuple[Fraction, Tuple[Fraction, Fraction]]:
    """(sum over trees of the largest |leaf|, exact raw range [lo, hi] over all inputs)."""
    total_abs = Fraction(0)
    lo = hi = Fraction(0)
    for t in trees:
        vals = leaf_values(t)
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
                           "(twice the largest raw bound)" % numerics.up(2 * worst))
