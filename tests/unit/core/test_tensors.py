"""Tensor names and shapes of every layer kind, in both layouts.

Reference for the out_in shapes: PyTorch's CPU parameters (common practice: weights stored as
(out, in/groups, *kernel), recurrent gates stacked along dim 0), used as an oracle through
`require_oracle("torch")`. Reference for in_out: the arrangement docs/architecture.md states (dense
(n_in, n_out), conv (*kernel, in/groups, out)), checked element by element with numpy.
"""

from __future__ import annotations

from math import prod
from typing import Any

import numpy as np
import pytest

from conftest import require_oracle
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parse import parse
from seedbed.core.request.problems import RequestRejected
from seedbed.core.tensors import TensorSlot, request_slots, tensor_name_problems, tensor_slots


def one_layer(layer: dict[str, Any], layout: str = "out_in") -> list[TensorSlot]:
    r = parse({"seed": 1, "layout": layout, "layers": [layer]}).request
    return tensor_slots(r.layers[0], r.layout)


def shapes(slots: list[TensorSlot]) -> dict[str, tuple[int, ...]]:
    return {s.tensor: s.served_shape for s in slots}


DENSE = {"name": "fc", "kind": "dense", "n_in": 7, "n_out": 5}
CONV1 = {"name": "c1", "kind": "conv", "channels_in": 6, "channels_out": 8, "kernel": [3],
         "groups": 2}  # fmt: skip
CONV2 = {"name": "c2", "kind": "conv", "channels_in": 4, "channels_out": 6, "kernel": [3, 5],
         "groups": 2, "stride": [2, 1]}  # fmt: skip
CONV3 = {"name": "c3", "kind": "conv", "channels_in": 3, "channels_out": 9,
         "kernel": [1, 2, 3], "groups": 3}  # fmt: skip
DEPTHWISE = {"name": "dw", "kind": "conv", "channels_in": 8, "channels_out": 8, "kernel": [3, 3],
             "groups": 8}  # fmt: skip
EMBED = {"name": "tok", "kind": "embedding", "vocab": 11, "dim": 4}
ATTN = {"name": "att", "kind": "attention", "dim": 8, "heads": 2}
NORM = {"name": "ln", "kind": "norm", "dim": 6}


def recurrent(cell: str, **extra: Any) -> dict[str, Any]:
    return {"name": "rnn", "kind": "recurrent", "cell": cell, "n_in": 5, "hidden": 7, **extra}


# ---------------------------------------------------------------------------------------------
# Names, parts and flags


def test_names_and_parts_of_every_kind() -> None:
    assert [(s.tensor, s.part, s.is_bias) for s in one_layer(DENSE)] == [
        ("fc.weight", "weight", False), ("fc.bias", "bias", True)]  # fmt: skip
    assert [s.tensor for s in one_layer(CONV2)] == ["c2.weight", "c2.bias"]
    assert [s.tensor for s in one_layer(EMBED)] == ["tok.weight"]
    assert [(s.tensor, s.is_bias) for s in one_layer(recurrent("lstm"))] == [
        ("rnn.input_weight", False),
        ("rnn.recurrent_weight", False),
        ("rnn.bias", True),
    ]
    assert [s.tensor for s in one_layer(ATTN)] == [
        "att.query.weight",
        "att.query.bias",
        "att.key.weight",
        "att.key.bias",
        "att.value.weight",
        "att.value.bias",
        "att.output.weight",
        "att.output.bias",
    ]
    assert [(s.tensor, s.part, s.is_bias) for s in one_layer(NORM)] == [
        ("ln.scale", "scale", False), ("ln.shift", "shift", True)]  # fmt: skip
    assert all(s.layer_kind == "attention" and s.layer == "att" for s in one_layer(ATTN))


def test_bias_false_drops_bias_tensors() -> None:
    assert [s.tensor for s in one_layer({**DENSE, "bias": False})] == ["fc.weight"]
    assert [s.tensor for s in one_layer({**CONV1, "bias": False})] == ["c1.weight"]
    assert [s.tensor for s in one_layer(recurrent("gru", bias=False))] == [
        "rnn.input_weight", "rnn.recurrent_weight"]  # fmt: skip
    assert [s.tensor for s in one_layer({**ATTN, "bias": False})] == [
        "att.query.weight",
        "att.key.weight",
        "att.value.weight",
        "att.output.weight",
    ]
    assert [s.tensor for s in one_layer({**NORM, "bias": False})] == ["ln.scale"]


def test_gate_blocks_follow_the_callers_gate_order() -> None:
    order = ["forget", "input", "output", "cell"]
    slots = one_layer(recurrent("lstm", gate_order=order))
    assert all(s.gate_blocks == 4 and s.gate_names == tuple(order) for s in slots)
    gru = one_layer(recurrent("gru"))
    assert all(s.gate_blocks == 3 and s.gate_names == ("reset", "update", "candidate")
               for s in gru)  # fmt: skip
    simple = one_layer(recurrent("simple"))
    assert all(s.gate_blocks == 1 and s.gate_names == () for s in simple)
    assert all(s.gate_blocks == 1 for s in one_layer(DENSE) + one_layer(ATTN))


# ---------------------------------------------------------------------------------------------
# out_in shapes against PyTorch's parameters (oracle)


def test_out_in_shapes_match_torch_parameters() -> None:
    torch = require_oracle("torch")
    nn = torch.nn
    meta = {"device": "meta"}  # shapes only: no memory, no random draws

    lin = nn.Linear(7, 5, **meta)
    assert shapes(one_layer(DENSE)) == {"fc.weight": tuple(lin.weight.shape),
                                        "fc.bias": tuple(lin.bias.shape)}  # fmt: skip

    for spec_layer, module in (
        (CONV1, nn.Conv1d(6, 8, 3, groups=2, **meta)),
        (CONV2, nn.Conv2d(4, 6, (3, 5), stride=(2, 1), groups=2, **meta)),
        (CONV3, nn.Conv3d(3, 9, (1, 2, 3), groups=3, **meta)),
        (DEPTHWISE, nn.Conv2d(8, 8, 3, groups=8, **meta)),
    ):
        name = spec_layer["name"]
        assert shapes(one_layer(spec_layer)) == {
            f"{name}.weight": tuple(module.weight.shape),
            f"{name}.bias": tuple(module.bias.shape),
        }

    emb = nn.Embedding(11, 4, **meta)
    assert shapes(one_layer(EMBED)) == {"tok.weight": tuple(emb.weight.shape)}

    for cell, module in (
        ("simple", nn.RNN(5, 7, **meta)),
        ("lstm", nn.LSTM(5, 7, **meta)),
        ("gru", nn.GRU(5, 7, **meta)),
    ):
        # torch keeps two bias vectors per layer (input and hidden side) of the same shape;
        # seedbed has one, shaped like either.
        assert shapes(one_layer(recurrent(cell))) == {
            "rnn.input_weight": tuple(module.weight_ih_l0.shape),
            "rnn.recurrent_weight": tuple(module.weight_hh_l0.shape),
            "rnn.bias": tuple(module.bias_ih_l0.shape),
        }
        assert module.bias_hh_l0.shape == module.bias_ih_l0.shape

    mha = nn.MultiheadAttention(8, 2, **meta)
    # torch packs query, key and value into one (3*dim, dim) matrix: three (dim, dim) blocks.
    q, k, v = mha.in_proj_weight.chunk(3, dim=0)
    qb, kb, vb = mha.in_proj_bias.chunk(3, dim=0)
    assert shapes(one_layer(ATTN)) == {
        "att.query.weight": tuple(q.shape), "att.query.bias": tuple(qb.shape),
        "att.key.weight": tuple(k.shape), "att.key.bias": tuple(kb.shape),
        "att.value.weight": tuple(v.shape), "att.value.bias": tuple(vb.shape),
        "att.output.weight": tuple(mha.out_proj.weight.shape),
        "att.output.bias": tuple(mha.out_proj.bias.shape),
    }  # fmt: skip

    ln = nn.LayerNorm(6, **meta)
    assert shapes(one_layer(NORM)) == {"ln.scale": tuple(ln.weight.shape),
                                       "ln.shift": tuple(ln.bias.shape)}  # fmt: skip


def test_transposed_conv_keeps_the_regular_layout_unlike_torch() -> None:
    # The product fixes (c_out, c_in/groups, *kernel) for every conv. torch stores transposed
    # kernels as (c_in, c_out/groups, *kernel): with groups=1 the two differ by swapping the
    # first two axes, which is what a caller porting to torch must do.
    torch = require_oracle("torch")
    layer = {"name": "up", "kind": "conv", "channels_in": 4, "channels_out": 6,
             "kernel": [3, 5], "transposed": True}  # fmt: skip
    (weight, _) = one_layer(layer)
    assert weight.logical_shape == (6, 4, 3, 5)
    module = torch.nn.ConvTranspose2d(4, 6, (3, 5), device="meta")
    swapped = (weight.logical_shape[1], weight.logical_shape[0], *weight.logical_shape[2:])
    assert tuple(module.weight.shape) == swapped
    grouped = one_layer({**layer, "groups": 2})[0]
    assert grouped.logical_shape == (6, 2, 3, 5)


# ---------------------------------------------------------------------------------------------
# in_out: the stated transpose, element by element


def _values(slot: TensorSlot) -> tuple[np.ndarray, np.ndarray]:
    logical = np.arange(prod(slot.logical_shape)).reshape(slot.logical_shape)
    return logical, logical.transpose(slot.served_axes)


def test_in_out_dense_recurrent_and_attention_weights_are_plain_transposes() -> None:
    layers = [DENSE, recurrent("lstm"), recurrent("simple"), ATTN]
    for layer in layers:
        out_in = one_layer(layer, "out_in")
        in_out = one_layer(layer, "in_out")
        assert [s.tensor for s in out_in] == [s.tensor for s in in_out]
        for a, b in zip(out_in, in_out, strict=True):
            assert a.logical_shape == b.logical_shape  # same values, generated the same way
            logical, served = _values(b)
            if len(a.logical_shape) == 2:
                assert b.served_shape == a.served_shape[::-1]
                np.testing.assert_array_equal(served, logical.T)
            else:
                assert b.served_shape == a.served_shape and b.served_axes == (0,)
    named = shapes(one_layer(DENSE, "in_out"))
    assert named == {"fc.weight": (7, 5), "fc.bias": (5,)}  # (n_in, n_out) per docs/architecture.md
    rec = shapes(one_layer(recurrent("gru"), "in_out"))
    assert rec == {"rnn.input_weight": (5, 21), "rnn.recurrent_weight": (7, 21), "rnn.bias": (21,)}


@pytest.mark.parametrize("layer", [CONV1, CONV2, CONV3, DEPTHWISE], ids=lambda d: d["name"])
def test_in_out_conv_is_kernel_then_in_then_out(layer: dict[str, Any]) -> None:
    (a, a_bias) = one_layer(layer, "out_in")
    (b, b_bias) = one_layer(layer, "in_out")
    kernel = tuple(layer["kernel"])
    c_in_g = layer["channels_in"] // layer["groups"]
    assert a.served_shape == a.logical_shape == b.logical_shape
    assert b.served_shape == (*kernel, c_in_g, layer["channels_out"])  # docs/architecture.md
    logical, served = _values(b)
    # Independent construction: move the output axis last and the input axis before it.
    expected = np.moveaxis(logical, (0, 1), (-1, -2))
    np.testing.assert_array_equal(served, expected)
    assert a_bias.served_shape == b_bias.served_shape == (layer["channels_out"],)


def test_embedding_and_norm_do_not_change_with_layout() -> None:
    for layer in (EMBED, NORM):
        assert one_layer(layer, "in_out") == one_layer(layer, "out_in")
    (emb,) = one_layer(EMBED, "in_out")
    assert emb.served_shape == (11, 4) and emb.served_axes == (0, 1)


# ---------------------------------------------------------------------------------------------
# Request-level enumeration and name clashes


def test_request_slots_in_layer_order_independent_of_neighbours() -> None:
    body = {"seed": 3, "layers": [EMBED, ATTN, NORM, DENSE], "widths": "unchecked"}
    r = parse(body).request
    slots = request_slots(r)
    assert [s.layer for s in slots] == ["tok"] + ["att"] * 8 + ["ln", "ln", "fc", "fc"]
    alone = parse({"seed": 3, "layers": [DENSE]}).request
    assert request_slots(alone) == [s for s in slots if s.layer == "fc"]


def test_tensor_name_clash_between_layers_is_refused_naming_both() -> None:
    body = {"seed": 1, "layers": [ATTN, {**DENSE, "name": "att.key", "n_in": 8, "n_out": 8,
                                         "bias": False}]}  # fmt: skip
    with pytest.raises(RequestRejected) as info:
        parse(body)
    (p,) = info.value.problems
    assert (p.field, p.code) == ("layers[1].name", "duplicate_name")
    assert "'att.key.weight'" in p.message and "layers[0].name" in p.message


def test_norm_and_dense_names_can_coexist_when_tensors_differ() -> None:
    # Norm "x" owns the tensor "x.scale"; a dense layer named "x.scale" owns "x.scale.weight"
    # and "x.scale.bias". No tensor name is shared, so this is fine: the check compares whole
    # tensor names, not prefixes.
    body = {
        "seed": 1,
        "layers": [{**NORM, "name": "x"}, {**DENSE, "name": "x.scale"}],
        "widths": "unchecked",
    }
    parse(body)


def test_request_slots_refuse_unchecked_requests_with_clashes() -> None:
    # A request built without parse may carry duplicates; enumeration still refuses.
    r = NetworkRequest.model_validate({"seed": 1, "layers": [DENSE, DENSE]})
    with pytest.raises(RequestRejected) as info:
        request_slots(r)
    assert [p.code for p in info.value.problems] == ["duplicate_name"]
    clash = NetworkRequest.model_validate(
        {"seed": 1, "layers": [ATTN, {**DENSE, "name": "att.value", "n_in": 8, "n_out": 8}]}
    )
    assert len(tensor_name_problems(clash)) == 2  # att.value.weight and att.value.bias
