"""Value statistics of one tensor, computed in float64 over bounded pieces.

The std is the population standard deviation (divide by the count) of the finite values, by
two passes (mean first, then squared deviations) so a large mean does not swallow a small
spread. Non-finite values are counted by kind and left out of mean, std, min and max.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

# Elements converted to float64 at a time: bounds the temporary memory to 8 MiB.
PIECE = 1 << 20


@dataclass(frozen=True)
class ValueStats:
    count: int
    nan: int
    posinf: int
    neginf: int
    mean: float | None  # None when no value is finite
    std: float | None
    min: float | None
    max: float | None

    @property
    def nonfinite(self) -> int:
        return self.nan + self.posinf + self.neginf

    @property
    def finite(self) -> int:
        return self.count - self.nonfinite

    @property
    def all_constant(self) -> bool:
        """Every element equals the same finite value (a single element does not count)."""
        return self.count > 1 and self.nonfinite == 0 and self.min == self.max

    @property
    def all_zero(self) -> bool:
        return self.all_constant and self.min == 0.0


def _pieces(values: np.ndarray) -> list[np.ndarray]:
    flat = values.reshape(-1)
    return [flat[i : i + PIECE] for i in range(0, flat.size, PIECE)]


def value_stats(values: np.ndarray) -> ValueStats:
    nan = posinf = neginf = 0
    total = 0.0
    low, high = np.inf, -np.inf
    for piece in _pieces(values):
        x = piece.astype(np.float64)
        finite = np.isfinite(x)
        if not finite.all():
            nan += int(np.isnan(x).sum())
            posinf += int(np.isposinf(x).sum())
            neginf += int(np.isneginf(x).sum())
            x = x[finite]
        if x.size:
            total += float(x.sum())
            low = min(low, float(x.min()))
            high = max(high, float(x.max()))
    count = int(values.size)
    finite_count = count - nan - posinf - neginf
    if finite_count == 0:
        return ValueStats(count, nan, posinf, neginf, None, None, None, None)
    mean = total / finite_count
    squares = 0.0
    for piece in _pieces(values):
        x = piece.astype(np.float64)
        x = x[np.isfinite(x)]
        squares += float(np.square(x - mean).sum())
    return ValueStats(count, nan, posinf, neginf, mean, (squares / finite_count) ** 0.5, low, high)
