"""From raw 64-bit draws to exact float64 values in the unit interval.

    uniform   u = (x >> 11) * 2**-53                  53 bits, in [0, 1)
              v = 2u - 1 = ((x >> 11) - 2**52) * 2**-52   in [-1, 1), exact
    p         p = ((x >> 12) * 2 + 1) * 2**-53        52 bits, odd multiples of 2**-53, in (0, 1)
              q = p - 1/2 = (((x >> 11) | 1) - 2**52) * 2**-53, exact

The integer form is exact (|value| <= 2**52 converts to float64 without rounding) and lets
the scaling be a single multiply by a power of two. The in-place versions overwrite their
`raw` argument, which the generator uses as scratch space.
"""

from __future__ import annotations

import numpy as np

_SHIFT_53 = np.uint64(11)
_SHIFT_52 = np.uint64(12)
_ONE = np.uint64(1)
_TWO_POW_52 = 2**52
TWO_POW_M52 = float.fromhex("0x1p-52")
TWO_POW_M53 = float.fromhex("0x1p-53")


def symmetric_uniform_into(raw: np.ndarray, out: np.ndarray) -> None:
    """out = 2u - 1 in [-1, 1); destroys raw."""
    np.right_shift(raw, _SHIFT_53, out=raw)
    signed = raw.view(np.int64)
    np.subtract(signed, _TWO_POW_52, out=signed)
    np.multiply(signed, TWO_POW_M52, out=out)


def centered_probability_into(raw: np.ndarray, out: np.ndarray) -> None:
    """out = p - 1/2 for the open-interval probability p; destroys raw."""
    np.right_shift(raw, _SHIFT_53, out=raw)
    np.bitwise_or(raw, _ONE, out=raw)
    signed = raw.view(np.int64)
    np.subtract(signed, _TWO_POW_52, out=signed)
    np.multiply(signed, TWO_POW_M53, out=out)


def unit_uniform(raw: np.ndarray) -> np.ndarray:
    """u = (x >> 11) * 2**-53 in [0, 1) (for tests and test vectors; raw is kept)."""
    return (np.asarray(raw, dtype=np.uint64) >> _SHIFT_53).astype(np.float64) * TWO_POW_M53


def open_probability(raw: np.ndarray) -> np.ndarray:
    """p = ((x >> 12) * 2 + 1) * 2**-53 in (0, 1) (for tests and test vectors; raw is kept)."""
    k = (np.asarray(raw, dtype=np.uint64) >> _SHIFT_52) * np.uint64(2) + _ONE
    return k.astype(np.float64) * TWO_POW_M53
