"""Invented ONNX test networks, built with onnx.helper (zero-filled initializers: the service
fills them). Each builder returns the serialized model bytes."""

from __future__ import annotations

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper

OPSET = 17


def _init(name: str, *shape: int, dtype: type = np.float32) -> TensorProto:
    return numpy_helper.from_array(np.zeros(shape, dtype=dtype), name)


def _const(name: str, value: float) -> TensorProto:
    return numpy_helper.from_array(np.array(value, dtype=np.float32), name)


def _model(nodes: list, inputs: list, outputs: list, inits: list, opset: int = OPSET) -> bytes:
    graph = helper.make_graph(nodes, "invented", inputs, outputs, inits)
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    model.ir_version = 8
    onnx.checker.check_model(model)
    return model.SerializeToString()


def _io(name: str, *shape: int | str) -> onnx.ValueInfoProto:
    return helper.make_tensor_value_info(name, TensorProto.FLOAT, list(shape))


def mlp() -> bytes:
    """A soil-moisture regressor: Gemm (transB 1) -> LeakyRelu, Gemm (transB 0) -> Tanh,
    MatMul + Add -> Elu, Gemm -> Softmax."""
    nodes = [
        helper.make_node("Gemm", ["x", "probe.w", "probe.b"], ["h1"], "probe", transB=1),
        helper.make_node("LeakyRelu", ["h1"], ["a1"], alpha=0.2),
        helper.make_node("Gemm", ["a1", "mix.w", "mix.b"], ["h2"], "mix", transB=0),
        helper.make_node("Tanh", ["h2"], ["a2"]),
        helper.make_node("MatMul", ["a2", "blend.w"], ["h3"], "blend"),
        helper.make_node("Add", ["h3", "blend.b"], ["h3b"]),
        helper.make_node("Elu", ["h3b"], ["a3"], alpha=0.5),
        helper.make_node("Gemm", ["a3", "verdict.w", "verdict.b"], ["h4"], "verdict", transB=1),
        helper.make_node("Softmax", ["h4"], ["y"]),
    ]
    inits = [
        _init("probe.w", 24, 12),
        _init("probe.b", 24),
        _init("mix.w", 24, 16),
        _init("mix.b", 16),
        _init("blend.w", 16, 16),
        _init("blend.b", 16),
        _init("verdict.w", 5, 16),
        _init("verdict.b", 5),
    ]
    return _model(nodes, [_io("x", "n", 12)], [_io("y", "n", 5)], inits)


def conv_net() -> bytes:
    """A kiln-camera net: Conv+BN+Relu stem, a residual pair with a skip Add, a grouped and
    dilated Conv, a grouped strided ConvTranspose, pooling and a Gemm head."""
    nodes = [
        helper.make_node("Conv", ["x", "stem.w"], ["s"], "stem", pads=[1, 1, 1, 1]),
        helper.make_node(
            "BatchNormalization",
            ["s", "stem_bn.g", "stem_bn.b", "stem_bn.m", "stem_bn.v"],
            ["sn"],
            "stem_bn",
        ),
        helper.make_node("Relu", ["sn"], ["sa"]),
        helper.make_node("Conv", ["sa", "res1.w", "res1.b"], ["r1"], "res1", pads=[1, 1, 1, 1]),
        helper.make_node("Relu", ["r1"], ["r1a"]),
        helper.make_node("Conv", ["r1a", "res2.w", "res2.b"], ["r2"], "res2", pads=[1, 1, 1, 1]),
        helper.make_node("Add", ["sa", "r2"], ["sum"], "res_join"),
        helper.make_node("Relu", ["sum"], ["suma"]),
        helper.make_node(
            "Conv",
            ["suma", "wide.w", "wide.b"],
            ["w"],
            "wide",
            group=4,
            dilations=[2, 2],
            pads=[2, 2, 2, 2],
        ),
        helper.make_node("Sigmoid", ["w"], ["wa"]),
        helper.make_node(
            "ConvTranspose", ["wa", "up.w", "up.b"], ["u"], "up", group=2, strides=[2, 2]
        ),
        helper.make_node("Selu", ["u"], ["ua"]),
        helper.make_node("GlobalAveragePool", ["ua"], ["p"]),
        helper.make_node("Flatten", ["p"], ["f"]),
        helper.make_node("Gemm", ["f", "grade.w", "grade.b"], ["y"], "grade", transB=1),
    ]
    inits = [
        _init("stem.w", 8, 3, 3, 3),
        _init("stem_bn.g", 8),
        _init("stem_bn.b", 8),
        _init("stem_bn.m", 8),
        _init("stem_bn.v", 8),
        _init("res1.w", 8, 8, 3, 3),
        _init("res1.b", 8),
        _init("res2.w", 8, 8, 3, 3),
        _init("res2.b", 8),
        _init("wide.w", 12, 2, 3, 3),
        _init("wide.b", 12),
        _init("up.w", 12, 3, 2, 2),
        _init("up.b", 6),
        _init("grade.w", 4, 6),
        _init("grade.b", 4),
    ]
    return _model(nodes, [_io("x", 1, 3, 10, 10)], [_io("y", 1, 4)], inits)


def recurrent(direction: str = "bidirectional") -> bytes:
    """A river-gauge sequence model: LSTM (both directions), GRU, RNN with Relu, Gemm head."""
    d = 2 if direction == "bidirectional" else 1
    nodes = [
        helper.make_node(
            "LSTM",
            ["x", "tide.W", "tide.R", "tide.B"],
            ["ty"],
            "tide",
            hidden_size=6,
            direction=direction,
        ),
        # Y is (seq, directions, batch, hidden): fold the directions into features.
        helper.make_node("Transpose", ["ty"], ["tt"], perm=[0, 2, 1, 3]),
        helper.make_node("Reshape", ["tt", "shape1"], ["tr"]),
        helper.make_node(
            "GRU", ["tr", "surge.W", "surge.R", "surge.B"], ["gy"], "surge", hidden_size=5
        ),
        helper.make_node("Squeeze", ["gy", "axis1"], ["gs"]),
        helper.make_node(
            "RNN",
            ["gs", "eddy.W", "eddy.R", "eddy.B"],
            ["ry"],
            "eddy",
            hidden_size=4,
            activations=["Relu"],
        ),
        helper.make_node("Squeeze", ["ry", "axis1"], ["rs"]),
        helper.make_node("Gemm", ["rs_last", "level.w", "level.b"], ["y"], "level", transB=1),
        helper.make_node("Gather", ["rs", "last"], ["rs_last"], axis=0),
    ]
    nodes = [*nodes[:-2], nodes[-1], nodes[-2]]
    inits = [
        _init("tide.W", d, 24, 3),
        _init("tide.R", d, 24, 6),
        _init("tide.B", d, 48),
        numpy_helper.from_array(np.array([0, 0, 6 * d], dtype=np.int64), "shape1"),
        _init("surge.W", 1, 15, 6 * d),
        _init("surge.R", 1, 15, 5),
        _init("surge.B", 1, 30),
        numpy_helper.from_array(np.array([1], dtype=np.int64), "axis1"),
        _init("eddy.W", 1, 4, 5),
        _init("eddy.R", 1, 4, 4),
        _init("eddy.B", 1, 8),
        numpy_helper.from_array(np.array(-1, dtype=np.int64), "last"),
        _init("level.w", 2, 4),
        _init("level.b", 2),
    ]
    return _model(nodes, [_io("x", 7, 2, 3)], [_io("y", 2, 2)], inits)


def gpt_block(vocab: int = 40, dim: int = 16, heads: int = 2, context: int = 8) -> bytes:
    """A recipe-title generator: token and position tables, one pre-norm block (attention and
    an Erf-GELU MLP, each a residual branch), a final norm and a tied-free head."""
    hd = dim // heads
    nodes = [
        helper.make_node("Gather", ["wte", "tokens"], ["te"], "wte"),
        helper.make_node("Gather", ["wpe", "positions"], ["pe"], "wpe"),
        helper.make_node("Add", ["te", "pe"], ["h0"], "embed_sum"),
        helper.make_node("LayerNormalization", ["h0", "ln1.g", "ln1.b"], ["n1"], "ln1", axis=-1),
    ]
    for p in ("q", "k", "v"):
        nodes += [
            helper.make_node("MatMul", ["n1", f"{p}.w"], [f"{p}0"], f"attn.{p}"),
            helper.make_node("Add", [f"{p}0", f"{p}.b"], [f"{p}1"]),
            helper.make_node("Reshape", [f"{p}1", "heads_shape"], [f"{p}2"]),
            helper.make_node("Transpose", [f"{p}2"], [f"{p}3"], perm=[0, 2, 1, 3]),
        ]
    nodes += [
        helper.make_node("Transpose", ["k3"], ["kT"], perm=[0, 1, 3, 2]),
        helper.make_node("MatMul", ["q3", "kT"], ["scores"]),
        helper.make_node("Div", ["scores", "sqrt_hd"], ["scaled"]),
        helper.make_node("Add", ["scaled", "causal"], ["masked"]),
        helper.make_node("Softmax", ["masked"], ["att"], axis=-1),
        helper.make_node("MatMul", ["att", "v3"], ["ctx"]),
        helper.make_node("Transpose", ["ctx"], ["ctxT"], perm=[0, 2, 1, 3]),
        helper.make_node("Reshape", ["ctxT", "model_shape"], ["ctx2"]),
        helper.make_node("MatMul", ["ctx2", "o.w"], ["o0"], "attn.o"),
        helper.make_node("Add", ["o0", "o.b"], ["o1"]),
        helper.make_node("Add", ["h0", "o1"], ["h1"], "attn_join"),
        helper.make_node("LayerNormalization", ["h1", "ln2.g", "ln2.b"], ["n2"], "ln2", axis=-1),
        helper.make_node("MatMul", ["n2", "fc.w"], ["f0"], "mlp.fc"),
        helper.make_node("Add", ["f0", "fc.b"], ["f1"]),
        helper.make_node("Div", ["f1", "sqrt2"], ["g0"]),
        helper.make_node("Erf", ["g0"], ["g1"]),
        helper.make_node("Add", ["g1", "one"], ["g2"]),
        helper.make_node("Mul", ["f1", "g2"], ["g3"]),
        helper.make_node("Mul", ["g3", "half"], ["g4"]),
        helper.make_node("MatMul", ["g4", "proj.w"], ["p0"], "mlp.proj"),
        helper.make_node("Add", ["p0", "proj.b"], ["p1"]),
        helper.make_node("Add", ["h1", "p1"], ["h2"], "mlp_join"),
        helper.make_node("LayerNormalization", ["h2", "lnf.g", "lnf.b"], ["nf"], "lnf", axis=-1),
        helper.make_node("MatMul", ["nf", "head.w"], ["logits"], "head"),
    ]
    mask = np.triu(np.full((context, context), -1e9, dtype=np.float32), k=1)
    inits = [
        _init("wte", vocab, dim),
        _init("wpe", context, dim),
        _init("ln1.g", dim),
        _init("ln1.b", dim),
        _init("ln2.g", dim),
        _init("ln2.b", dim),
        _init("lnf.g", dim),
        _init("lnf.b", dim),
        *[_init(f"{p}.w", dim, dim) for p in "qkvo"],
        *[_init(f"{p}.b", dim) for p in "qkvo"],
        _init("fc.w", dim, 4 * dim),
        _init("fc.b", 4 * dim),
        _init("proj.w", 4 * dim, dim),
        _init("proj.b", dim),
        _init("head.w", dim, vocab),
        numpy_helper.from_array(np.array([1, context, heads, hd], dtype=np.int64), "heads_shape"),
        numpy_helper.from_array(np.array([1, context, dim], dtype=np.int64), "model_shape"),
        numpy_helper.from_array(
            np.arange(context, dtype=np.int64).reshape(1, context), "positions"
        ),
        numpy_helper.from_array(mask, "causal"),
        _const("sqrt_hd", float(np.sqrt(hd))),
        _const("sqrt2", float(np.sqrt(2.0))),
        _const("one", 1.0),
        _const("half", 0.5),
    ]
    tokens = helper.make_tensor_value_info("tokens", TensorProto.INT64, [1, context])
    return _model(nodes, [tokens], [_io("logits", 1, context, vocab)], inits)
