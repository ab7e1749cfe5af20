"""Which tensors each layer has, their names, and their shapes in both layouts.

Every tensor has a *logical* shape, the order in which its values are generated, with the
output axis first, and a *served* shape, the order in which they are delivered:
``served = logical.transpose(served_axes)``. The numbers are the same in both layouts; only
their arrangement differs.

    kind        tensor                        logical shape               in_out served shape
    dense       <l>.weight                    (n_out, n_in)               (n_in, n_out)
                <l>.bias                      (n_out,)                    unchanged
    conv        <l>.weight                    (c_out, c_in/g, *kernel)    (*kernel, c_in/g, c_out)
                <l>.bias                      (c_out,)                    unchanged
    embedding   <l>.weight                    (vocab, dim)                (vocab, dim) unchanged
    recurrent   <l>.input_weight              (G*hidden, n_in)            (n_in, G*hidden)
                <l>.recurrent_weight          (G*hidden, hidden)          (hidden, G*hidden)
                <l>.bias                      (G*hidden,)                 unchanged
    attention   <l>.{query,key,value,output}.weight  (dim, dim)           transposed
                <l>.{query,key,value,output}.bias    (dim,)               unchanged
    norm        <l>.scale, <l>.shift          (dim,)                      unchanged

Notes:
- Transposed convs use the same (c_out, c_in/g, *kernel) logical layout as regular ones: the
  product design fixes one layout for every conv, whichever direction it runs. (Some
  frameworks store transposed kernels as (c_in, c_out/g, *kernel); callers porting to them
  rearrange.)
- An embedding is (vocab, dim) in both layouts: its rows are looked up by token id, so the
  row axis must stay the token axis whatever the layout of the matrix-multiplying layers.
- Recurrent layers stack their G gate blocks (simple 1, lstm 4, gru 3) along the output axis,
  in the caller's `gate_order`; there is one bias per gate unit.
- Attention projections are dense maps from dim to dim; in_out transposes them like dense
  weights even though the shape does not change.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass
from math import prod

from seedbed.core.request.layers import (
    AnyLayer,
    AttentionLayer,
    ConvLayer,
    DenseLayer,
    EmbeddingLayer,
    NormLayer,
    RecurrentLayer,
)
from seedbed.core.request.names import layer_name_problems
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.problems import Problem, RequestRejected
from seedbed.core.request.vocabulary import GATES, Layout
from seedbed_client import wire_facts

__all__ = [
    "ATTENTION_PROJECTIONS",
    "TensorSlot",
    "request_slots",
    "slots_by_layer",
    "tensor_name_problems",
    "tensor_slots",
]

ATTENTION_PROJECTIONS: tuple[str, ...] = wire_facts.ATTENTION_PROJECTIONS


@dataclass(frozen=True)
class TensorSlot:
    """One tensor of one layer: its name, its role in the layer and its shapes."""

    tensor: str  # "<layer>.weight", "<layer>.query.bias", ...
    layer: str
    layer_kind: str
    part: str  # the tensor name after "<layer>.": weight, bias, input_weight, query.weight ...
    logical_shape: tuple[int, ...]  # generation order, output axis first
    served_shape: tuple[int, ...]  # as delivered in the request's layout
    served_axes: tuple[int, ...]  # served = logical.transpose(served_axes)
    gate_blocks: int = 1  # recurrent: gate blocks stacked along the logical output axis
    is_bias: bool = False  # bias vectors and a norm's shift
    gate_names: tuple[str, ...] = ()  # recurrent lstm/gru: the blocks' gates, in stacking order

    @property
    def count(self) -> int:
        return prod(self.logical_shape)


def _slot(
    layer: AnyLayer,
    part: str,
    logical: tuple[int, ...],
    axes: tuple[int, ...] | None = None,
    *,
    is_bias: bool = False,
    gates: tuple[str, ...] = (),
) -> TensorSlot:
    served_axes = axes if axes is not None else tuple(range(len(logical)))
    return TensorSlot(
        tensor=f"{layer.name}.{part}",
        layer=layer.name,
        layer_kind=layer.kind,
        part=part,
        logical_shape=logical,
        served_shape=tuple(logical[a] for a in served_axes),
        served_axes=served_axes,
        gate_blocks=max(len(gates), 1),
        is_bias=is_bias,
        gate_names=gates,
    )


def tensor_slots(layer: AnyLayer, layout: Layout) -> list[TensorSlot]:
    """The tensors of one validated layer, in a fixed order (weights before their biases)."""
    flip = layout == "in_out"
    swap = (1, 0) if flip else None
    if isinstance(layer, DenseLayer):
        slots = [_slot(layer, "weight", (layer.n_out, layer.n_in), swap)]
        if layer.bias:
            slots.append(_slot(layer, "bias", (layer.n_out,), is_bias=True))
        return slots
    if isinstance(layer, ConvLayer):
        kernel = tuple(layer.kernel)
        logical = (layer.channels_out, layer.channels_in // layer.groups, *kernel)
        spatial = tuple(range(2, 2 + len(kernel)))
        slots = [_slot(layer, "weight", logical, (*spatial, 1, 0) if flip else None)]
        if layer.bias:
            slots.append(_slot(layer, "bias", (layer.channels_out,), is_bias=True))
        return slots
    if isinstance(layer, EmbeddingLayer):
        return [_slot(layer, "weight", (layer.vocab, layer.dim))]
    if isinstance(layer, RecurrentLayer):
        gates = tuple(layer.gate_order) if layer.gate_order is not None else GATES[layer.cell]
        rows = len(gates) * layer.hidden
        named = gates if layer.cell != "simple" else ()
        slots = [
            _slot(layer, "input_weight", (rows, layer.n_in), swap, gates=named),
            _slot(layer, "recurrent_weight", (rows, layer.hidden), swap, gates=named),
        ]
        if layer.bias:
            slots.append(_slot(layer, "bias", (rows,), is_bias=True, gates=named))
        return slots
    if isinstance(layer, AttentionLayer):
        slots = []
        for proj in ATTENTION_PROJECTIONS:
            slots.append(_slot(layer, f"{proj}.weight", (layer.dim, layer.dim), swap))
            if layer.bias:
                slots.append(_slot(layer, f"{proj}.bias", (layer.dim,), is_bias=True))
        return slots
    if isinstance(layer, NormLayer):
        slots = [_slot(layer, "scale", (layer.dim,))]
        if layer.bias:
            slots.append(_slot(layer, "shift", (layer.dim,), is_bias=True))
        return slots
    raise TypeError(f"not a layer model: {type(layer).__name__}")


def tensor_name_problems(
    request: NetworkRequest, slots: Sequence[Sequence[TensorSlot]] | None = None
) -> list[Problem]:
    """Tensor names claimed by two different layers (e.g. dense "a.query" next to attention "a").

    `slots` may pass `slots_by_layer(request)` when the caller has it already. Layers with the
    same name are reported by the layer-name check, not again here.
    """
    per_layer = slots if slots is not None else slots_by_layer(request)
    owner: dict[str, int] = {}
    problems: list[Problem] = []
    for i, layer in enumerate(request.layers):
        for slot in per_layer[i]:
            j = owner.setdefault(slot.tensor, i)
            if j != i and request.layers[j].name != layer.name:
                other = request.layers[j]
                problems.append(
                    Problem(
                        f"layers[{i}].name",
                        "duplicate_name",
                        f"tensor name {slot.tensor!r} of layers[{i}] ({layer.kind} "
                        f"{layer.name!r}) is also a tensor of layers[{j}] ({other.kind} "
                        f"{other.name!r}, field layers[{j}].name); rename one of the two layers",
                    )
                )
    return problems


def request_slots(request: NetworkRequest) -> list[TensorSlot]:
    """Every tensor of the request in layer order; raises RequestRejected on name clashes."""
    problems = layer_name_problems(request) + tensor_name_problems(request)
    if problems:
        raise RequestRejected(problems)
    out: list[TensorSlot] = []
    for layer in request.layers:
        out.extend(tensor_slots(layer, request.layout))
    return out


def slots_by_layer(request: NetworkRequest) -> list[list[TensorSlot]]:
    """The tensors of each layer, aligned with `request.layers`."""
    return [tensor_slots(layer, request.layout) for layer in request.layers]
