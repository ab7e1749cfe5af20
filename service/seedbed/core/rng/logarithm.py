"""A natural logarithm built only from IEEE basic operations and exact bit manipulation.

numpy's np.log dispatches to different SIMD code on different CPUs, and its last bit may
differ between them; the normal transform's tail needs log(r), so we build our own:

    x = 2**e * m,  m in [sqrt(1/2), sqrt(2))   (exponent and mantissa read from the bits)
    f = m - 1                                   (exact: Sterbenz)
    s = f / (2 + f)                             (= (m - 1) / (m + 1))
    log(m) = 2*atanh(s) = 2s + 2s^3/3 + 2s^5/5 + ...
           = f - s*(f - T),  T = w*(2/3 + w*(2/5 + ... + w*(2/23))),  w = s*s
    (using 2s = f - s*f; the exact f carries most of the value, rounding touches only the
    small correction), and
    log(x) = e*LN2_HI + (f - (s*(f - T) - e*LN2_LO))
    in exactly that order: the small terms are combined first, so only two roundings happen
    at the size of the result.

LN2_HI has 32 significant bits, so e*LN2_HI is exact for every double's exponent. With
|s| <= 0.1716 the first omitted series term is below 1e-19 relative. Every multiply and add
is its own numpy ufunc, so no fused multiply-add can change a rounding.
"""

from __future__ import annotations

import numpy as np

LN2_HI = float.fromhex("0x1.62e42fee00000p-1")  # ln 2 rounded down to 32 significant bits
LN2_LO = float.fromhex("0x1.a39ef35793c76p-33")  # float64(ln 2 - LN2_HI)

# 2/(2k+1), k = 1..11, lowest power of w first. Python float division is IEEE correctly
# rounded, so these are the same doubles everywhere.
SERIES = tuple(2.0 / (2 * k + 1) for k in range(1, 12))

_EXP_MASK = np.uint64(0x7FF0000000000000)
_FRAC_MASK = np.uint64(0x000FFFFFFFFFFFFF)
_ONE_EXP_BITS = np.uint64(0x3FF0000000000000)  # exponent field of [1, 2)
_HALF_EXP_BITS = np.uint64(0x3FE0000000000000)  # exponent field of [1/2, 1)
# Mantissa field of float64(sqrt(2)) = 0x1.6a09e667f3bcdp+0: above it, m is moved to [1/2, 1).
_SQRT2_FRAC = np.uint64(0x6A09E667F3BCD)
_TWO_POW_54 = float.fromhex("0x1p54")


def log_positive(x: np.ndarray) -> np.ndarray:
    """log of positive finite float64 values (not checked: the caller guarantees the domain)."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    bits = x.view(np.uint64)
    exponent_shift = np.zeros(x.shape, dtype=np.int64)
    subnormal = bits < np.uint64(1 << 52)
    if subnormal.any():
        # Scaling by 2**54 is exact and makes every subnormal normal.
        scaled = x.copy()
        scaled[subnormal] *= _TWO_POW_54
        bits = scaled.view(np.uint64)
        exponent_shift[subnormal] = -54
    field = bits & _FRAC_MASK
    upper = field > _SQRT2_FRAC
    m = (field | np.where(upper, _HALF_EXP_BITS, _ONE_EXP_BITS)).view(np.float64)
    e = (bits >> np.uint64(52)).astype(np.int64)
    e -= 1023
    e += upper
    e += exponent_shift
    ef = e.astype(np.float64)  # |e| < 1100: exact

    f = m - 1.0
    s = np.add(f, 2.0)
    np.divide(f, s, out=s)
    w = s * s
    t = np.full_like(w, SERIES[-1])
    for c in SERIES[-2::-1]:
        np.multiply(t, w, out=t)
        np.add(t, c, out=t)
    np.multiply(t, w, out=t)  # T
    np.subtract(f, t, out=t)  # f - T
    np.multiply(t, s, out=t)  # c = s*(f - T), small
    lo = ef * LN2_LO
    np.subtract(t, lo, out=t)  # c - e*LN2_LO, still small
    np.subtract(f, t, out=t)  # log(m) + e*LN2_LO in one rounding of the large part
    np.multiply(ef, LN2_HI, out=lo)  # exact
    np.add(lo, t, out=t)
    return t


def deterministic_log(x: np.ndarray) -> np.ndarray:
    """Natural log of an array of positive finite values, bit-identical on every CPU.

    Accuracy: within 1 ulp of the true value (see tests/test_rng_log.py for the measured
    bound). Zero, negative, infinite or NaN inputs raise ValueError.
    """
    arr = np.asarray(x, dtype=np.float64)
    if arr.size and not (np.all(arr > 0.0) and np.all(np.isfinite(arr))):
        raise ValueError("x must hold positive finite values for deterministic_log")
    return log_positive(arr)
