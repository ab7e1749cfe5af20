"""Conversions between seedbed's served layouts and the parameter layouts of ML frameworks.

numpy only: the PyTorch bridge, the ONNX import and the JAX bridge all use this one module, so
a layout is worked out once and every bridge agrees on it. Nothing here changes a value: every
function only rearranges (transposes, reorders blocks, concatenates, splits), so a tensor's
numbers are exactly the served ones.

seedbed's layouts (the request's `layout`; the table of seedbed.core.tensors):

    kind        tensor               out_in (logical)            in_out
    dense       weight               (n_out, n_in)               (n_in, n_out)
    conv        weight               (out, in/groups, *k)        (*k, in/groups, out)
    recurrent   input/recurrent      (G*hidden, n_in|hidden)     (n_in|hidden, G*hidden)
    attention   query/key/value/out  (dim, dim)                  transposed
    embedding   weight               (vocab, dim)                (vocab, dim)
    norm        scale, shift         (dim,)                      (dim,)

Recurrent gate blocks are stacked along the output axis in the order the request's
`gate_order` names (default lstm input, forget, cell, output; gru reset, update, candidate).
A transposed conv is served in the same (out, in/groups, *k) layout as a regular one.

Frameworks' documented layouts (from their reference documentation, [from memory] where noted):

- PyTorch (torch.nn reference): Linear.weight (out, in) = out_in; ConvNd.weight
  (out, in/groups, *k) = out_in; ConvTransposeNd.weight (in, out/groups, *k): see
  `transposed_conv_to_in_first`; LSTM weight_ih_l{k} stacks (W_ii|W_if|W_ig|W_io), gates
  input, forget, cell, output; GRU stacks (W_ir|W_iz|W_in), gates reset, update, candidate;
  two bias vectors per layer (bias_ih, bias_hh) that are added; MultiheadAttention.in_proj_weight
  is query, key and value stacked along the output axis, (3*dim, dim).
- ONNX (operator reference, opset 14+): Conv W (M, C/group, *k) = out_in; ConvTranspose W
  (C, M/group, *k), torch's layout; Gemm B (K, N) = in_out, or (N, K) = out_in with transB=1;
  MatMul with a weight initializer as B: (K, N) = in_out; LSTM W (dirs, 4*hidden, input) with
  gates in the order input, output, forget, cell ("iofc"), R likewise, B (dirs, 8*hidden) the
  concatenation of the input and recurrent biases; GRU gates update, reset, candidate ("zrh"),
  B likewise (dirs, 6*hidden).
- Keras (layer reference, [from memory]): Dense kernel (in, out) = in_out; ConvND kernel
  (*k, in/groups, out) = in_out; LSTM kernel (in, 4*units), gates input, forget, cell, output;
  GRU kernel (in, 3*units), gates update, reset, candidate.
- Flax linen ([from memory]): Dense kernel (in, out) = in_out; Conv kernel
  (*k, in/groups, out) = in_out; Embed embedding (vocab, dim); recurrent cells keep one kernel
  per gate (use `split_gates` on the served stack).
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

__all__ = [
    "FRAMEWORK_GATE_ORDERS",
    "SEEDBED_GATE_ORDERS",
    "FusedTensor",
    "change_layout",
    "join_gates",
    "layout_axes",
    "regate",
    "split_gates",
    "split_parts",
    "transposed_conv_from_in_first",
    "transposed_conv_to_in_first",
    "two_bias_split",
]

# The default stacking of the service (the request's gate_order when it is omitted).
SEEDBED_GATE_ORDERS: Mapping[str, tuple[str, ...]] = {
    "simple": ("candidate",),
    "lstm": ("input", "forget", "cell", "output"),
    "gru": ("reset", "update", "candidate"),
}

# Gate order of each framework's fused recurrent weights, in seedbed's gate names
# (lstm: input, forget, cell, output; gru: reset, update, candidate). Sources in the module
# docstring.
FRAMEWORK_GATE_ORDERS: Mapping[str, Mapping[str, tuple[str, ...]]] = {
    "torch": {
        "simple": ("candidate",),
        "lstm": ("input", "forget", "cell", "output"),
        "gru": ("reset", "update", "candidate"),
    },
    "onnx": {
        "simple": ("candidate",),
        "lstm": ("input", "output", "forget", "cell"),
        "gru": ("update", "reset", "candidate"),
    },
    "keras": {
        "simple": ("candidate",),
        "lstm": ("input", "forget", "cell", "output"),
        "gru": ("update", "reset", "candidate"),
    },
}

_KINDS = ("dense", "conv", "recurrent", "attention", "embedding", "norm")
_LAYOUTS = ("out_in", "in_out")


def _check_order(order: Sequence[str], other: Sequence[str]) -> None:
    if sorted(order) != sorted(other) or len(set(order)) != len(order):
        raise ValueError(
            f"gate orders must name the same gates once each; got {list(order)} and {list(other)}"
        )


def split_gates(array: np.ndarray, order: Sequence[str], axis: int = 0) -> dict[str, np.ndarray]:
    """The gate blocks of a stacked recurrent tensor, keyed by gate name.

    `order` is the order in which the blocks are stacked along `axis` (the output axis: 0 in
    out_in, -1 in in_out); the axis must divide into len(order) equal blocks.
    """
    size = array.shape[axis]
    if size % len(order):
        raise ValueError(
            f"axis {axis} of length {size} does not split into {len(order)} gate blocks"
        )
    return dict(zip(order, np.split(array, len(order), axis=axis), strict=True))


def join_gates(blocks: Mapping[str, np.ndarray], order: Sequence[str], axis: int = 0) -> np.ndarray:
    """Gate blocks stacked along `axis` in `order` (the inverse of `split_gates`)."""
    _check_order(order, list(blocks))
    return np.concatenate([blocks[g] for g in order], axis=axis)


def regate(
    array: np.ndarray, source: Sequence[str], target: Sequence[str], axis: int = 0
) -> np.ndarray:
    """A stacked recurrent tensor with its gate blocks moved from order `source` to `target`.

    Example: seedbed's default lstm stack (input, forget, cell, output) into ONNX's iofc order:
    `regate(w, SEEDBED_GATE_ORDERS["lstm"], FRAMEWORK_GATE_ORDERS["onnx"]["lstm"])`. Asking
    the service for the framework's order (`gate_order` in the request) makes this a no-op.
    """
    _check_order(source, target)
    if tuple(source) == tuple(target):
        return array
    return join_gates(split_gates(array, source, axis), target, axis)


def layout_axes(kind: str, ndim: int) -> tuple[int, ...]:
    """The axis permutation that takes a tensor from out_in to in_out (and, being its own
    inverse for 1-D and 2-D tensors, back; use `change_layout` for conv kernels)."""
    if kind not in _KINDS:
        raise ValueError(f"unknown layer kind {kind!r}; allowed: {', '.join(_KINDS)}")
    if ndim <= 1 or kind in ("embedding", "norm"):
        return tuple(range(ndim))
    if kind == "conv":
        # (out, in/g, *k) -> (*k, in/g, out)
        return (*range(2, ndim), 1, 0)
    return (1, 0)


def change_layout(array: np.ndarray, kind: str, source: str, target: str) -> np.ndarray:
    """`array` (one tensor of a layer of `kind`) rearranged from layout `source` to `target`
    (out_in or in_out); the result is C-contiguous."""
    for layout in (source, target):
        if layout not in _LAYOUTS:
            raise ValueError(f"unknown layout {layout!r}; allowed: out_in, in_out")
    if source == target:
        return array
    axes = layout_axes(kind, array.ndim)
    if source == "in_out":  # invert the permutation
        axes = tuple(int(a) for a in np.argsort(axes))
    return np.ascontiguousarray(np.transpose(array, axes))


def transposed_conv_to_in_first(served: np.ndarray, groups: int) -> np.ndarray:
    """A transposed conv kernel from seedbed's (out, in/groups, *k) to the (in, out/groups, *k)
    layout PyTorch's ConvTransposeNd.weight and ONNX's ConvTranspose W use.

    Per group g the served block (out/groups, in/groups, *k) is transposed in its first two
    axes; the groups are then stacked along the input axis, as those frameworks expect.
    """
    out_ch, in_per, *kernel = served.shape
    if out_ch % groups:
        raise ValueError(f"{out_ch} output channels do not split into {groups} groups")
    blocks = served.reshape(groups, out_ch // groups, in_per, *kernel)
    swapped = np.swapaxes(blocks, 1, 2)
    return np.ascontiguousarray(swapped.reshape(groups * in_per, out_ch // groups, *kernel))


def transposed_conv_from_in_first(stored: np.ndarray, groups: int) -> np.ndarray:
    """The inverse of `transposed_conv_to_in_first`: (in, out/groups, *k) -> (out, in/g, *k)."""
    in_ch, out_per, *kernel = stored.shape
    if in_ch % groups:
        raise ValueError(f"{in_ch} input channels do not split into {groups} groups")
    blocks = stored.reshape(groups, in_ch // groups, out_per, *kernel)
    swapped = np.swapaxes(blocks, 1, 2)
    return np.ascontiguousarray(swapped.reshape(groups * out_per, in_ch // groups, *kernel))


@dataclass(frozen=True)
class FusedTensor:
    """A framework tensor that is the concatenation of independently keyed seedbed tensors.

    Each part is generated from its own stream (its own tensor name), so each slice of the
    fused tensor is byte for byte what the unfused layout gets: PyTorch's in_proj_weight is
    `FusedTensor("attn.in_proj_weight", ("attn.query.weight", "attn.key.weight",
    "attn.value.weight"), axis=0)`. A part named in `zero_parts` is all zeros of the shape of
    the part before it (ONNX's recurrent half of B when the service serves one bias).
    """

    name: str
    parts: tuple[str, ...]
    axis: int = 0
    zero_parts: tuple[str, ...] = ()

    def assemble(self, arrays: Mapping[str, np.ndarray]) -> np.ndarray:
        """The fused tensor from the served parts (`arrays` maps part name -> array)."""
        pieces: list[np.ndarray] = []
        for part in self.parts:
            if part in self.zero_parts:
                if not pieces:
                    raise ValueError(f"{self.name}: a zero part cannot come first")
                pieces.append(np.zeros_like(pieces[-1]))
                continue
            if part not in arrays:
                raise KeyError(f"{self.name}: part {part!r} is missing from the served arrays")
            pieces.append(arrays[part])
        if len(pieces) == 1:
            return np.ascontiguousarray(pieces[0])
        return np.ascontiguousarray(np.concatenate(pieces, axis=self.axis))


def split_parts(array: np.ndarray, count: int, axis: int = 0) -> list[np.ndarray]:
    """A fused tensor cut back into `count` equal parts along `axis` (the inverse of
    `FusedTensor.assemble` when the parts have equal size)."""
    if array.shape[axis] % count:
        raise ValueError(f"axis {axis} of length {array.shape[axis]} does not split into {count}")
    return list(np.split(array, count, axis=axis))


def two_bias_split(served_bias: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """seedbed's single recurrent bias as the (input, recurrent) pair that PyTorch and ONNX add.

    The served bias goes to the input side and the recurrent side is zero, so their sum is the
    served bias exactly. For a GRU candidate this puts the bias outside the reset gate's
    product (PyTorch's cell, ONNX linear_before_reset=1), which is the single-bias reading of
    the cell.
    """
    return served_bias, np.zeros_like(served_bias)
