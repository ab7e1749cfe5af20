"""What each initializer layout means, checked by running the seeded model on onnxruntime.

For every operator a one-node graph is seeded, then run; the output is compared with the same
computation written in numpy (or torch CPU) from the seedbed tensors of POST /v1/weights in
seedbed's own layout (out_in, gate blocks in seedbed's default order). A wrong transpose, gate
order or direction would give a different output, so these pin the layouts to the operator
specification (https://onnx.ai/onnx/operators/, operator and opset beside each test).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
import pytest
from fastapi.testclient import TestClient
from onnx import TensorProto, helper, numpy_helper

from conftest import require_oracle

from .onnx_helpers import post_model, seedbed_weights


def _model(
    nodes: list[Any], inputs: list[Any], output: Any, inits: list[Any], opset: int = 17
) -> bytes:
    graph = helper.make_graph(nodes, "one_op", inputs, [output], inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


def _zeros(name: str, *shape: int) -> TensorProto:
    return numpy_helper.from_array(np.zeros(shape, dtype=np.float32), name)


def _io(name: str, *shape: int, dtype: int = TensorProto.FLOAT) -> Any:
    return helper.make_tensor_value_info(name, dtype, list(shape))


def _seed_and_run(
    http: TestClient,
    model: bytes,
    feeds: dict[str, np.ndarray],
) -> tuple[dict[str, np.ndarray], np.ndarray, dict[str, Any]]:
    """(seedbed tensors for the inferred request, the seeded model's first output, review)."""
    ort = require_oracle("onnxruntime")
    review = post_model(http, "plan", model)
    assert review.status_code == 200, review.text
    doc = review.json()
    seeded = post_model(http, "model", model)
    assert seeded.status_code == 200, seeded.text
    session = ort.InferenceSession(seeded.content, providers=["CPUExecutionProvider"])
    out = session.run(None, feeds)[0]
    return seedbed_weights(http, doc["request"]), np.asarray(out, dtype=np.float64), doc


X = np.linspace(-1.5, 2.0, 2 * 6, dtype=np.float32).reshape(2, 6)


@pytest.mark.parametrize("trans_b", [0, 1])
def test_gemm_both_trans_b(http: TestClient, trans_b: int) -> None:
    # Gemm (opset 13): Y = A B' + C, B' = B^T when transB = 1, so B is (N, K) then, else (K, N).
    b_shape = (4, 6) if trans_b else (6, 4)
    model = _model(
        [helper.make_node("Gemm", ["x", "B", "C"], ["y"], "lens", transB=trans_b)],
        [_io("x", 2, 6)],
        _io("y", 2, 4),
        [_zeros("B", *b_shape), _zeros("C", 4)],
    )
    ours, y, _ = _seed_and_run(http, model, {"x": X})
    want = X.astype(np.float64) @ ours["lens.weight"].T.astype(np.float64) + ours["lens.bias"]
    np.testing.assert_allclose(y, want, rtol=1e-5, atol=1e-6)


def test_matmul_add(http: TestClient) -> None:
    # MatMul (opset 13) is numpy.matmul: x @ W with W (n_in, n_out); Add (opset 14) broadcasts b.
    model = _model(
        [
            helper.make_node("MatMul", ["x", "W"], ["h"], "sieve"),
            helper.make_node("Add", ["h", "b"], ["y"]),
        ],
        [_io("x", 2, 6)],
        _io("y", 2, 3),
        [_zeros("W", 6, 3), _zeros("b", 3)],
    )
    ours, y, doc = _seed_and_run(http, model, {"x": X})
    want = X.astype(np.float64) @ ours["sieve.weight"].T.astype(np.float64) + ours["sieve.bias"]
    np.testing.assert_allclose(y, want, rtol=1e-5, atol=1e-6)
    assert doc["request"]["layers"][0]["bias"] is True


def test_conv_group_stride_dilation(http: TestClient) -> None:
    # Conv (opset 11): W is (M, C/group, kH, kW); oracle: torch CPU's conv2d, whose weight is
    # (out, in/groups, kH, kW) too (common practice).
    torch = require_oracle("torch")
    model = _model(
        [
            helper.make_node(
                "Conv", ["x", "W", "B"], ["y"], "lattice", group=2, strides=[2, 1], dilations=[1, 2]
            )
        ],
        [_io("x", 1, 4, 9, 9)],
        _io("y", 1, 6, 4, 5),
        [_zeros("W", 6, 2, 3, 3), _zeros("B", 6)],
    )
    x = np.sin(np.arange(324, dtype=np.float32)).reshape(1, 4, 9, 9)
    ours, y, doc = _seed_and_run(http, model, {"x": x})
    want = torch.nn.functional.conv2d(
        torch.from_numpy(x),
        torch.from_numpy(ours["lattice.weight"]),
        torch.from_numpy(ours["lattice.bias"]),
        stride=(2, 1),
        dilation=(1, 2),
        groups=2,
    )
    np.testing.assert_allclose(y, want.numpy(), rtol=1e-5, atol=1e-5)
    layer = doc["request"]["layers"][0]
    assert (layer["channels_in"], layer["groups"], layer["stride"]) == (4, 2, [2, 1])


def test_conv_transpose_groups(http: TestClient) -> None:
    # ConvTranspose (opset 11): W is (C, M/group, kH, kW): input channels first. The numpy
    # reference is the definition: each input pixel scatters kernel-weighted copies into the
    # output of the channels of its group, at stride spacing.
    model = _model(
        [
            helper.make_node(
                "ConvTranspose", ["x", "W", "B"], ["y"], "bloom", group=2, strides=[2, 2]
            )
        ],
        [_io("x", 1, 4, 3, 3)],
        _io("y", 1, 6, 7, 7),
        [_zeros("W", 4, 3, 3, 3), _zeros("B", 6)],
    )
    x = np.cos(np.arange(36, dtype=np.float32)).reshape(1, 4, 3, 3)
    ours, y, _ = _seed_and_run(http, model, {"x": x})
    w = ours["bloom.weight"].astype(np.float64)  # seedbed: (c_out, c_in/groups, kH, kW)
    want = np.zeros((1, 6, 7, 7)) + ours["bloom.bias"][None, :, None, None]
    for o in range(6):
        group = o // 3
        for c_local in range(2):
            c = group * 2 + c_local
            for i in range(3):
                for j in range(3):
                    want[0, o, 2 * i : 2 * i + 3, 2 * j : 2 * j + 3] += (
                        x[0, c, i, j] * w[o, c_local]
                    )
    np.testing.assert_allclose(y, want, rtol=1e-5, atol=1e-5)


def test_gather_embedding(http: TestClient) -> None:
    # Gather (opset 13), axis 0: output[k] = data[indices[k]].
    model = _model(
        [helper.make_node("Gather", ["table", "ids"], ["y"], "glyphs")],
        [_io("ids", 3, dtype=TensorProto.INT64)],
        _io("y", 3, 5),
        [_zeros("table", 11, 5)],
    )
    ids = np.array([7, 0, 7], dtype=np.int64)
    ours, y, _ = _seed_and_run(http, model, {"ids": ids})
    np.testing.assert_array_equal(y, ours["glyphs.weight"][ids])


def _sigmoid(z: np.ndarray) -> np.ndarray:
    return 1.0 / (1.0 + np.exp(-z))


def test_lstm_gate_order_direction_axis_and_forget_bias(http: TestClient) -> None:
    # LSTM (opset 14): W [dirs, 4H, I] and R [dirs, 4H, H] stack gates [i, o, f, c]; B is
    # [dirs, 8H] = [Wb, Rb]; direction 0 is forward, 1 reverse; Y is [seq, dirs, batch, H].
    # seedbed stacks input, forget, cell, output; the forget bias is 1 (Gers et al. 2000;
    # Jozefowicz et al. 2015).
    h = 3
    model = _model(
        [
            helper.make_node(
                "LSTM",
                ["x", "W", "R", "B"],
                ["y"],
                "tide",
                hidden_size=h,
                direction="bidirectional",
            )
        ],
        [_io("x", 2, 1, 4)],
        _io("y", 2, 2, 1, h),
        [_zeros("W", 2, 4 * h, 4), _zeros("R", 2, 4 * h, h), _zeros("B", 2, 8 * h)],
    )
    x = np.array([[[0.5, -1.0, 0.25, 2.0]], [[-0.3, 0.8, 1.1, -0.6]]], dtype=np.float32)
    ours, y, doc = _seed_and_run(http, model, {"x": x})
    seeded = post_model(http, "model", model)
    stored = {
        t.name: numpy_helper.to_array(t)
        for t in onnx.load_from_string(seeded.content).graph.initializer
    }
    forget_slice = slice(2 * h, 3 * h)  # [i, o, f, c]: the third block
    for d in range(2):
        wb, rb = stored["B"][d, : 4 * h], stored["B"][d, 4 * h :]
        np.testing.assert_array_equal(wb[forget_slice], 1.0)
        np.testing.assert_array_equal(np.delete(wb, forget_slice), 0.0)
        np.testing.assert_array_equal(rb, 0.0)
    for d, name, steps in ((0, "tide.forward", (0, 1)), (1, "tide.reverse", (1, 0))):
        w = ours[f"{name}.input_weight"].astype(np.float64)
        r = ours[f"{name}.recurrent_weight"].astype(np.float64)
        b = ours[f"{name}.bias"].astype(np.float64)
        hs, cs = np.zeros(h), np.zeros(h)
        for t in steps:
            z = w @ x[t, 0] + r @ hs + b
            i, f, g, o = np.split(z, 4)  # seedbed's order
            cs = _sigmoid(f) * cs + _sigmoid(i) * np.tanh(g)
            hs = _sigmoid(o) * np.tanh(cs)
            np.testing.assert_allclose(y[t, d, 0], hs, rtol=1e-5, atol=1e-6)
    assert [row["layer"] for row in doc["inference"]] == [["tide.forward", "tide.reverse"]]


@pytest.mark.parametrize("linear_before_reset", [0, 1])
def test_gru_gate_order(http: TestClient, linear_before_reset: int) -> None:
    # GRU (opset 14), linear_before_reset 0: z = s(Wz x + Rz h + Wbz + Rbz), r likewise,
    # h~ = tanh(Wh x + (r * h) Rh^T + Rbh + Wbh), H = (1 - z) h~ + z h; blocks are [z, r, h].
    h = 4
    model = _model(
        [
            helper.make_node(
                "GRU",
                ["x", "W", "R", "B"],
                ["y"],
                "gust",
                hidden_size=h,
                linear_before_reset=linear_before_reset,
            )
        ],
        [_io("x", 2, 1, 3)],
        _io("y", 2, 1, 1, h),
        [_zeros("W", 1, 3 * h, 3), _zeros("R", 1, 3 * h, h), _zeros("B", 1, 6 * h)],
    )
    x = np.array([[[0.9, -0.4, 0.3]], [[0.1, 0.7, -1.2]]], dtype=np.float32)
    ours, y, _ = _seed_and_run(http, model, {"x": x})
    w = ours["gust.input_weight"].astype(np.float64)
    r = ours["gust.recurrent_weight"].astype(np.float64)
    b = ours["gust.bias"].astype(np.float64)
    hs = np.zeros(h)
    for t in range(2):
        wr, wz, wh = np.split(w @ x[t, 0] + b, 3)  # seedbed's order: reset, update, candidate
        rr, rz, rh = np.split(r, 3)
        z = _sigmoid(wz + rz @ hs)
        reset = _sigmoid(wr + rr @ hs)
        # linear_before_reset 1: h~ = tanh(Wh x + r * (h Rh^T + Rbh) + Wbh); Rbh is zero here
        inner = reset * (rh @ hs) if linear_before_reset else rh @ (reset * hs)
        cand = np.tanh(wh + inner)
        hs = (1 - z) * cand + z * hs
        np.testing.assert_allclose(y[t, 0, 0], hs, rtol=1e-5, atol=1e-6)


def test_rnn_relu(http: TestClient) -> None:
    # RNN (opset 14): H = f(W x + R h + Wb + Rb), W [dirs, H, I], B [dirs, 2H].
    model = _model(
        [
            helper.make_node(
                "RNN", ["x", "W", "R", "B"], ["y"], "drip", hidden_size=3, activations=["Relu"]
            )
        ],
        [_io("x", 2, 1, 2)],
        _io("y", 2, 1, 1, 3),
        [_zeros("W", 1, 3, 2), _zeros("R", 1, 3, 3), _zeros("B", 1, 6)],
    )
    x = np.array([[[1.0, -0.5]], [[0.2, 0.4]]], dtype=np.float32)
    ours, y, doc = _seed_and_run(http, model, {"x": x})
    w, r = ours["drip.input_weight"], ours["drip.recurrent_weight"]
    hs = np.zeros(3)
    for t in range(2):
        hs = np.maximum(w @ x[t, 0] + r @ hs + ours["drip.bias"], 0.0)
        np.testing.assert_allclose(y[t, 0, 0], hs, rtol=1e-5, atol=1e-6)
    assert doc["request"]["layers"][0]["activation"] == "relu"


def test_normalisations(http: TestClient) -> None:
    # LayerNormalization (opset 17): Y = (X - mean) / sqrt(var + eps) * Scale + B over the last
    # axis; BatchNormalization (opset 15) inference: (X - mean) / sqrt(var + eps) * scale + B.
    model = _model(
        [
            helper.make_node(
                "BatchNormalization", ["x", "g", "b", "m", "v"], ["n"], "calm", epsilon=1e-5
            ),
            helper.make_node(
                "LayerNormalization", ["n", "g2", "b2"], ["y"], "even", axis=-1, epsilon=1e-5
            ),
        ],
        [_io("x", 2, 3)],
        _io("y", 2, 3),
        [
            _zeros("g", 3),
            _zeros("b", 3),
            _zeros("m", 3),
            _zeros("v", 3),
            _zeros("g2", 3),
            _zeros("b2", 3),
        ],
    )
    x = np.array([[1.0, 2.0, 4.0], [-1.0, 0.0, 3.0]], dtype=np.float32)
    ours, y, _ = _seed_and_run(http, model, {"x": x})
    assert (ours["calm.scale"] == 1).all() and (ours["calm.shift"] == 0).all()
    n = x / np.sqrt(1.0 + 1e-5)  # fresh statistics: mean 0, variance 1
    want = (n - n.mean(axis=1, keepdims=True)) / np.sqrt(n.var(axis=1, keepdims=True) + 1e-5)
    np.testing.assert_allclose(y, want, rtol=1e-4, atol=1e-5)


@pytest.mark.parametrize(
    ("op", "attrs", "expected", "param"),
    [
        ("Relu", {}, "relu", None),
        ("LeakyRelu", {"alpha": 0.1}, "leaky_relu", 0.1),
        ("Tanh", {}, "tanh", None),
        ("Sigmoid", {}, "sigmoid", None),
        ("Elu", {"alpha": 0.7}, "elu", 0.7),
        ("Selu", {}, "selu", None),
        ("Softplus", {}, "softplus", None),
        ("Gelu", {}, "gelu", None),
        ("HardSigmoid", {}, "hard_sigmoid", 0.2),
        ("HardSwish", {}, "hard_swish", None),
    ],
)
def test_activation_after_a_layer(
    http: TestClient, op: str, attrs: dict[str, Any], expected: str, param: float | None
) -> None:
    opset = 20 if op == "Gelu" else 17  # Gelu is an operator from opset 20
    model = _model(
        [
            helper.make_node("Gemm", ["x", "B"], ["h"], "lens", transB=1),
            helper.make_node(op, ["h"], ["a"], **attrs),
            helper.make_node("Gemm", ["a", "B2"], ["y"], "out", transB=1),
        ],
        [_io("x", 2, 6)],
        _io("y", 2, 2),
        [_zeros("B", 4, 6), _zeros("B2", 2, 4)],
        opset=opset,
    )
    r = post_model(http, "plan", model)
    assert r.status_code == 200, r.text
    first = r.json()["request"]["layers"][0]
    assert first["activation"] == expected
    assert first.get("activation_param") == param
