"""Twin units: units whose incoming weights are identical, byte for byte.

Two such units compute the same function of the same input and, in plain gradient training,
receive the same update forever: the layer is narrower than it looks (the symmetry problem
random initialisation exists to break). Equality is of stored bytes, so 0.0 and -0.0 differ
and a NaN equals a NaN with the same bits; that is what "identical as stored" means.

Rows are compared within each block only: gate blocks of a recurrent weight, and groups of a
grouped convolution, act on different inputs or through different nonlinearities, so equal
rows in different blocks are not twins.
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass

import numpy as np

# Rows wider than this are grouped by SHA-256 digest (then checked byte for byte) instead of
# being sorted as one opaque numpy value each: numpy caps such values' size, and sorting wide
# keys compares them over and over.
WIDE_ROW_BYTES = 1 << 16


@dataclass(frozen=True)
class TwinGroups:
    groups: tuple[tuple[int, ...], ...]  # unit indices, each group sorted, groups by first index
    row_values: int  # values per unit (the length of what is compared)

    @property
    def units_in_groups(self) -> int:
        return sum(len(g) for g in self.groups)


def _wide_groups(rows: np.ndarray, offset: int) -> list[tuple[int, ...]]:
    by_digest: dict[bytes, list[int]] = {}
    for i in range(rows.shape[0]):
        by_digest.setdefault(hashlib.sha256(rows[i].tobytes()).digest(), []).append(i)
    out = []
    for members in by_digest.values():
        if len(members) > 1 and all(
            rows[members[0]].tobytes() == rows[j].tobytes() for j in members[1:]
        ):
            out.append(tuple(i + offset for i in members))
    return out


def _groups_in(rows: np.ndarray, offset: int) -> list[tuple[int, ...]]:
    if rows.shape[0] < 2:
        return []
    width = rows.shape[1] * rows.dtype.itemsize
    if width > WIDE_ROW_BYTES:
        return _wide_groups(rows, offset)
    keys = np.ascontiguousarray(rows).view(np.dtype((np.void, width))).reshape(-1)
    _, inverse, counts = np.unique(keys, return_inverse=True, return_counts=True)
    repeated = np.flatnonzero(counts > 1)
    if repeated.size == 0:
        return []
    order = np.argsort(inverse, kind="stable")
    starts = np.concatenate(([0], np.cumsum(counts)[:-1]))
    out = []
    for k in repeated:
        members = order[starts[k] : starts[k] + counts[k]]
        out.append(tuple(int(i) + offset for i in members))
    return out


def twin_units(units: np.ndarray, blocks: int = 1) -> TwinGroups:
    """Groups of identical rows of a 2-D array whose rows are units, within each of `blocks`
    equal consecutive blocks of rows."""
    if units.ndim != 2:
        raise ValueError("twin_units needs a 2-D array with one row per unit")
    n = units.shape[0]
    if blocks < 1 or n % blocks:
        blocks = 1
    per = n // blocks
    groups: list[tuple[int, ...]] = []
    if units.shape[1] > 0:
        for b in range(blocks):
            groups.extend(_groups_in(units[b * per : (b + 1) * per], b * per))
    groups.sort(key=lambda g: g[0])
    return TwinGroups(tuple(groups), int(units.shape[1]))
