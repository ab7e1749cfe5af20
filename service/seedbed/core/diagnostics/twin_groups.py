"""Twin units: units of one layer whose incoming weights are exactly equal.

Two units with identical incoming weights (and bias, and conv group) see the same inputs, so
they compute the same function. Whether they stay twins during training depends on what comes
after them: if they also receive identical gradients (their outgoing weights are equal too, as
with an all-constant init), every update keeps them equal and the layer has fewer distinct
units than it claims, forever. If their gradients differ (a random next layer, or a residual
sum that adds them to different stream units, as with Fixup's zero-initialised branch ends),
the first update separates them. `locked_groups` checks this on the synthetic batch: a twin
group is *locked* when the gradients of its units agree at every sample and position (up to
1e-9 of the layer's largest gradient, which absorbs summation-order rounding).

When the gradient reaching a layer is exactly zero everywhere (a zero-initialised layer above
it, as in Fixup), the batch cannot tell; then the twins count as locked only if the next layer
also has identical incoming columns for them (`outgoing_rows`), so that no update of the layers
above can ever treat them differently. Twins whose output goes into a residual sum, or also
along a skip path, are not locked: the sum adds them to different stream units.

Incoming weights per kind (rows in the out_in logical order, as served with layout out_in):

    dense       row i of the weight, then bias i
    conv        the group of output channel i, then its kernel (c_in/groups x kernel), then
                bias i: channels of different groups see different inputs and are never twins
    attention   row i of the output projection, then its bias i (the unit's own weights)
    embedding   column d of the table: output feature d across all token ids
    norm        none: each feature normalises its own input, there is nothing to compare
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from seedbed.core.diagnostics.network import Step

FloatArray = npt.NDArray[np.float64]
IntArray = npt.NDArray[np.int64]

GROUPS_LISTED = 8  # twin groups listed per layer; the rest are counted
INDICES_LISTED = 16  # unit indices listed per group; its size is always given
LOCK_TOLERANCE = 1e-9


def _with_bias(parts: list[FloatArray], bias: FloatArray | None) -> list[FloatArray]:
    return parts if bias is None else [*parts, bias.reshape(-1, 1)]


def incoming_rows(
    step: Step, lookup: Callable[[str], FloatArray | None]
) -> list[FloatArray] | None:
    """Blocks of columns, one row per unit of `step`, that together determine its output: the
    weight matrix first, then (conv) the group index and (with a bias) the bias."""
    name = step.name
    if step.kind == "dense":
        weight = lookup(f"{name}.weight")
        assert weight is not None
        return _with_bias([weight], lookup(f"{name}.bias"))
    if step.kind == "conv":
        weight = lookup(f"{name}.weight")
        assert weight is not None
        c_out = weight.shape[0]
        group = np.repeat(
            np.arange(step.layer.groups, dtype=np.float64), c_out // step.layer.groups
        ).reshape(-1, 1)
        return _with_bias([weight.reshape(c_out, -1), group], lookup(f"{name}.bias"))
    if step.kind == "attention":
        weight = lookup(f"{name}.output.weight")
        assert weight is not None
        return _with_bias([weight], lookup(f"{name}.output.bias"))
    if step.kind == "embedding":
        table = lookup(f"{name}.weight")
        assert table is not None
        return [table.T]
    return None


def outgoing_rows(
    step: Step, lookup: Callable[[str], FloatArray | None]
) -> list[FloatArray] | None:
    """One row per *input* feature of `step`: the weights that feature is multiplied by (None
    for kinds where a feature's influence is not a column of weights)."""
    name = step.name
    if step.kind == "dense":
        weight = lookup(f"{name}.weight")
        assert weight is not None
        return [weight.T]
    if step.kind == "conv":
        weight = lookup(f"{name}.weight")
        assert weight is not None
        g = step.layer.groups
        c_out, c_in_g = weight.shape[0], weight.shape[1]
        # input channel gi*c_in_g + a feeds output channels of group gi through weight[., a]
        per_group = weight.reshape(g, c_out // g, c_in_g, -1).transpose(0, 2, 1, 3)
        rows = per_group.reshape(g * c_in_g, -1)
        group = np.repeat(np.arange(g, dtype=np.float64), c_in_g).reshape(-1, 1)
        return [rows, group]
    if step.kind == "attention":
        parts = [lookup(f"{name}.{p}.weight") for p in ("query", "key", "value")]
        return [p.T for p in parts if p is not None]
    return None


def same_rows(blocks: list[FloatArray], group: IntArray) -> bool:
    """Are the rows `group` exactly equal in every block?"""
    for block in blocks:
        rows = _bits(block[group])
        if not np.array_equal(rows, np.broadcast_to(rows[:1], rows.shape)):
            return False
    return True


# Columns sampled for a row's fingerprint; equal rows always share it, and random rows differ
# in every column, so a few columns separate them. Candidates are then compared in full.
_SAMPLED_COLUMNS = 32
_SIGN_BIT = np.uint64(1 << 63)


def _bits(values: FloatArray) -> npt.NDArray[np.uint64]:
    """IEEE bit patterns, with -0.0 mapped onto 0.0 (equal values, different bits)."""
    bits = np.ascontiguousarray(values, dtype=np.float64).view(np.uint64)
    return np.where(bits == _SIGN_BIT, np.uint64(0), bits)


def twin_groups(blocks: list[FloatArray]) -> list[IntArray]:
    """Groups (size >= 2) of row indices whose rows are exactly equal in every block, ordered
    by first index."""
    n = blocks[0].shape[0]
    if n < 2:
        return []
    samples = []
    for block in blocks:
        cols = block.shape[1]
        picked = np.unique(np.linspace(0, cols - 1, min(cols, _SAMPLED_COLUMNS)).astype(np.int64))
        samples.append(_bits(block[:, picked]))
    sample = np.ascontiguousarray(np.concatenate(samples, axis=1))
    keys = sample.view(np.dtype((np.void, 8 * sample.shape[1]))).ravel()
    _, inverse, counts = np.unique(keys, return_inverse=True, return_counts=True)
    inverse = inverse.ravel()
    groups: list[IntArray] = []
    for candidate in np.flatnonzero(counts >= 2):
        members = np.flatnonzero(inverse == candidate)
        full = np.concatenate([_bits(block[members]) for block in blocks], axis=1)
        exact_groups: dict[bytes, list[int]] = {}
        for row, i in zip(full, members, strict=True):
            exact_groups.setdefault(row.tobytes(), []).append(int(i))
        groups += [np.array(g, dtype=np.int64) for g in exact_groups.values() if len(g) >= 2]
    groups.sort(key=lambda g: int(g[0]))
    return groups


def locked_groups(groups: list[IntArray], grad: FloatArray) -> list[bool]:
    """Per group: do its units receive the same gradient at every sample and position?"""
    if not groups:
        return []
    rows = grad.reshape(-1, grad.shape[-1])
    top = float(np.max(np.abs(rows))) if rows.size else 0.0
    if not np.isfinite(top):
        return [False] * len(groups)
    tolerance = LOCK_TOLERANCE * top
    out = []
    for g in groups:
        spread = np.max(np.abs(rows[:, g] - rows[:, g[:1]])) if rows.shape[0] else 0.0
        out.append(bool(spread <= tolerance))
    return out


@dataclass(frozen=True)
class TwinSummary:
    units: int
    groups: list[list[int]]  # listed groups, each capped at INDICES_LISTED indices
    group_sizes: list[int]  # full size of each listed group
    group_count: int
    twin_fraction: float  # units in any twin group / units
    locked_fraction: float | None  # units in locked twin groups / units (None: not checked)

    def as_dict(self) -> dict[str, object]:
        return {
            "twin_units": self.groups,
            "twin_group_sizes": self.group_sizes,
            "twin_group_count": self.group_count,
            "twin_fraction": self.twin_fraction,
            "locked_twin_fraction": self.locked_fraction,
        }


def summarise(units: int, groups: list[IntArray], locked: list[bool] | None) -> TwinSummary:
    in_groups = sum(int(g.size) for g in groups)
    locked_units = (
        None
        if locked is None
        else sum(int(g.size) for g, flag in zip(groups, locked, strict=True) if flag)
    )
    listed = groups[:GROUPS_LISTED]
    return TwinSummary(
        units=units,
        groups=[[int(i) for i in g[:INDICES_LISTED]] for g in listed],
        group_sizes=[int(g.size) for g in listed],
        group_count=len(groups),
        twin_fraction=in_groups / units if units else 0.0,
        locked_fraction=None if locked_units is None else (locked_units / units if units else 0.0),
    )


__all__ = [
    "GROUPS_LISTED",
    "INDICES_LISTED",
    "TwinSummary",
    "incoming_rows",
    "locked_groups",
    "outgoing_rows",
    "same_rows",
    "summarise",
    "twin_groups",
]
