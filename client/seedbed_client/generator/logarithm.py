"""A natural logarithm built only from IEEE basic operations and exact bit manipulation.

numpy's np.log dispatches to different SIMD code on different CPUs, and its last bit may
differ between them; the normal transform's tail needs log(r), so we build our own:

    x = 2**e * m,  m in [sqrt(1/2), sqrt(2))   (e and m from integer operations on the bits)
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

# Bits of float64(sqrt(1/2)) = 0x1.6a09e667f3bcdp-1. Subtracting them from a positive
# double's bits and shifting right by 52 (arithmetically) gives the e for which
# m = x / 2**e lies in [0x1.6a09e667f3bcdp-1, 0x1.6a09e667f3bcdp+0), as bit patterns.
_REDUCE_OFFSET = 0x3FE6A09E667F3BCD
_EXPONENT_BITS = -(1 << 52)  # 0xFFF0000000000000 as int64: keeps the top 12 bits
_MIN_NORMAL_BITS = 1 << 52
_TWO_POW_54 = float.fromhex("0x1p54")


def log_positive(x: np.ndarray) -> np.ndarray:
    """log of positive finite float64 values (not checked: the caller guarantees the domain)."""
    x = np.ascontiguousarray(x, dtype=np.float64)
    ix = x.view(np.int64)
    subnormal_shift: np.ndarray | None = None
    if ix.size and ix.min() < _MIN_NORMAL_BITS:
        # Scaling by 2**54 is exact and makes every subnormal normal.
        subnormal = ix < _MIN_NORMAL_BITS
        scaled = x.copy()
        scaled[subnormal] *= _TWO_POW_54
        ix = scaled.view(np.int64)
        subnormal_shift = np.where(subnormal, -54.0, 0.0)
    shifted = np.subtract(ix, _REDUCE_OFFSET)
    np.bitwise_and(shifted, _EXPONENT_BITS, out=shifted)  # e * 2**52
    m = np.subtract(ix, shifted).view(np.float64)  # x / 2**e, exact
    np.right_shift(shifted, 52, out=shifted)  # arithmetic shift: e
    ef = shifted.astype(np.float64)  # |e| < 1100: exact
    if subnormal_shift is not None:
        ef += subnormal_shift

    f = np.subtract(m, 1.0, out=m)  # exact (Sterbenz)
    s = np.add(f, 2.0)
    np.divide(f, s, out=s)
    w = s * s
    t = np.multiply(w, SERIES[-1])
    np.add(t, SERIES[-2], out=t)
    for c in SERIES[-3::-1]:
        np.multiply(t, w, out=t)
        np.add(t, c, out=t)
    np.multiply(t, w, out=t)  # T
    np.subtract(f, t, out=t)  # f - T
    np.multiply(t, s, out=t)  # c = s*(f - T), small
    np.multiply(ef, LN2_LO, out=w)
    np.subtract(t, w, out=t)  # c - e*LN2_LO, still small
    np.subtract(f, t, out=t)  # log(m) + e*LN2_LO in one rounding of the large part
    np.multiply(ef, LN2_HI, out=w)  # exact
    np.add(w, t, out=t)
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
