"""The floating-point facts the verifier's proofs rest on (boxwood.numerics, boxwood.verify.bounds).

Outside references:
- numpy's float64 -> float32 cast and ``numpy.nextafter``: IEEE 754-2019 conversion with
  roundTiesToEven (clause 4.3.1) and overflow to infinity (clause 7.4);
- CPython's ``struct.pack("<f")`` (PyFloat_Pack4), which rounds the same way and raises
  OverflowError instead of giving infinity;
- exact rational arithmetic (``fractions.Fraction``) for sums and bounds;
- ``decimal`` at 60 digits for e**x in the transform-bound checks;
- Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. (2002), Lemma 3.1 and
  eq. (4.4): |fl(x_1 + ... + x_n) - sum| <= gamma_{n-1} sum |x_i|, gamma_k = k u / (1 - k u).
"""
from __future__ import annotations

import decimal
import math
import struct
from fractions import Fraction

import numpy as np
import pytest

from boxwood import numerics as floats
from boxwood.numerics import F32_MAX, Domain
from boxwood.verify import bounds


def f32(x: float) -> float:
    with np.errstate(over="ignore"):
        return float(np.float32(x))


def thresholds():
    """Thresholds of every kind: float32 values, float32 midpoints (ties), values in
    between, subnormals, signed zeros, huge values, and random magnitudes (seeded)."""
    rng = np.random.default_rng(7)
    out = [0.0, -0.0, 1.0, -1.0, 0.1, -0.1, 1.5, 2.0 ** -149, -(2.0 ** -149), 2.0 ** -150, 2.0 ** -126,
           5e-324, F32_MAX, -F32_MAX, 3.5e38, -3.5e38, 1e300, -1e300, 16777216.0, 16777217.0,
           1.0 + 2.0 ** -24, 1.0 + 3 * 2.0 ** -24, 0.5244774442452258]
    for v in rng.standard_normal(3000) * 10.0 ** rng.integers(-45, 38, 3000):
        out.append(float(v))
        f = f32(v)
        if math.isfinite(f):
            g = float(np.nextafter(np.float32(f), np.float32(np.inf)))
            if math.isfinite(g):
                out.append(float((Fraction(f) + Fraction(g)) / 2))  # a float32 tie
                out.append(f)
    return out


@pytest.mark.parametrize("chunk", range(4))
def test_float32_left_boundary_matches_numpy_casting(chunk):
    """B is the last float64 whose float32 rounding is <= t: B itself rounds to <= t, the
    float64 after it rounds to > t (numpy's cast, and CPython's struct agree)."""
    ts = thresholds()
    for t in ts[chunk::4]:
        b = floats.float32_left_boundary(t)
        after = float(np.nextafter(b, np.inf))
        assert f32(b) <= t, (t, b)
        assert not f32(after) <= t, (t, b, after)
        try:
            packed = struct.unpack("<f", struct.pack("<f", b))[0]
        except OverflowError:
            packed = -math.inf if b < 0 else math.inf
        assert packed == f32(b)


def test_ties_go_to_even_by_hand():
    """Worked by hand (IEEE 754-2019 clause 4.3.1, roundTiesToEven):
    1.0 has significand ...0 (even); the next float32 is 1 + 2**-23; their midpoint
    1 + 2**-24 rounds to 1.0, so B(1.0) is the midpoint itself.
    1 + 2**-23 has an odd last bit; the midpoint 1 + 3 * 2**-24 between it and 1 + 2**-22
    rounds up to the even 1 + 2**-22, so B(1 + 2**-23) is the float64 just below it."""
    assert floats.float32_left_boundary(1.0) == 1.0 + 2.0 ** -24
    assert f32(1.0 + 2.0 ** -24) == 1.0
    mid = 1.0 + 3 * 2.0 ** -24
    assert f32(mid) == 1.0 + 2.0 ** -22
    assert floats.float32_left_boundary(1.0 + 2.0 ** -23) == float(np.nextafter(mid, -np.inf))
    # a threshold between two float32 values acts like the float32 below it
    assert floats.float32_left_boundary(1.0 + 2.0 ** -30) == floats.float32_left_boundary(1.0)
    # zero: the smallest float32 subnormal is 2**-149; the tie 2**-150 rounds to 0 (even)
    assert floats.float32_left_boundary(0.0) == 2.0 ** -150 == floats.float32_left_boundary(-0.0)
    assert f32(2.0 ** -150) == 0.0 and f32(float(np.nextafter(2.0 ** -150, 1))) == 2.0 ** -149


def test_float32_input_limit_is_where_the_cast_overflows():
    """The largest float64 that rounds to a finite float32 is just below 2**128 - 2**103
    (the midpoint between F32_MAX and 2**128, which ties to the even 2**128: overflow)."""
    limit = floats.float32_input_limit()
    assert Fraction(floats.float32_overflow_midpoint()) == Fraction(2) ** 128 - Fraction(2) ** 103
    assert f32(limit) == F32_MAX
    assert f32(float(np.nextafter(limit, np.inf))) == math.inf
    struct.pack("<f", limit)
    with pytest.raises(OverflowError):
        struct.pack("<f", float(np.nextafter(limit, np.inf)))
    assert floats.float32_left_boundary(F32_MAX) == limit


def test_domains_find_values_between_boundaries_exactly():
    d64 = Domain("float64", -math.inf, math.inf, True)
    d32 = Domain("float32", -F32_MAX, F32_MAX, False)
    one_up = float(np.nextafter(1.0, 2.0))
    assert d64.any_between(1.0, one_up) and not d64.any_between(1.0, 1.0)
    # no float32 value lies in (1.0, 1 + 2**-24]; 1 + 2**-23 is the next one
    assert not d32.any_between(1.0, 1.0 + 2.0 ** -24)
    assert d32.any_between(1.0, 1.0 + 2.0 ** -23)
    assert d32.first_above(1.0) == 1.0 + 2.0 ** -23 == f32(1.0 + 2.0 ** -23)
    assert d32.first_above(None) == -F32_MAX and d32.first_above(F32_MAX) is None
    assert d64.first_above(None) == -math.inf and d64.first_above(math.inf) is None
    assert d32.last_at_most(1.0 + 2.0 ** -24) == 1.0


def test_ulp_distance_counts_nextafter_steps():
    rng = np.random.default_rng(3)
    xs = rng.standard_normal(200) * 10.0 ** rng.integers(-300, 300, 200)
    for x in xs:
        y = x
        for k in range(1, 4):
            y = np.nextafter(y, np.inf)
            assert int(floats.ulp_distance([x], [y])[0]) == k
    tiny = 5e-324
    assert int(floats.ulp_distance([-tiny], [tiny])[0]) == 2
    assert int(floats.ulp_distance([-0.0], [0.0])[0]) == 0
    assert int(floats.ulp_distance([np.nan], [np.nan])[0]) == 0
    assert int(floats.ulp_distance([np.nan], [1.0])[0]) == int(floats.ULP_NAN)
    assert int(floats.ulp_distance([-floats.F64_MAX], [floats.F64_MAX])[0]) == 2 * (2 ** 63 - 2 ** 52) - 2


def test_recursive_summation_error_is_within_gamma():
    """Higham (2002) eq. (4.4), checked against exact rational sums, in several orders."""
    rng = np.random.default_rng(11)
    u = floats.UNIT_ROUNDOFF["float64"]
    for trial in range(200):
        n = int(rng.integers(2, 400))
        x = (rng.standard_normal(n) * 10.0 ** rng.integers(-5, 5, n)).tolist()
        exact = sum(Fraction(v) for v in x)
        bound = floats.gamma(n - 1, u) * sum(abs(Fraction(v)) for v in x)
        for order in (x, x[::-1], sorted(x)):
            acc = 0.0
            for v in order:
                acc += v
            assert abs(Fraction(acc) - exact) <= bound
    assert floats.gamma(2, 2.0 ** -53) == Fraction(2, 2 ** 53) / (1 - Fraction(2, 2 ** 53))


def _dexp(x):
    with decimal.localcontext() as c:
        c.prec = 60
        return decimal.Decimal(x).exp()


def test_logistic_bounds_cover_exact_differences():
    """sigma is 1/4-Lipschitz and log sigma 1-Lipschitz: the bound for a raw bound D covers
    |sigma(a) - sigma(s)| computed in 60-digit decimal, for |a - s| <= D."""
    from boxwood.verify.structure import OutputBound

    rng = np.random.default_rng(5)
    for d in (0.0, 1e-12, 1e-3, 0.5, 3.0):
        o = OutputBound(0, "p", d == 0, d, d, 0.0, 0.0, [], (-40.0, 40.0), (-40.0 - d, 40.0 + d))
        bounds.carry("logistic", [o])
        for _ in range(300):
            s = float(rng.uniform(-40, 40))
            a = s + float(rng.uniform(-d, d))
            ps = 1 / (1 + _dexp(-s))
            pa = 1 / (1 + _dexp(-a))
            assert abs(float(pa - ps)) <= o.transformed_abs
            assert abs(float((pa - ps) / ps)) <= o.transformed_rel


def test_softmax_moves_by_at_most_half_the_largest_raw_change():
    """|d p_k| <= max_j |d r_j| / 2 (gradient 1-norm 2 p_k (1 - p_k) <= 1/2), checked in
    60-digit decimal on random raw vectors."""
    from boxwood.verify.structure import OutputBound

    rng = np.random.default_rng(9)
    k = 4
    for d in (1e-9, 0.1, 2.0):
        outs = [OutputBound(j, str(j), False, d, d, 0.0, 0.0, [], (-20.0, 20.0), (-20.0 - d, 20.0 + d))
                for j in range(k)]
        bounds.carry("softmax", outs)
        for _ in range(200):
            s = rng.uniform(-20, 20, k)
            a = s + rng.uniform(-d, d, k)
            es = [_dexp(v) for v in s.tolist()]
            ea = [_dexp(v) for v in a.tolist()]
            for j in range(k):
                ps, pa = es[j] / sum(es), ea[j] / sum(ea)
                assert abs(float(pa - ps)) <= outs[j].transformed_abs
                assert abs(float(pa - ps)) <= d / 2 + 1e-15
                assert abs(float((pa - ps) / ps)) <= outs[j].transformed_rel


def test_implementation_allowance_as_derived():
    """With bit-identical raw scores, two correct implementations differ by at most:
    exp 2 eps, logistic about 2 (eps + 2u), softmax over K about 2 (2 eps + u + gamma_{K-1})
    (eps = 2**-52 assumed for exp, u = 2**-53), in units of 2**-52, rounded up."""
    unit = 2.0 ** -52
    assert 2 <= bounds.implementation_allowance("exp", 1) / unit < 2.01
    assert 4 <= bounds.implementation_allowance("logistic", 1) / unit < 4.01
    assert 7 <= bounds.implementation_allowance("softmax", 3) / unit < 7.01
    assert 14 <= bounds.implementation_allowance("softmax", 10) / unit < 14.01
    assert bounds.implementation_allowance("identity", 1) == 0.0
