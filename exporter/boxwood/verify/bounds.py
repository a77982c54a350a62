"""Carry a certified raw-score bound through the post-transform, and the default tolerances.

Notation: for one output, ``r_s``/``r_a`` are the raw scores the source and the artefact's
evaluator compute for the same input, ``|r_a - r_s| <= D`` (the raw bound); ``[lo, hi]``
contains every raw score either side can compute (from the trees: base value plus the
smallest / largest leaf of each tree, widened by the rounding term). ``u = 2**-53``.

Assumption (stated in every report, checked on every run): each ``exp`` call (math.exp,
numpy.exp, scipy's expit) returns ``e**z (1 + d)`` with ``|d| <= eps = ASSUMED_EXP_ULPS *
2**-52`` for normal results. exp is not correctly rounded on every platform, so no IEEE 754
argument gives this; it is the accuracy documented for common libms (from memory: glibc
lists exp among its functions with at most 1 ulp of error). The verifier compares every
observed difference with the certified bound and fails the run ("bound holds") if one is
ever larger, so a platform where the assumption is false is caught, not trusted.

What is used, with proofs (every transform is evaluated with IEEE 754 float64 +, -, /,
each correctly rounded: ``fl(a op b) = (a op b)(1 + d)``, ``|d| <= u``):

* identity: the raw bound itself; relatively, ``D / min |r_s|`` when 0 is outside [lo, hi].
* exp: ``e**r_a / e**r_s = e**(r_a - r_s)`` lies in ``[e**-D, e**D]``; with each side's
  exp error: relative bound ``e**D (1 + eps) / (1 - eps) - 1``; absolute
  ``|e**r_a - e**r_s| <= e**hi * D`` (mean value theorem) plus ``2 eps e**hi``.
* logistic ``p = 1 / (1 + e**-cr)`` (c = 1; c = 2 for logistic_double, where 2r is exact):
  computed ``(1 + E(1 + d1))(1 + d2)`` with ``1 + E(1 + d1) = (1 + E)(1 + a)``,
  ``|a| = |d1| E/(1 + E) <= eps``; so ``p_hat / p`` lies within ``(1 + u)/((1 - eps)(1 - u))``
  of 1 either way (eta). log p is 1-Lipschitz (d/dx log sigma(x) = 1 - sigma(x) in (0, 1)),
  so ``p(r_a)/p(r_s)`` lies in ``[e**-cD, e**cD]``: relative bound
  ``e**cD (1 + eta)/(1 - eta) - 1``. sigma is 1/4-Lipschitz (sigma' = sigma(1 - sigma) <= 1/4):
  absolute bound ``c D / 4 + 2 eta``.
* softmax over K outputs, computed as ``z = r - max(r)``, ``e_j = exp(z_j)``, a sum of the
  K terms in any order (error gamma_{K-1}, Higham 2002 eq. 4.4), a division:
  - when every raw score is proven bit-identical, both sides compute the same z, so
    ``p_hat_k = p~_k (1 + d_k)(1 + d) Z / Z_hat`` with ``p~`` the exact softmax of that z
    and ``Z_hat / Z`` within ``[(1 - eps)(1 - g), (1 + eps)(1 + g)]``: each side is within
    ``eta = (1 + eps)(1 + u) / ((1 - eps)(1 - g)) - 1`` of ``p~`` relatively;
  - otherwise, each z_j is also off by at most ``u W`` (W = hi_max - lo_min, the spread of
    raw scores), which scales numerator and sum by at most ``e**(u W)``: eta gains a
    factor ``e**(2 u W)``; and the exact softmax moves by
    ``|d log p_k| <= D_k + max_j D_j`` (d log p_k / d r_j = [j = k] - p_j, and sum_j p_j = 1)
    and ``|d p_k| <= max_j D_j / 2`` (sum_j |d p_k / d r_j| = 2 p_k (1 - p_k) <= 1/2, mean
    value theorem).
  Relative bound ``e**(D_k + max D)(1 + eta)/(1 - eta) - 1``, absolute
  ``min(rel (1 + eta), max D / 2 + 2 eta)``.

Relative bounds need normal results: where an output may underflow (exp or logistic of a
raw score below -700, a softmax spread above 700) only the absolute bound is given.
All arithmetic on bounds rounds upwards (``numerics.up`` after each operation).
"""
from __future__ import annotations

import math
from dataclasses import dataclass
from fractions import Fraction
from typing import Any, Dict, List, Optional, Tuple

from .. import numerics
from ..numerics import INF, exp_up, round_up, up
from .structure import OutputBound

ASSUMED_EXP_ULPS = 1
EPS = ASSUMED_EXP_ULPS * numerics.ULP_RELATIVE
U = numerics.UNIT_ROUNDOFF["float64"]
_EPS = Fraction(EPS)
_U = Fraction(U)
LN2_UP = numerics.next_up(math.log(2.0))  # an upper bound of ln 2 (math.log is within 1 ulp)
# Outputs below e**-700 may be subnormal: relative error bounds do not hold there.
UNDERFLOW_RAW = 700.0
# Slack added to absolute bounds of outputs that may be subnormal (a few subnormal steps).
SUBNORMAL_SLACK = 2.0 ** -1000
# Default tolerance floor for probabilities and exp outputs, in units of 2**-52 relative:
# the device scorer's own self-check tolerance (boxwood_runtime.scorer.SELF_CHECK_ULPS).
TRANSFORMED_FLOOR_ULPS = 8


def expm1_up(x: float) -> Fraction:
    """An upper bound of e**x - 1 for x >= 0, as a Fraction (math.expm1 enlarged by 2**-49
    relative plus one step: covers its error under the exp accuracy assumption)."""
    if x <= 0:
        return Fraction(0)
    try:
        v = math.expm1(x)
    except OverflowError:
        return Fraction(numerics.F64_MAX) * 2
    if v == INF:
        return Fraction(numerics.F64_MAX) * 2
    return Fraction(up(up(v * (1.0 + 2.0 ** -49))))


def _relative(grow: Fraction, eta_a: Fraction, eta_s: Fraction) -> Fraction:
    """Upper bound of |q (1 + d_a)/(1 + d_s) - 1| for q in [1/(1+grow), 1+grow], |d_a| <= eta_a,
    |d_s| <= eta_s (the upper deviation dominates: x - 1 >= 1 - 1/x for x >= 1)."""
    if eta_s >= 1:
        return Fraction(numerics.F64_MAX) * 2
    return (1 + grow) * (1 + eta_a) / (1 - eta_s) - 1


def _logistic_eta() -> Fraction:
    high = (1 + _U) / ((1 - _EPS) * (1 - _U)) - 1
    low = 1 - (1 - _U) / ((1 + _EPS) * (1 + _U))
    return max(high, low)


def _softmax_eta(k: int, spread: float) -> Fraction:
    g = numerics.gamma(max(k - 1, 1), U)
    num = (1 + _EPS) * (1 + _U) * (1 + expm1_up(up(2 * U * spread)))
    return num / ((1 - _EPS) * (1 - g)) - 1  # the lower deviation 1 - 1/(1 + this) is smaller


def identity_rel(bound: float, rng: Tuple[float, float]) -> float:
    """Relative bound |r_a - r_s| / |r_s| from an absolute one and the source range."""
    if bound == 0:
        return 0.0
    lo, hi = rng
    m = lo if lo > 0 else (-hi if hi < 0 else 0.0)
    return INF if m <= 0 else round_up(Fraction(bound) / Fraction(m))


def _fin(x: float) -> Fraction:
    return Fraction(x) if math.isfinite(x) else Fraction(numerics.F64_MAX) * 2


@dataclass
class ValueBound:
    """Certified bounds for one compared value (an exact value or a transformed output)."""

    name: str
    abs: float
    rel: float
    exact: bool = False

    def to_dict(self) -> Dict[str, Any]:
        return {"name": self.name, "abs": self.abs, "rel": self.rel, "exact": self.exact}


def _mag(rng: Tuple[float, float]) -> Fraction:
    return max(_fin(abs(rng[0])), _fin(abs(rng[1])))


def _softmax(ds: List[float], his: List[float], los: List[float], exact: bool) -> Tuple[List[Tuple[float, float]], str]:
    k = len(ds)
    max_d = max(ds)
    spread = up(max(his) - min(los)) if ds else 0.0
    eta = _softmax_eta(k, 0.0 if exact else spread)
    out = []
    for d in ds:
        rel = _relative(expm1_up(up(d + max_d)), eta, eta)
        lip = _fin(max_d) / 2 + 2 * eta
        out.append((round_up(min(rel * (1 + eta), lip)) + SUBNORMAL_SLACK,
                    INF if spread > UNDERFLOW_RAW else round_up(rel)))
    if exact:
        line = ("softmax, inputs proven bit-identical: both sides exponentiate the same z = r - max(r); each is "
                "within eta = %.3g of the exact softmax of z (exp error, a %d-term sum with gamma_%d, one "
                "division); relative bound (1 + eta)/(1 - eta) - 1." % (float(eta), k, max(k - 1, 1)))
    else:
        line = ("softmax: each side within eta = %.3g of the exact value (includes e**(2uW), W = %.3g the "
                "spread of its inputs); |d log p_k| <= D_k + max D; |d p_k| <= max D / 2 (gradient 1-norm "
                "2 p_k (1 - p_k) <= 1/2)." % (float(eta), spread))
    return out, line


def value_bounds(ensemble: Any, outputs: List[OutputBound], artefact_params: Optional[Dict[str, float]] = None
                 ) -> Tuple[List[ValueBound], List[ValueBound], List[str]]:
    """Bounds for the values the verifier compares, from the raw bounds ``outputs``.

    Returns (exact values, transformed outputs, derivation lines). The exact values are
    what a device must reproduce bit for bit (``boxwood.sources.model.SourceModel.raw``): the
    raw scores, except AdaBoost's decision values (``raw / weight_total``, for two
    classes ``-d0 + d1``). The transformed outputs are ``SourceModel.transformed``: the
    prediction, the class probabilities (the positive class only for a binary model with
    one raw output), or an isolation forest's ``score_samples``.
    """
    if getattr(ensemble, "calibration", None) is not None:  # CalibratedClassifierCV (verify/calibration.py)
        return calibrated_bounds(ensemble, outputs, _logistic_eta())
    post = ensemble.post_transform
    params = dict(getattr(ensemble, "post_transform_params", {}) or {})
    aparams = dict(artefact_params if artefact_params is not None else params)
    lines: List[str] = []
    exact_all = all(o.exact for o in outputs)
    names = [o.name for o in outputs]
    if post == "samme":
        w_s, w_a = _fin(params["weight_total"]), _fin(aparams.get("weight_total", params["weight_total"]))
        same_w = w_s == w_a
        ex = exact_all and same_w
        dd, d_his = [], []
        for o in outputs:
            m = max(_mag(o.source_range), _mag(o.artefact_range))
            if ex:
                dd.append(Fraction(0))
            else:
                dd.append(_fin(o.raw_abs) / w_s + m * abs(1 / w_a - 1 / w_s) + 2 * _U * m / min(w_s, w_a))
            d_his.append(m / min(w_s, w_a))
        lines.append("samme: decision d_j = v_j / weight_total (one correctly rounded division per side: "
                     "|d_a - d_s| <= D_j / W + |v| |1/W_a - 1/W_s| + 2u |v| / W)%s."
                     % ("; raw scores and W bit-identical, so the decisions are too" if ex else ""))
        if len(outputs) == 2:
            m_d = d_his[0] + d_his[1]
            de = Fraction(0) if ex else dd[0] + dd[1] + 2 * _U * m_d
            exact_vals = [ValueBound("decision", round_up(de), INF if de else 0.0, ex)]
            z_d = [de / 2, de / 2]
            z_m = [m_d / 2, m_d / 2]
            lines.append("two classes: decision -d0 + d1 (one addition per side: 2u |d| more); probabilities "
                         "softmax([-d/2, d/2]) (halving is exact).")
        else:
            exact_vals = [ValueBound(n, round_up(d), INF if d else 0.0, ex) for n, d in zip(names, dd)]
            kk = len(outputs) - 1
            z_d = [Fraction(0) if ex else d / kk + 2 * _U * m / kk for d, m in zip(dd, d_his)]
            z_m = [m / kk for m in d_his]
            lines.append("probabilities: softmax of d_j / (K - 1) (one division per side: 2u |d|/(K-1) more).")
        sm, line = _softmax([round_up(z) for z in z_d], [round_up(m) for m in z_m],
                            [-round_up(m) for m in z_m], ex)
        lines.append("exp accuracy assumed: relative error at most %d ulp (eps = %.3g) per call; checked against "
                     "every observed difference (check 'bound holds')." % (ASSUMED_EXP_ULPS, EPS))
        lines.append(line)
        cls = [str(c) for c in (ensemble.classes or names)]
        return exact_vals, [ValueBound(c, a, r) for c, (a, r) in zip(cls, sm)], lines
    exact_vals = [ValueBound(o.name, o.raw_abs, identity_rel(o.raw_abs, o.source_range), o.exact) for o in outputs]
    if post == "isolation":
        o = outputs[0]
        den_s = _fin(params["denominator"])
        den_a = _fin(aparams.get("denominator", params["denominator"]))
        m = max(_mag(o.source_range), _mag(o.artefact_range))
        ex = o.exact and den_s == den_a
        dq = Fraction(0) if ex else (_fin(o.raw_abs) / min(den_s, den_a) + m * abs(1 / den_a - 1 / den_s)
                                     + 2 * _U * m / min(den_s, den_a))
        lo = min(o.source_range[0], o.artefact_range[0])
        grow = expm1_up(round_up(dq * Fraction(LN2_UP)))
        rel = _relative(grow, _EPS, _EPS)
        top = Fraction(1) if lo >= 0 else _fin(exp_up(-lo * LN2_UP / float(min(den_s, den_a))))
        ab = round_up(top * (Fraction(LN2_UP) * dq + 2 * _EPS))
        lines.append("isolation: score = -(2 ** -(raw / denominator)); pow accuracy assumed like exp (%d ulp). "
                     "q = raw / denominator moves by at most Dq = %.3g; 2**-q changes by a factor within "
                     "2**(+-Dq); |d 2**-q / dq| = ln 2 * 2**-q <= ln 2 for q >= 0." % (ASSUMED_EXP_ULPS, float(dq)))
        return exact_vals, [ValueBound("score", ab, INF if lo < 0 else round_up(rel), ex)], lines
    lines += carry(post, outputs)
    transformed = [ValueBound(o.name, o.transformed_abs, o.transformed_rel) for o in outputs]
    if ensemble.task == "classification" and len(outputs) == 1 and ensemble.classes:
        transformed[0].name = str(ensemble.classes[1])
    lines += carry_target_steps(list(getattr(ensemble, "target_steps", None) or []), post, outputs, transformed)
    return exact_vals, transformed, lines


def carry_target_steps(steps: List[Dict[str, Any]], post: str, outputs: List[OutputBound],
                       transformed: List[ValueBound]) -> List[str]:
    """Carry each transformed output's bound through a regressor's target steps (ir.TARGET_OPS),
    updating ``transformed`` in place; return the derivation lines. Per output: A (absolute)
    and R (relative) bounds and a range [lo, hi] holding both sides' values.

    * both sides bit-identical before a *, +, - or / step (same operands, one correctly
      rounded IEEE operation): still identical, A = R = 0;
    * otherwise ``c*v`` / ``v/c``: A |c| + 2u |c| M (A / |c| + 2u M / |c|), R (1+u)/(1-u) more;
      ``v+c`` / ``v-c``: A + 2u (M + |c|), R from A and the range (0 may be inside it);
    * exp: e**a / e**s lies in [e**-A, e**A], so R = e**A (1+eps)/(1-eps) - 1 and
      A = e**hi A + 2 eps e**hi; expm1 (assumed within eps like exp): |d expm1| <= e**hi, so
      A = e**hi A + 2 eps max|expm1|, and |s| e**s / |expm1(s)| <= 1 + max(s, 0) gives
      R' = (1 + max(hi, 0)) e**(M R) R, then (1+eps)/(1-eps) as for exp. M is the largest
      |value| in the range."""
    if not steps:
        return []
    lines = []
    for j, (o, vb) in enumerate(zip(outputs, transformed)):
        lo = min(o.source_range[0], o.artefact_range[0])
        hi = max(o.source_range[1], o.artefact_range[1])
        if post == "exp":
            lo, hi = 0.0, exp_up(hi)
        same = bool(o.exact and post == "identity" and vb.abs == 0)
        a, r = _fin(vb.abs), (Fraction(0) if same else _fin(vb.rel))
        for step in steps:
            op = step["op"]
            m = max(_fin(abs(lo)), _fin(abs(hi)))
            if op in ("mul", "div", "add", "sub"):
                c = Fraction(step["values"][j]) if j < len(step.get("values", [])) else Fraction(0)
                if op == "mul":
                    vals = sorted((float(Fraction(lo) * c) if math.isfinite(lo) else lo * float(c),
                                   float(Fraction(hi) * c) if math.isfinite(hi) else hi * float(c)))
                    a_new = abs(c) * a + 2 * _U * abs(c) * m
                    r_new = _relative(r, _U, _U)
                elif op == "div":
                    vals = sorted((lo / float(c), hi / float(c)))
                    a_new = a / abs(c) + 2 * _U * m / abs(c)
                    r_new = _relative(r, _U, _U)
                else:
                    sign = 1 if op == "add" else -1
                    vals = [lo + sign * float(c), hi + sign * float(c)]
                    a_new = a + 2 * _U * (m + abs(c))
                    r_new = None
                lo, hi = numerics.next_down(vals[0]), up(vals[1])
                if same:
                    a, r = Fraction(0), Fraction(0)
                else:
                    a = a_new
                    r = r_new if r_new is not None else _fin(identity_rel(round_up(a), (lo, hi)))
                continue
            e_hi = _fin(exp_up(hi))
            if op == "exp":
                r = _relative(expm1_up(round_up(a)), _EPS, _EPS)
                a = e_hi * a + 2 * _EPS * e_hi
                lo, hi = 0.0, exp_up(hi)
            else:  # expm1
                big = max(_fin(abs(math.expm1(lo)) if lo < 700 else INF), _fin(exp_up(hi)))
                # relative: |expm1(a) - expm1(s)| <= e**xi |a - s|, xi <= s + |s| R, and
                # |s| e**s / |expm1(s)| <= 1 + max(s, 0); so R grows by (1 + max(hi, 0)) e**(M R)
                grow = r * (1 + _fin(max(hi, 0.0))) * _fin(exp_up(round_up(m * r))) if r < 1 else _fin(INF)
                r = _relative(grow, _EPS, _EPS)
                a = e_hi * a + 2 * _EPS * big
                lo, hi = max(-1.0, -up(-math.expm1(lo))) if lo < 700 else 0.0, exp_up(hi)
                if r >= 1:
                    r = _fin(identity_rel(round_up(a), (lo, hi)))
            same = False
        vb.abs = 0.0 if same else round_up(a) + SUBNORMAL_SLACK
        vb.rel = 0.0 if same else min(round_up(r), identity_rel(vb.abs, (lo, hi)))
        vb.exact = same
    lines.append("target steps %s after the post-transform, carried per output: *, /, +, - by a constant keep "
                 "bit-identical inputs bit-identical (one correctly rounded operation each), else add 2u |value| "
                 "(and scale); exp and expm1 (assumed within %d ulp like exp) grow the absolute bound by e**hi and "
                 "the relative one as for the exp post-transform."
                 % ([st["op"] for st in steps], ASSUMED_EXP_ULPS))
    return lines


def carry(post: str, outputs: List[OutputBound]) -> List[str]:
    """Fill ``transformed_abs``/``transformed_rel`` of each output; return the derivation lines."""
    lines: List[str] = []
    k = len(outputs)
    if post == "identity":
        for o in outputs:
            o.transformed_abs = o.raw_abs
            o.transformed_rel = identity_rel(o.raw_abs, o.source_range)
        lines.append("identity post-transform: the output is the raw score, so its bound is the raw bound "
                     "(relative: divided by the smallest |raw score| the source can give, when 0 is outside "
                     "its range).")
        return lines
    lines.append("exp accuracy assumed: relative error at most %d ulp (eps = %.3g) per call; checked against "
                 "every observed difference (check 'bound holds')." % (ASSUMED_EXP_ULPS, EPS))
    if post == "exp":
        for o in outputs:
            d = o.raw_abs
            hi = max(o.source_range[1], o.artefact_range[1])
            lo = min(o.source_range[0], o.artefact_range[0])
            e_hi = _fin(exp_up(hi))
            o.transformed_abs = round_up(e_hi * _fin(d) + 2 * _EPS * e_hi) + SUBNORMAL_SLACK
            rel = _relative(expm1_up(d), _EPS, _EPS)
            o.transformed_rel = INF if lo < -UNDERFLOW_RAW else round_up(rel)
        lines.append("exp: relative bound e**D (1 + eps)/(1 - eps) - 1 (e**(r_a - r_s) lies in [e**-D, e**D]); "
                     "absolute e**hi * D + 2 eps e**hi, hi the largest reachable raw score.")
        return lines
    if post in ("logistic", "logistic_double"):
        c = 2 if post == "logistic_double" else 1
        eta = _logistic_eta()
        for o in outputs:
            d = o.raw_abs
            lo = min(o.source_range[0], o.artefact_range[0])
            rel = _relative(expm1_up(up(c * d)), eta, eta)
            lip = _fin(d) * c / 4 + 2 * eta
            o.transformed_abs = round_up(min(rel * (1 + eta), lip)) + SUBNORMAL_SLACK
            o.transformed_rel = INF if c * lo < -UNDERFLOW_RAW else round_up(rel)
        lines.append("%s: each side within eta = %.3g of the exact value (relative); log sigma is 1-Lipschitz, "
                     "so the relative bound is e**(%dD) (1 + eta)/(1 - eta) - 1; sigma is 1/4-Lipschitz, so the "
                     "absolute bound is %dD/4 + 2 eta." % (post, float(eta), c, c))
        return lines
    if post == "softmax":
        exact = all(o.exact for o in outputs)
        max_d = max(o.raw_abs for o in outputs)
        his = [max(o.source_range[1], o.artefact_range[1]) for o in outputs]
        los = [min(o.source_range[0], o.artefact_range[0]) for o in outputs]
        spread = up(max(his) - min(los)) if outputs else 0.0
        eta = _softmax_eta(k, 0.0 if exact else spread)
        for o in outputs:
            rel = _relative(expm1_up(up(o.raw_abs + max_d)), eta, eta)
            lip = _fin(max_d) / 2 + 2 * eta
            o.transformed_abs = round_up(min(rel * (1 + eta), lip)) + SUBNORMAL_SLACK
            o.transformed_rel = INF if spread > UNDERFLOW_RAW else round_up(rel)
        if exact:
            lines.append("softmax, raw scores proven bit-identical: both sides exponentiate the same z = r - max(r); "
                         "each is within eta = %.3g of the exact softmax of z (exp error, a %d-term sum with "
                         "gamma_%d, one division); relative bound (1 + eta)/(1 - eta) - 1."
                         % (float(eta), k, max(k - 1, 1)))
        else:
            lines.append("softmax: each side within eta = %.3g of the exact value (includes e**(2uW), W = %.3g the "
                         "raw spread); |d log p_k| <= D_k + max D; |d p_k| <= max D / 2 (gradient 1-norm "
                         "2 p_k (1 - p_k) <= 1/2)." % (float(eta), spread))
        return lines
    for o in outputs:
        o.transformed_abs = INF
        o.transformed_rel = INF
    lines.append("post-transform %r: no bound known" % post)
    return lines


def implementation_allowance(post: str, n_outputs: int) -> float:
    """Relative difference two correct implementations of ``post`` can show on bit-identical
    raw scores (the bound above with D = 0): 0 for identity."""
    if post == "identity":
        return 0.0
    if post == "exp":
        return round_up(_relative(Fraction(0), _EPS, _EPS))
    if post in ("logistic", "logistic_double"):
        eta = _logistic_eta()
        return round_up(_relative(Fraction(0), eta, eta))
    if post in ("softmax", "samme"):
        eta = _softmax_eta(max(n_outputs, 2), 0.0)
        return round_up(_relative(Fraction(0), eta, eta))
    if post == "isolation":
        return round_up(_relative(Fraction(0), _EPS, _EPS))
    return INF


def default_tolerances(post: str, n_outputs: int, ensemble: Any = None):
    """{kind: (abs_tol, rel_tol, why)} for "raw" and "transformed" outputs (``ensemble``: the
    source, needed for a calibrated one and for target steps: a regressor's ir.TARGET_OPS, where
    an exp or expm1 allows as an exp post-transform)."""
    raw_why = ("raw scores: bit-identical expected (the same float64 comparisons and additions in the "
               "same order as the source)")
    tol = {"raw": (0.0, 0.0, raw_why)}
    if getattr(ensemble, "calibration", None) is not None:
        ab, rel = calibrated_tolerance(ensemble, _logistic_eta())
        floor = TRANSFORMED_FLOOR_ULPS * numerics.ULP_RELATIVE
        tol["transformed"] = (ab, max(rel, floor), "calibrated probabilities: abs %.3g, relative %.3g = max(%d "
                              "ulps, what two correct implementations can show on identical raw scores: "
                              "verify/calibration.py)" % (ab, max(rel, floor), TRANSFORMED_FLOOR_ULPS))
        return tol
    target_steps = getattr(ensemble, "target_steps", None) or ()
    if post == "identity" and any(st["op"] in ("exp", "expm1") for st in target_steps):
        post = "exp"  # the same allowance: one exp-like call per value
    if post == "identity":
        tol["transformed"] = (0.0, 0.0, "identity post-transform: the output is the raw score, bit-identical "
                                        "expected")
    else:
        floor = TRANSFORMED_FLOOR_ULPS * numerics.ULP_RELATIVE
        allow = implementation_allowance(post, n_outputs)
        rel = max(floor, allow)
        why = ("%s outputs: relative %.3g = max(%d ulps as the device self-check allows "
               "(boxwood_runtime.scorer.SELF_CHECK_ULPS), the largest difference two correct "
               "implementations of %s can show on identical raw scores: %.3g)"
               % (post, rel, TRANSFORMED_FLOOR_ULPS, post, allow))
        tol["transformed"] = (0.0, rel, why)
    return tol


def within(bound_abs: float, bound_rel: float, abs_tol: float, rel_tol: float) -> bool:
    """A certified bound meets a tolerance |a - s| <= max(abs_tol, rel_tol |s|) for every input
    when the absolute bound is <= abs_tol or the relative bound is <= rel_tol."""
    return bound_abs <= abs_tol or bound_rel <= rel_tol


# ----------------------------------------------------------------------------- calibration
def calibrated_bounds(ensemble: Any, outputs: List[Any], eta: Fraction) -> Tuple[List[Any], List[Any], List[str]]:
    """(exact values, calibrated probabilities, derivation lines) for a calibrated source
    (derivation: verify/calibration.py's docstring); ``eta`` is the logistic's relative error per side."""
    cal = ensemble.calibration
    folds = cal["folds"]
    m = ensemble.fold_outputs
    exact_all = all(o.exact for o in outputs)
    exact_vals = []
    for f in range(len(folds)):
        part = outputs[f * m:(f + 1) * m]
        if ensemble.post_transform == "samme":
            ok = all(o.exact for o in part)
            n = 1 if m == 2 else m
            exact_vals += [ValueBound("fold%d:decision %d" % (f, j), 0.0 if ok else INF, 0.0 if ok else INF, ok)
                           for j in range(n)]
        else:
            exact_vals += [ValueBound(o.name, o.raw_abs, identity_rel(o.raw_abs, o.source_range), o.exact)
                           for o in part]
    classes = [str(c) for c in ensemble.classes]
    k, n_f = len(classes), len(folds)
    sigmoid = any(c["method"] == "sigmoid" for fold in folds for c in fold["calibrators"])
    lines = ["calibration (%d folds, %s response, %s): exact values are every fold's own raw scores"
             % (n_f, cal["response"], cal["normalisation"])]
    if not exact_all:
        lines.append("raw scores may differ: no bound is carried through the calibrators")
        return exact_vals, [ValueBound(c, INF, INF) for c in classes], lines
    if not sigmoid:
        lines.append("raw scores bit-identical and isotonic calibrators only: the same correctly rounded "
                     "operations in the same order, so the probabilities are bit-identical")
        return exact_vals, [ValueBound(c, 0.0, 0.0, True) for c in classes], lines
    if k == 2:
        ab = round_up(2 * (eta + 4 * _U))
        rel1 = round_up(2 * (eta + (n_f + 2) * _U))
        lines.append("sigmoid, two classes: |d p1| <= eta + (F + 2) u relatively; p0 = 1 - p1 within "
                     "eta + 4u absolutely (doubled as slack)")
        return exact_vals, [ValueBound(classes[0], ab, INF), ValueBound(classes[1], ab, rel1)], lines
    rel = round_up(2 * (2 * eta + (k + n_f + 3) * _U))
    lines.append("sigmoid, %d classes: positive terms, relative 2 eta + (K + F + 3) u (doubled as slack)" % k)
    return exact_vals, [ValueBound(c, min(rel, 1.0), rel) for c in classes], lines


def calibrated_tolerance(ensemble: Any, eta: Fraction) -> Tuple[float, float]:
    """(abs, rel) the calibrated probabilities are compared with by default: what two correct
    implementations can show on identical raw scores (0 without a sigmoid)."""
    cal = ensemble.calibration
    if not any(c["method"] == "sigmoid" for fold in cal["folds"] for c in fold["calibrators"]):
        return 0.0, 0.0
    k, n_f = len(ensemble.classes), len(cal["folds"])
    if k == 2:
        return round_up(2 * (eta + 4 * _U)), round_up(2 * (eta + (n_f + 2) * _U))
    return 0.0, round_up(2 * (2 * eta + (k + n_f + 3) * _U))
