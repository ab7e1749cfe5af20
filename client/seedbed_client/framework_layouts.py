"""Layout and gate-order conversions between seedbed's tensors and frameworks' parameters.

numpy only. seedbed generates every tensor in its logical layout (output axis first: dense
(n_out, n_in), conv (c_out, c_in/groups, *kernel), recurrent (gates*hidden, n_in) with gate
blocks in the request's gate order); frameworks store some of them differently. Each function
rearranges values without changing any of them, so a converted tensor holds exactly the
bytes of the seedbed tensor, only in another order.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np


def reorder_gate_blocks(
    values: np.ndarray, order: Sequence[str], wanted: Sequence[str]
) -> np.ndarray:
    """Gate blocks stacked along axis 0 in `order`, restacked in `wanted` (same gate names)."""
    if sorted(order) != sorted(wanted) or len(set(order)) != len(order):
        raise ValueError(f"gate orders {list(order)} and {list(wanted)} name different gates")
    if values.shape[0] % len(order):
        raise ValueError(f"axis 0 ({values.shape[0]}) is not {len(order)} equal gate blocks")
    blocks = np.split(values, len(order), axis=0)
    by_gate = dict(zip(order, blocks, strict=True))
    return np.concatenate([by_gate[g] for g in wanted], axis=0)


def transposed_conv_kernel(values: np.ndarray, groups: int) -> np.ndarray:
    """seedbed's (c_out, c_in/groups, *k) kernel of a transposed conv as (c_in, c_out/groups,
    *k), input channels first, the layout of frameworks that store a transposed conv as the
    adjoint of a regular one. Output channel o of group g connects the same input channels in
    both; only the axis order changes."""
    c_out, c_in_g, *kernel = values.shape
    if c_out % groups:
        raise ValueError(f"groups ({groups}) does not divide the {c_out} output channels")
    blocks = values.reshape(groups, c_out // groups, c_in_g, *kernel)
    return np.ascontiguousarray(blocks.swapaxes(1, 2)).reshape(
        groups * c_in_g, c_out // groups, *kernel
    )


def from_transposed_conv_kernel(values: np.ndarray, groups: int) -> np.ndarray:
    """The inverse of `transposed_conv_kernel`."""
    c_in, c_out_g, *kernel = values.shape
    if c_in % groups:
        raise ValueError(f"groups ({groups}) does not divide the {c_in} input channels")
    blocks = values.reshape(groups, c_in // groups, c_out_g, *kernel)
    return np.ascontiguousarray(blocks.swapaxes(1, 2)).reshape(
        groups * c_out_g, c_in // groups, *kernel
    )


def kernel_to_channels_last(values: np.ndarray) -> np.ndarray:
    """(c_out, c_in/groups, *k) as (*k, c_in/groups, c_out): spatial axes first, output last
    (seedbed's in_out conv layout; HWIO for two spatial axes)."""
    spatial = tuple(range(2, values.ndim))
    return np.ascontiguousarray(values.transpose(*spatial, 1, 0))


def matrix_to_in_out(values: np.ndarray) -> np.ndarray:
    """(n_out, n_in) as (n_in, n_out)."""
    return np.ascontiguousarray(values.T)
