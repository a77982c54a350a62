"""Exact floating-point facts (IEEE 754 binary64 and binary32), shared by the verifier's proofs and
the float32 ONNX writer; computed from the formats themselves.

Everything here is exact: values are found with IEEE 754 next-value steps and casts
(numpy ``nextafter`` in float64 and float32, numpy's float64 -> float32 cast), never by
sampling. The tests (tests/test_verify_floats.py) check each result against numpy's own
casting of the neighbouring values.

Facts used (IEEE 754-2019):

* binary64 has a 53-bit significand, binary32 a 24-bit one (clause 3.6, Table 3.5);
* the default rounding is roundTiesToEven (clause 4.3.1, 4.3.3): a value halfway between
  two representable numbers goes to the one whose least significant significand bit is 0;
  numpy's float64 -> float32 cast and CPython's ``struct.pack("<f")`` both round so;
* a float64 -> float32 conversion whose rounded result exceeds the float32 range gives
  infinity (clause 7.4, overflow; numpy casts to inf, ``struct`` raises OverflowError);
  scikit-learn and the boxwood scorer both refuse such inputs.
"""
from __future__ import annotations

import math
import struct
import sys
from dataclasses import dataclass
from fractions import Fraction
from typing import Optional

import numpy as np

F64_MAX = sys.float_info.max
F32_MAX = float(np.finfo(np.float32).max)  # (2 - 2**-23) * 2**127
INF = math.inf
# Unit roundoff u = 2**-p for round-to-nearest with a p-bit significand (Higham, Accuracy
# and Stability of Numerical Algorithms, 2nd ed., 2002, section 2.1, eq. (2.5)).
UNIT_ROUNDOFF = {"float64": 2.0 ** -53, "float32": 2.0 ** -24}
# One unit in the last place relative to the value, at most: ulp(x) <= 2**-52 * |x| for
# normal float64 x (the significand has 52 bits after the point).
ULP_RELATIVE = 2.0 ** -52


def next_up(x: float) -> float:
    """The smallest float64 greater than ``x`` (``inf`` stays ``inf``)."""
    return float(np.nextafter(x, INF))


def next_down(x: float) -> float:
    """The largest float64 smaller than ``x`` (``-inf`` stays ``-inf``)."""
    return float(np.nextafter(x, -INF))


def round32(x: float) -> float:
    """``x`` rounded to float32 with roundTiesToEven (numpy's cast), as a float64; values
    beyond the float32 range become +-inf, as the cast gives."""
    with np.errstate(over="ignore"):
        return float(np.float32(x))


def _up32(f: float) -> float:
    """The float32 value after the float32 value ``f`` (both as float64; F32_MAX -> inf)."""
    with np.errstate(over="ignore"):
        return float(np.nextafter(np.float32(f), np.float32(INF)))


def _down32(f: float) -> float:
    with np.errstate(over="ignore"):
        return float(np.nextafter(np.float32(f), np.float32(-INF)))


def next32_above(x: float) -> float:
    """The smallest float32 value strictly greater than the float64 ``x`` (``inf`` when none)."""
    if x == INF:
        return INF
    f = round32(x)
    if f > x:
        return f
    return _up32(f)


def next32_below(x: float) -> float:
    """The largest float32 value strictly smaller than the float64 ``x`` (``-inf`` when none)."""
    if x == -INF:
        return -INF
    f = round32(x)
    if f < x:
        return f
    return _down32(f)


def float32_floor(t: float) -> float:
    """The largest float32 value (as a float64) that is <= ``t``; -inf when there is none."""
    if t == INF:
        return INF
    f = round32(t)
    return f if f <= t else _down32(f)


def _is_even32(f: float) -> bool:
    """True when the float32 ``f`` has an even significand (its last bit is 0)."""
    bits = struct.unpack("<I", struct.pack("<f", f))[0]
    return bits & 1 == 0


def float32_left_boundary(t: float) -> float:
    """The largest float64 ``x`` whose float32 rounding is <= ``t``.

    A split that compares ``float32(x) <= t`` (``t`` a float64 threshold, scikit-learn's
    classic trees) sends left exactly the float64 inputs ``x <= B`` with ``B`` this value:
    rounding is monotone, so the left set is a half-line, and its end is found from the
    largest float32 ``f <= t`` and the midpoint between ``f`` and the next float32 value.
    The midpoint needs 25 significand bits, so it is exact in float64. An input exactly at
    the midpoint is a tie: roundTiesToEven sends it to ``f`` when ``f``'s significand is
    even, so ``B`` is the midpoint itself; otherwise ``B`` is the float64 just below it.

    ``t = +inf`` gives ``+inf``. When no float32 value is <= ``t`` (``t`` below
    ``-F32_MAX``), only inputs that round to ``-inf`` go left, which are ``-inf`` and
    values that overflow (refused as inputs): the result is the largest of those.
    """
    if math.isnan(t):
        raise ValueError("a threshold cannot be NaN")
    if t == INF:
        return INF
    f = float32_floor(t)
    if f == -INF:
        # Inputs that round to -inf: those <= -(2**128 - 2**103); the tie at that
        # midpoint goes to the even value, which is -2**128 (overflow), so it rounds to -inf.
        return -float32_overflow_midpoint()
    g = _up32(f)
    if g == INF:
        mid = float32_overflow_midpoint()
    else:
        mid = float((Fraction(f) + Fraction(g)) / 2)  # exact: 25 bits
    return mid if _is_even32(f) else next_down(mid)


def float32_overflow_midpoint() -> float:
    """2**128 - 2**103: halfway between F32_MAX and 2**128; it and everything above it
    round to +inf (the tie goes to the even 2**128, which overflows)."""
    return float(Fraction(F32_MAX) + Fraction(2) ** 103)


def float32_input_limit() -> float:
    """The largest float64 whose float32 rounding is finite (= F32_MAX): the top of the
    input range of a model that compares in float32."""
    return next_down(float32_overflow_midpoint())


def left_boundary(t: float, precision: str) -> float:
    """End ``B`` of a numeric split's left set ``{x : x <= B}`` over float64 inputs, for a
    split that compares ``round_precision(x) <= t``."""
    if precision == "float64":
        return t
    if precision == "float32":
        return float32_left_boundary(t)
    raise ValueError("unknown compare precision %r" % (precision,))


@dataclass(frozen=True)
class Domain:
    """The numeric values one input feature may take.

    ``precision``: "float64" (every float64) or "float32" (only float32 values, for an
    evaluator that takes float32 input). ``lo``/``hi``: the smallest and largest value
    accepted (+-inf when infinity is accepted). ``missing``: a missing value (NaN) is
    accepted (and routed by the trees).
    """

    precision: str
    lo: float
    hi: float
    missing: bool

    def first_above(self, x: Optional[float]) -> Optional[float]:
        """The smallest domain value strictly greater than ``x`` (``x`` None: the smallest
        domain value), or None when there is none."""
        if x is None or x < self.lo:
            v = self.lo
        elif self.precision == "float64":
            v = next_up(x)
        else:
            v = next32_above(x)
        if x is not None and not v > x:  # x = +inf
            return None
        return v if v <= self.hi else None

    def last_at_most(self, x: float) -> Optional[float]:
        """The largest domain value <= ``x``, or None."""
        if x > self.hi:
            x = self.hi
        if x < self.lo:
            return None
        if self.precision == "float64":
            return x
        f = float32_floor(x)
        return f if f >= self.lo else None

    def any_between(self, lo_excl: Optional[float], hi_incl: float) -> bool:
        """True when some domain value v has ``lo_excl < v <= hi_incl`` (None: no lower end)."""
        v = self.first_above(lo_excl)
        return v is not None and v <= hi_incl

    def contains(self, x: float) -> bool:
        if math.isnan(x):
            return self.missing
        if not self.lo <= x <= self.hi:
            return False
        return self.precision == "float64" or round32(x) == x

    def describe(self) -> str:
        lo = "-inf" if self.lo == -INF else repr(self.lo)
        hi = "inf" if self.hi == INF else repr(self.hi)
        return "%s values in [%s, %s]%s" % (self.precision, lo, hi, ", missing" if self.missing else "")


def numeric_domain(input_precision: str, compare_precisions, accepts_infinity: bool, missing: bool) -> Domain:
    """The inputs a numeric feature may take when both sides accept them.

    A side that compares in float32 refuses inputs whose float32 rounding overflows, so
    the finite range stops at :func:`float32_input_limit` (float64 inputs) or F32_MAX
    (float32 inputs). ``accepts_infinity`` adds +-inf.
    """
    if input_precision == "float32" or "float32" in compare_precisions:
        top = F32_MAX if input_precision == "float32" else float32_input_limit()
    else:
        top = F64_MAX
    if accepts_infinity:
        return Domain(input_precision, -INF, INF, missing)
    return Domain(input_precision, -top, top, missing)


# ----------------------------------------------------------------------------- ulps
def ulp_keys(a: np.ndarray) -> np.ndarray:
    """Map float64 values to int64 keys that are ordered like the values and consecutive
    for adjacent floats (-0.0 and 0.0 share a key): the sign-magnitude to two's-complement
    trick, common practice (e.g. B. Dawson, "Comparing Floating Point Numbers, 2012 Edition")."""
    i = np.ascontiguousarray(a, dtype=np.float64).view(np.int64)
    return np.where(i >= 0, i, -(i & np.int64(0x7FFFFFFFFFFFFFFF)))


ULP_NAN = np.iinfo(np.uint64).max  # the distance reported when exactly one side is NaN


def ulp_distance(a, b) -> np.ndarray:
    """Elementwise number of float64 steps between ``a`` and ``b`` (uint64; 0 when equal,
    including two NaNs; ULP_NAN when exactly one is NaN)."""
    a = np.asarray(a, dtype=np.float64)
    b = np.asarray(b, dtype=np.float64)
    ka, kb = ulp_keys(a).astype(np.uint64), ulp_keys(b).astype(np.uint64)
    ge = ulp_keys(a) >= ulp_keys(b)
    # Modular uint64 subtraction gives the true distance (it is below 2**64).
    d = np.where(ge, ka - kb, kb - ka)
    na, nb = np.isnan(a), np.isnan(b)
    d = np.where(na & nb, np.uint64(0), d)
    return np.where(na ^ nb, ULP_NAN, d)


# ----------------------------------------------------------------------------- bounds
def gamma(n: int, u: float) -> Fraction:
    """gamma_n = n u / (1 - n u) (Higham 2002, Lemma 3.1), exactly; requires n u < 1."""
    nu = Fraction(n) * Fraction(u)
    if nu >= 1:
        raise ValueError("gamma_n needs n u < 1 (n=%d, u=%r)" % (n, u))
    return nu / (1 - nu)


def round_up(x) -> float:
    """The smallest float64 >= ``x`` (a Fraction, int or float); +inf for huge values."""
    if isinstance(x, float):
        return x
    x = Fraction(x)
    try:
        f = float(x)
    except OverflowError:
        return INF if x > 0 else -F64_MAX
    if Fraction(f) < x:
        f = next_up(f)
    return f


def up(x: float, steps: int = 1) -> float:
    """``x`` moved ``steps`` float64 steps towards +inf: covers the rounding of the one
    floating-point operation that produced ``x`` (each is within half a step)."""
    for _ in range(steps):
        x = next_up(x)
    return x


def exp_up(x: float) -> float:
    """An upper bound of e**x: math.exp, enlarged by 4 ulps to cover its own error
    (it is within 1 ulp on the platforms boxwood supports; see ASSUMED_EXP_ULPS)."""
    try:
        return up(math.exp(x), 4)
    except OverflowError:
        return INF
