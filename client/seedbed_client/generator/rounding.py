"""Rounding float64 values once to the output dtype, the same way on every machine.

float64 and float32: numpy's cast (the hardware conversion is IEEE round-to-nearest-even).
float16 and bfloat16: casts from float64 may go through float32 (rounding twice) or differ
between libraries, so the value is first rounded to the target's grid with integer
operations on the float64 bit pattern (nearest, ties to even, subnormals included); the
final cast then only copies a value the target can hold exactly.
"""

from __future__ import annotations

from typing import NamedTuple

import numpy as np


class _Grid(NamedTuple):
    fraction_bits: int  # stored mantissa bits
    min_normal_exp: int  # exponent of the smallest normal number
    max_finite: float


_GRIDS = {
    "float16": _Grid(10, -14, 65504.0),
    "bfloat16": _Grid(7, -126, float.fromhex("0x1.fep+127")),
}
OUTPUT_DTYPES = ("float64", "float32", "float16", "bfloat16")

_SIGN = np.uint64(1 << 63)
_FRACTION = np.uint64((1 << 52) - 1)
_IMPLICIT = np.uint64(1 << 52)
_EXP_FIELD = np.uint64(0x7FF)
_ONE = np.uint64(1)


def numpy_dtype(dtype: str) -> np.dtype:
    """The numpy dtype object for an output dtype name."""
    if dtype == "bfloat16":
        import ml_dtypes  # only needed for this dtype; keeps the import light otherwise

        return np.dtype(ml_dtypes.bfloat16)
    if dtype in OUTPUT_DTYPES:
        return np.dtype(dtype)
    raise ValueError(f"dtype must be one of {', '.join(OUTPUT_DTYPES)}, got {dtype!r}")


def round_to_grid(values: np.ndarray, fraction_bits: int, min_normal_exp: int) -> np.ndarray:
    """float64 values rounded (nearest, ties to even) to a binary format's grid.

    The format has `fraction_bits` stored mantissa bits, smallest normal exponent
    `min_normal_exp` and gradual underflow; its exponent range is unbounded above (the
    caller checks overflow). Values must be finite. Result is float64.
    """
    bits = np.ascontiguousarray(values, dtype=np.float64).view(np.uint64)
    sign = bits & _SIGN
    biased = (bits >> np.uint64(52)) & _EXP_FIELD
    # Significand as an integer: value = sig * 2**(biased - 1075). float64 subnormals
    # (biased 0) are far below any 16-bit grid and round to zero; give them no implicit bit.
    sig = (bits & _FRACTION) | np.where(biased > 0, _IMPLICIT, np.uint64(0))
    # Low bits to drop: 52 - fraction_bits for normal results, more below the normal range.
    biased_i = biased.astype(np.int64)
    drop_i = np.maximum(min_normal_exp + 1023 - biased_i, 0)
    drop_i += 52 - fraction_bits
    # Dropping 54 or more bits of a 53-bit significand leaves 0 (below half the quantum).
    np.minimum(drop_i, 60, out=drop_i)
    drop = drop_i.astype(np.uint64)
    kept = sig >> drop
    remainder = sig & ((_ONE << drop) - _ONE)
    half = _ONE << (drop - _ONE)
    round_up = (remainder > half) | ((remainder == half) & ((kept & _ONE) == _ONE))
    kept += round_up.astype(np.uint64)
    # Result = kept * 2**quantum_exp: kept <= 2**(fraction_bits+1) converts exactly and the
    # power of two is built from its bits, so the product is exact.
    quantum_exp = biased_i - 1075 + drop_i
    np.maximum(quantum_exp, -1022, out=quantum_exp)  # only where kept == 0 anyway
    power = ((quantum_exp + 1023).astype(np.uint64) << np.uint64(52)).view(np.float64)
    with np.errstate(over="ignore"):  # near float64's top; the caller reports overflow
        result = kept.astype(np.float64) * power
    out_bits = result.view(np.uint64)
    out_bits |= sign
    return out_bits.view(np.float64).reshape(np.shape(values))


def round_to_dtype(values: np.ndarray, dtype: str) -> np.ndarray:
    """float64 values rounded once (nearest, ties to even) to the output dtype.

    Raises ValueError for non-finite input or values too large for the dtype (they would
    become inf).
    """
    target = numpy_dtype(dtype)
    arr = np.asarray(values)
    if arr.dtype != np.float64:
        raise ValueError(f"values must be a float64 array, got {arr.dtype}")
    if dtype == "float64":
        if not np.isfinite(arr).all():
            raise ValueError("values must be finite")
        return arr.copy()
    if dtype == "float32":
        with np.errstate(over="ignore"):
            result = arr.astype(np.float32)
        if not np.isfinite(result).all():
            if not np.isfinite(arr).all():
                raise ValueError("values must be finite")
            raise ValueError(
                "values exceed the largest float32 (about 3.4e38) and would become inf"
            )
        return result
    grid = _GRIDS[dtype]
    if not np.isfinite(arr).all():
        raise ValueError("values must be finite")
    on_grid = round_to_grid(arr, grid.fraction_bits, grid.min_normal_exp)
    if on_grid.size and np.abs(on_grid).max() > grid.max_finite:
        raise ValueError(
            f"values exceed the largest {dtype} ({grid.max_finite:g}) and would become inf"
        )
    return on_grid.astype(target)
