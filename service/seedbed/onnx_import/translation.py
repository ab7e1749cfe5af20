"""From an ONNX graph to the seedbed request it stands for, and what fills each initializer.

Every operator that holds trainable weights becomes one seedbed layer (two for a bidirectional
recurrent node, one per direction). The activation of a layer is read from the graph: the
first operator after its output, looking through shape-only operators (Reshape, Flatten,
pooling, Dropout ...) and normalisations, or the Erf-based GELU pattern. A residual branch is a
run of layers between a value and an Add that sums that value with a path computed from it.

Nothing is guessed: a floating-point initializer that no reader below claims is refused with
its name, unless the caller names it in `keep` (then it is left exactly as it is), or it is a
single number read by elementwise arithmetic (a constant of a formula such as the GELU pattern's
sqrt(2)). Integer initializers (shapes, indices) are never trainable and are left alone.

Operator semantics follow the ONNX operator specification (https://onnx.ai/onnx/operators/);
the layouts each reader relies on are cited beside its tests.
"""

from __future__ import annotations

import difflib
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from math import prod
from typing import Any

import numpy as np
import onnx
from onnx import numpy_helper

from seedbed.onnx_import.loading import LoadedModel
from seedbed.onnx_import.refusals import ModelRefused
from seedbed_client.framework_layouts import FRAMEWORK_GATE_ORDERS

# ONNX element types seedbed can fill, and the request dtype each one becomes.
FLOAT_TYPES: dict[int, str] = {
    onnx.TensorProto.FLOAT: "float32",
    onnx.TensorProto.DOUBLE: "float64",
    onnx.TensorProto.FLOAT16: "float16",
    onnx.TensorProto.BFLOAT16: "bfloat16",
}

# Operator -> seedbed activation name. Parameters are read from attributes where seedbed has one.
ACTIVATIONS: dict[str, str] = {
    "Relu": "relu",
    "LeakyRelu": "leaky_relu",
    "Tanh": "tanh",
    "Sigmoid": "sigmoid",
    "Elu": "elu",
    "Selu": "selu",
    "Softplus": "softplus",
    "Gelu": "gelu",
    "HardSigmoid": "hard_sigmoid",
    "HardSwish": "hard_swish",
    "Softmax": "softmax",
}
# Operators that move or summarise values without mixing features through weights: the
# activation after a layer is looked for through them.
PASS_THROUGH: frozenset[str] = frozenset(
    {
        "Reshape",
        "Flatten",
        "Transpose",
        "Identity",
        "Dropout",
        "Squeeze",
        "Unsqueeze",
        "Cast",
        "MaxPool",
        "AveragePool",
        "GlobalAveragePool",
        "GlobalMaxPool",
        "Pad",
        "BatchNormalization",
        "LayerNormalization",
    }
)
# Elementwise arithmetic: a single-number float initializer read only by these is a constant of
# a formula, not a weight.
ARITHMETIC: frozenset[str] = frozenset(
    {
        "Add",
        "Sub",
        "Mul",
        "Div",
        "Pow",
        "Sqrt",
        "Max",
        "Min",
        "Clip",
        "Where",
        "Equal",
        "Less",
        "Greater",
        "ReduceMean",
        "Expand",
        "Erf",
        "Neg",
        "Abs",
    }
)
CELLS = {"LSTM": "lstm", "GRU": "gru", "RNN": "simple"}
# Required inputs of the operators read here (ONNX operator specification).
MIN_INPUTS = {
    "Gemm": 2,
    "MatMul": 2,
    "Conv": 2,
    "ConvTranspose": 2,
    "Gather": 2,
    "LSTM": 3,
    "GRU": 3,
    "RNN": 3,
    "LayerNormalization": 2,
    "BatchNormalization": 5,
}
# ONNX operator specification, LSTM (opset 7..22): W is [iofc], B is [Wb, Rb]; GRU: W is [zrh]
# = update, reset, hidden (the candidate). The shared table holds them in seedbed's gate names.
RECURRENT_GATES: dict[str, tuple[str, ...]] = {
    op: tuple(FRAMEWORK_GATE_ORDERS["onnx"][cell]) for op, cell in CELLS.items()
}
_RNN_ACTIVATIONS = {"Tanh": "tanh", "Relu": "relu", "Sigmoid": "sigmoid"}
_NAME_OK = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.\-]*")

# How a binding lays seedbed tensors (in seedbed's out_in layout) out as an initializer:
#   same                 same element order, reshaped to the initializer's dims
#   transposed           2-D transpose: (n_out, n_in) -> (n_in, n_out)
#   transposed_conv      (c_out, c_in/g, *k) -> (c_in, c_out/g, *k), per group
#   recurrent_weights    per direction: gate blocks from seedbed's order to the graph's, stacked
#   recurrent_bias       per direction: [input bias in the graph's gate order, zeros]
#   constant             every element `value` (normalisation statistics, initial states)
CONVERSIONS = (
    "same",
    "transposed",
    "transposed_conv",
    "recurrent_weights",
    "recurrent_bias",
    "constant",
)


@dataclass(frozen=True)
class Binding:
    """What one initializer is filled with."""

    initializer: str
    shape: tuple[int, ...]
    conversion: str
    sources: tuple[str, ...] = ()  # seedbed tensor names the conversion reads, in order
    gates: tuple[str, ...] = ()  # recurrent: the graph's gate order
    groups: int = 1  # transposed_conv
    value: float | None = None  # constant
    why: str = ""

    def document(self) -> dict[str, Any]:
        doc: dict[str, Any] = {
            "initializer": self.initializer,
            "shape": list(self.shape),
            "conversion": self.conversion,
            "sources": list(self.sources),
        }
        if self.gates:
            doc["gate_order"] = list(self.gates)
        if self.conversion == "transposed_conv":
            doc["groups"] = self.groups
        if self.value is not None:
            doc["value"] = self.value
        if self.why:
            doc["note"] = self.why
        return doc


@dataclass
class _Layer:
    node: int
    op: str
    fields: dict[str, Any]
    output: str  # the value after the layer (its bias Add included)
    bindings: list[tuple[str, str, dict[str, Any]]]  # (initializer, part, binding arguments)
    name_hint: str
    absorbed: tuple[int, ...] = ()  # nodes that belong to the layer (a MatMul's bias Add)
    directions: int = 1
    activation: str | None = None
    activation_param: float | None = None
    activation_from: str = ""
    branch: str | None = None
    role: str = "hidden"
    name: str = ""

    @property
    def is_map(self) -> bool:
        return self.fields["kind"] in ("dense", "conv", "recurrent", "embedding")


@dataclass(frozen=True)
class Translation:
    request: dict[str, Any]
    bindings: tuple[Binding, ...]
    inference: tuple[dict[str, Any], ...]  # one row per seedbed layer: what was read and from what
    kept: tuple[str, ...]  # float initializers left as they are, as the caller allowed
    constants: tuple[str, ...]  # single-number initializers of formulas, left as they are
    notes: tuple[str, ...] = field(default=())


def _attr(node: onnx.NodeProto, name: str, default: Any) -> Any:
    for a in node.attribute:
        if a.name == name:
            return onnx.helper.get_attribute_value(a)
    return default


def _text(value: Any) -> Any:
    if isinstance(value, bytes):
        return value.decode("utf-8", errors="replace")
    if isinstance(value, list):
        return [_text(v) for v in value]
    return value


class _Reader:
    def __init__(self, loaded: LoadedModel, keep: frozenset[str]) -> None:
        self.loaded = loaded
        self.graph = loaded.model.graph
        self.nodes = list(self.graph.node)
        self.inits = loaded.initializers
        self.keep = keep
        self.outputs = {v.name for v in self.graph.output}
        self.producer: dict[str, int] = {}
        self.consumers: dict[str, list[int]] = {}
        for i, node in enumerate(self.nodes):
            for out in node.output:
                if out:
                    self.producer[out] = i
            for name in node.input:
                if name:
                    self.consumers.setdefault(name, []).append(i)
        self.notes: list[str] = []
        self.layers: list[_Layer] = []
        self.layer_of_node: dict[int, _Layer] = {}

    # -- small helpers ---------------------------------------------------------------------

    def label(self, i: int) -> str:
        node = self.nodes[i]
        return f"{node.op_type} node {node.name!r}" if node.name else f"{node.op_type} node #{i}"

    def weight(self, name: str) -> onnx.TensorProto | None:
        """A float initializer by name, or None (a computed value, or an integer tensor)."""
        init = self.inits.get(name)
        if init is None or init.data_type not in FLOAT_TYPES:
            return None
        return init

    def dims(self, name: str) -> tuple[int, ...]:
        return tuple(int(d) for d in self.inits[name].dims)

    def scalar(self, name: str) -> float | None:
        """The value of a one-element constant (initializer or Constant node), else None."""
        tensor: onnx.TensorProto | None = self.inits.get(name)
        if tensor is None and name in self.producer:
            node = self.nodes[self.producer[name]]
            if node.op_type == "Constant":
                value = _attr(node, "value", None)
                if isinstance(value, onnx.TensorProto):
                    tensor = value
                else:
                    number = _attr(node, "value_float", None)
                    return None if number is None else float(number)
        if tensor is None or prod(tensor.dims) != 1 or tensor.data_location == 1:
            return None
        try:
            return float(np.asarray(numpy_helper.to_array(tensor)).reshape(-1)[0])
        except (ValueError, TypeError):
            return None

    def only_consumer(self, value: str) -> int | None:
        readers = self.consumers.get(value, [])
        if len(readers) != 1 or value in self.outputs:
            return None
        return readers[0]

    def refuse(self, i: int, code: str, message: str, names: Sequence[str] = ()) -> ModelRefused:
        return ModelRefused(code, f"{self.label(i)}: {message}", names=tuple(names))

    # -- readers, one per operator -----------------------------------------------------------

    def read_layers(self) -> None:
        for i in self.loaded.order:
            node = self.nodes[i]
            if i in self.layer_of_node:
                continue
            reader = getattr(self, f"_read_{node.op_type.lower()}", None)
            if node.domain not in ("", "ai.onnx") or reader is None:
                continue
            need = MIN_INPUTS.get(node.op_type, 1)
            if len(node.input) < need or len(node.output) < 1:
                raise self.refuse(
                    i,
                    "malformed_node",
                    f"has {len(node.input)} inputs and "
                    f"{len(node.output)} outputs; the operator specification "
                    f"needs at least {need} inputs and one output",
                )
            layer = reader(i, node)
            if layer is not None:
                self.layers.append(layer)
                self.layer_of_node[i] = layer
                for j in layer.absorbed:
                    self.layer_of_node[j] = layer
        self.layers.sort(key=lambda layer: self.loaded.order.index(layer.node))

    def _bias_add(self, value: str, width: int) -> tuple[str, int] | None:
        """An Add right after `value` whose other input is a float initializer of `width`
        numbers: the layer's bias (MatMul + Add is how Gemm-less exporters write y = xW + b)."""
        j = self.only_consumer(value)
        if j is None or self.nodes[j].op_type != "Add":
            return None
        other = [n for n in self.nodes[j].input if n != value]
        if len(other) != 1 or self.weight(other[0]) is None:
            return None
        if prod(self.dims(other[0])) != width or max(self.dims(other[0]) or (1,)) != width:
            return None
        return other[0], j

    def _read_gemm(self, i: int, node: onnx.NodeProto) -> _Layer | None:
        if len(node.input) < 2 or self.weight(node.input[1]) is None:
            return None
        b = node.input[1]
        shape = self.dims(b)
        if len(shape) != 2:
            raise self.refuse(
                i,
                "unsupported_shape",
                f"B {b!r} has shape {list(shape)}; Gemm's B is a matrix",
                [b],
            )
        for name in ("alpha", "beta"):
            if float(_attr(node, name, 1.0)) != 1.0:
                raise self.refuse(
                    i,
                    "unsupported_attribute",
                    f"{name} is "
                    f"{_attr(node, name, 1.0)}; a scaled Gemm would scale the "
                    "seeded weights, so only alpha = beta = 1 is read",
                    [b],
                )
        trans_b = int(_attr(node, "transB", 0))
        # Gemm (opset 13): Y = A' B' + C with B' = transpose(B) if transB; B is (K, N) or (N, K).
        n_out, n_in = (shape[0], shape[1]) if trans_b else (shape[1], shape[0])
        bindings = [(b, "weight", {"conversion": "same" if trans_b else "transposed"})]
        bias = False
        if len(node.input) > 2 and node.input[2]:
            c = node.input[2]
            if self.weight(c) is not None and prod(self.dims(c)) == n_out:
                bindings.append((c, "bias", {"conversion": "same"}))
                bias = True
        fields = {"kind": "dense", "n_in": n_in, "n_out": n_out, "bias": bias}
        return _Layer(i, "Gemm", fields, node.output[0], bindings, node.name or b)

    def _read_matmul(self, i: int, node: onnx.NodeProto) -> _Layer | None:
        a, b = node.input[0], node.input[1]
        if self.weight(b) is not None:
            w, conversion, right = b, "transposed", True
        elif self.weight(a) is not None:
            w, conversion, right = a, "same", False
        else:
            return None  # a product of two computed values (attention scores): no weights
        shape = self.dims(w)
        if len(shape) != 2:
            raise self.refuse(
                i,
                "unsupported_shape",
                f"the weight {w!r} has shape {list(shape)}; only a 2-D weight matrix is read",
                [w],
            )
        # MatMul (opset 13) follows numpy.matmul: x @ W with W (n_in, n_out), or W @ x.
        n_in, n_out = (shape[0], shape[1]) if right else (shape[1], shape[0])
        bindings = [(w, "weight", {"conversion": conversion})]
        output, absorbed = node.output[0], tuple[int, ...]()
        found = self._bias_add(output, n_out)
        if found is not None:
            bindings.append((found[0], "bias", {"conversion": "same"}))
            output, absorbed = self.nodes[found[1]].output[0], (found[1],)
        fields = {"kind": "dense", "n_in": n_in, "n_out": n_out, "bias": found is not None}
        return _Layer(i, "MatMul", fields, output, bindings, node.name or w, absorbed)

    def _conv_common(self, i: int, node: onnx.NodeProto) -> tuple[str, tuple[int, ...], int]:
        w = node.input[1]
        if self.weight(w) is None:
            raise self.refuse(
                i,
                "unsupported_input",
                f"the kernel {w!r} is computed, not an "
                "initializer; only stored kernels can be seeded",
                [w],
            )
        shape = self.dims(w)
        if not 3 <= len(shape) <= 5:
            raise self.refuse(
                i,
                "unsupported_shape",
                f"the kernel {w!r} has shape {list(shape)}; 1 to 3 spatial dimensions are read",
                [w],
            )
        return w, shape, int(_attr(node, "group", 1))

    def _conv_fields(self, node: onnx.NodeProto, kernel: tuple[int, ...]) -> dict[str, Any]:
        strides = [int(s) for s in _attr(node, "strides", [1] * len(kernel))]
        return {
            "kernel": list(kernel),
            "groups": int(_attr(node, "group", 1)),
            "stride": strides or [1] * len(kernel),
        }

    def _conv_bias(
        self, node: onnx.NodeProto, width: int, bindings: list[tuple[str, str, dict[str, Any]]]
    ) -> bool:
        if (
            len(node.input) > 2
            and node.input[2]
            and self.weight(node.input[2]) is not None
            and prod(self.dims(node.input[2])) == width
        ):
            bindings.append((node.input[2], "bias", {"conversion": "same"}))
            return True
        return False

    def _read_conv(self, i: int, node: onnx.NodeProto) -> _Layer:
        # Conv (opset 11..22): W is (M, C/group, k1, ..., kn); dilations and pads do not change
        # which inputs a weight connects, so the fans do not depend on them.
        w, shape, groups = self._conv_common(i, node)
        bindings = [(w, "weight", {"conversion": "same"})]
        fields = {
            "kind": "conv",
            "channels_in": shape[1] * groups,
            "channels_out": shape[0],
            **self._conv_fields(node, shape[2:]),
        }
        fields["bias"] = self._conv_bias(node, shape[0], bindings)
        return _Layer(i, "Conv", fields, node.output[0], bindings, node.name or w)

    def _read_convtranspose(self, i: int, node: onnx.NodeProto) -> _Layer:
        # ConvTranspose (opset 11..22): W is (C, M/group, k1, ..., kn), input channels first.
        w, shape, groups = self._conv_common(i, node)
        bindings = [(w, "weight", {"conversion": "transposed_conv", "groups": groups})]
        c_out = shape[1] * groups
        fields = {
            "kind": "conv",
            "channels_in": shape[0],
            "channels_out": c_out,
            "transposed": True,
            **self._conv_fields(node, shape[2:]),
        }
        fields["bias"] = self._conv_bias(node, c_out, bindings)
        return _Layer(i, "ConvTranspose", fields, node.output[0], bindings, node.name or w)

    def _read_gather(self, i: int, node: onnx.NodeProto) -> _Layer | None:
        table = node.input[0]
        if self.weight(table) is None:
            return None
        shape = self.dims(table)
        if len(shape) != 2 or int(_attr(node, "axis", 0)) != 0:
            raise self.refuse(
                i,
                "unsupported_shape",
                f"the table {table!r} has shape "
                f"{list(shape)} (axis {_attr(node, 'axis', 0)}); an embedding is a "
                "2-D table looked up along axis 0",
                [table],
            )
        # Gather (opset 13), axis 0: row k of the (vocab, dim) table is token k's vector.
        fields = {"kind": "embedding", "vocab": shape[0], "dim": shape[1]}
        return _Layer(
            i,
            "Gather",
            fields,
            node.output[0],
            [(table, "weight", {"conversion": "same"})],
            node.name or table,
        )

    def _read_layernormalization(self, i: int, node: onnx.NodeProto) -> _Layer | None:
        return self._norm(i, node, node.input[1], node.input[2] if len(node.input) > 2 else "")

    def _read_batchnormalization(self, i: int, node: onnx.NodeProto) -> _Layer | None:
        layer = self._norm(i, node, node.input[1], node.input[2])
        if layer is None:
            return None
        # BatchNormalization (opset 15): inputs X, scale, B, input_mean, input_var. A fresh
        # network's running statistics are mean 0 and variance 1 (common practice).
        for name, value in ((node.input[3], 0.0), (node.input[4], 1.0)):
            if self.weight(name) is not None:
                layer.bindings.append(
                    (
                        name,
                        "",
                        {
                            "conversion": "constant",
                            "value": value,
                            "why": "running statistic of a fresh network",
                        },
                    )
                )
        return layer

    def _norm(self, i: int, node: onnx.NodeProto, scale: str, shift: str) -> _Layer | None:
        if self.weight(scale) is None:
            return None
        dim = prod(self.dims(scale))
        bindings = [(scale, "scale", {"conversion": "same"})]
        has_shift = bool(shift) and self.weight(shift) is not None and prod(self.dims(shift)) == dim
        if has_shift:
            bindings.append((shift, "shift", {"conversion": "same"}))
        fields = {"kind": "norm", "dim": dim, "bias": has_shift}
        return _Layer(i, node.op_type, fields, node.output[0], bindings, node.name or scale)

    def _read_lstm(self, i: int, node: onnx.NodeProto) -> _Layer:
        return self._recurrent(i, node)

    def _read_gru(self, i: int, node: onnx.NodeProto) -> _Layer:
        return self._recurrent(i, node)

    def _read_rnn(self, i: int, node: onnx.NodeProto) -> _Layer:
        return self._recurrent(i, node)

    def _recurrent(self, i: int, node: onnx.NodeProto) -> _Layer:
        op = node.op_type
        gates = RECURRENT_GATES[op]
        inputs = [*node.input, *[""] * 8][:8]
        w, r, b = inputs[0 + 1], inputs[2], inputs[3]
        for name, what in ((w, "W"), (r, "R")):
            if self.weight(name) is None:
                raise self.refuse(
                    i,
                    "unsupported_input",
                    f"{what} ({name!r}) is not a stored "
                    "float initializer; only stored weights can be seeded",
                    [name],
                )
        directions, rows, n_in = self.dims(w)
        hidden = int(_attr(node, "hidden_size", rows // len(gates)))
        expected = {
            "W": (directions, len(gates) * hidden, n_in),
            "R": (directions, len(gates) * hidden, hidden),
            "B": (directions, 2 * len(gates) * hidden),
        }
        direction = _text(_attr(node, "direction", "forward"))
        wanted = 2 if direction == "bidirectional" else 1
        if directions != wanted:
            raise self.refuse(
                i,
                "unsupported_shape",
                f"W ({w!r}) has {directions} direction(s) but direction is {direction}",
                [w],
            )
        for name, what in ((w, "W"), (r, "R"), (b, "B")):
            if name and self.weight(name) is not None and self.dims(name) != expected[what]:
                raise self.refuse(
                    i,
                    "unsupported_shape",
                    f"{what} ({name!r}) has shape "
                    f"{list(self.dims(name))}; with hidden_size {hidden} and "
                    f"direction {direction} the operator specification gives "
                    f"{list(expected[what])}",
                    [name],
                )
        if op == "LSTM" and int(_attr(node, "input_forget", 0)):
            raise self.refuse(
                i,
                "unsupported_attribute",
                "input_forget couples the input and forget gates; that cell is not a standard LSTM",
                [w],
            )
        peephole = inputs[7]
        if (
            op == "LSTM"
            and peephole
            and self.weight(peephole) is not None
            and peephole not in self.keep
        ):
            raise self.refuse(
                i,
                "unsupported_weights",
                f"peephole weights {peephole!r} have no "
                "seedbed counterpart; name them in keep to leave them as they "
                "are",
                [peephole],
            )
        activations = [str(a) for a in _text(_attr(node, "activations", []))]
        fields: dict[str, Any] = {
            "kind": "recurrent",
            "cell": CELLS[op],
            "n_in": n_in,
            "hidden": hidden,
            "bias": bool(b),
        }
        if op == "RNN":
            first = activations[0] if activations else "Tanh"
            if first not in _RNN_ACTIVATIONS or any(a != first for a in activations):
                raise self.refuse(
                    i,
                    "unsupported_attribute",
                    f"activations {activations} are "
                    "not read; one of Tanh, Relu, Sigmoid for every direction is",
                    [w],
                )
            fields["activation"] = _RNN_ACTIVATIONS[first]
        elif activations and activations != _standard_gates(op, directions):
            raise self.refuse(
                i,
                "unsupported_attribute",
                f"activations {activations} differ "
                "from the standard cell's; their gains would not be the ones "
                "seedbed plans for",
                [w],
            )
        bindings: list[tuple[str, str, dict[str, Any]]] = [
            (w, "input_weight", {"conversion": "recurrent_weights", "gates": gates}),
            (r, "recurrent_weight", {"conversion": "recurrent_weights", "gates": gates}),
        ]
        if b:
            bindings.append((b, "bias", {"conversion": "recurrent_bias", "gates": gates}))
        # Initial states given as initializers are states, not weights: a fresh start is zero.
        for k in (5, 6):
            if inputs[k] and self.weight(inputs[k]) is not None:
                bindings.append(
                    (
                        inputs[k],
                        "",
                        {"conversion": "constant", "value": 0.0, "why": "initial state"},
                    )
                )
        layer = _Layer(
            i, op, fields, node.output[0], bindings, node.name or w, directions=directions
        )
        layer.activation = fields.pop("activation", None)
        layer.activation_from = f"the {op} cell" if op != "RNN" else "the RNN's activations"
        return layer

    # -- what follows each layer ------------------------------------------------------------

    def erf_gelu_end(self, value: str) -> int | None:
        """The last node of x * 0.5 * (1 + erf(x / sqrt(2))) read from `value`, or None."""
        for j in self.consumers.get(value, []):
            scale_node = self.nodes[j]
            if scale_node.op_type not in ("Div", "Mul") or scale_node.input[0] != value:
                continue
            constant = self.scalar(scale_node.input[1])
            if constant is None:
                continue
            expected = 2.0**0.5 if scale_node.op_type == "Div" else 2.0**-0.5
            if abs(constant - expected) > 1e-3:
                continue
            erf = self.only_consumer(scale_node.output[0])
            if erf is None or self.nodes[erf].op_type != "Erf":
                continue
            add = self.only_consumer(self.nodes[erf].output[0])
            if (
                add is None
                or self.nodes[add].op_type != "Add"
                or self.scalar(
                    next(n for n in self.nodes[add].input if n != self.nodes[erf].output[0])
                )
                != 1.0
            ):
                continue
            mul = self.only_consumer(self.nodes[add].output[0])
            if mul is None or self.nodes[mul].op_type != "Mul":
                continue
            last = mul
            half = self.only_consumer(self.nodes[mul].output[0])
            if (
                half is not None
                and self.nodes[half].op_type == "Mul"
                and any(self.scalar(n) == 0.5 for n in self.nodes[half].input)
            ):
                last = half
            return last
        return None

    def follow(self, layer: _Layer) -> None:
        """Set the layer's activation from what comes after it, and whether its result is an
        output of the graph (through shape-only operators)."""
        value = layer.output
        found = layer.activation is not None or layer.fields["kind"] == "recurrent"
        for _ in range(64):
            if not found:
                gelu = self.erf_gelu_end(value)
                if gelu is not None:
                    layer.activation, found = "gelu", True
                    layer.activation_from = "the Erf GELU pattern ending at " + self.label(gelu)
                    value = self.nodes[gelu].output[0]
                    continue
            j = self.only_consumer(value)
            if j is None:
                break
            node = self.nodes[j]
            if j in self.layer_of_node and node.op_type not in (
                "BatchNormalization",
                "LayerNormalization",
            ):
                break
            if not found and node.op_type in ACTIVATIONS:
                self._activation(layer, j, node)
                found = True
            elif node.op_type not in PASS_THROUGH and node.op_type != "Softmax":
                break
            value = node.output[0]
        if not found:
            layer.activation = "linear"
            layer.activation_from = "no activation follows"
        layer.role = "output" if value in self.outputs else "hidden"
        if layer.activation == "softmax" and layer.role != "output":
            layer.activation, layer.activation_from = (
                "linear",
                "Softmax not at the output: read as linear",
            )

    def _activation(self, layer: _Layer, j: int, node: onnx.NodeProto) -> None:
        name = ACTIVATIONS[node.op_type]
        layer.activation = name
        layer.activation_from = self.label(j)
        if node.op_type == "LeakyRelu":
            layer.activation_param = _float32_text(_attr(node, "alpha", 0.01))
        elif node.op_type == "Elu":
            layer.activation_param = _float32_text(_attr(node, "alpha", 1.0))
        elif node.op_type == "Gelu" and _text(_attr(node, "approximate", "none")) != "none":
            layer.activation_from += " (tanh approximation, planned as exact GELU)"
        elif node.op_type == "HardSigmoid":
            # HardSigmoid (opset 6): max(0, min(1, alpha * x + beta)); seedbed's hard_sigmoid
            # is centred (beta 1/2) with the slope as its parameter.
            beta = float(_attr(node, "beta", 0.5))
            if abs(beta - 0.5) > 1e-6:
                raise self.refuse(
                    j,
                    "unsupported_attribute",
                    f"beta is {beta}; only the centred ramp (beta 0.5) has a gain seedbed knows",
                )
            layer.activation_param = _float32_text(_attr(node, "alpha", 0.2))
        elif node.op_type == "Selu":
            # Selu (opset 6) defaults are float32 roundings of Klambauer et al. (2017)'s closed
            # forms; other values change the fixed point the LeCun rule relies on.
            alpha = float(_attr(node, "alpha", 1.67326319217681884765625))
            gamma = float(_attr(node, "gamma", 1.05070102214813232421875))
            if abs(alpha - 1.6732632) > 1e-6 or abs(gamma - 1.0507010) > 1e-6:
                raise self.refuse(
                    j,
                    "unsupported_attribute",
                    f"alpha {alpha} and gamma {gamma} are not the self-normalising constants",
                )

    # -- residual structure ------------------------------------------------------------------

    def upstream(self, value: str) -> tuple[set[str], set[int]]:
        """Every value and node `value` is computed from (itself included)."""
        values, nodes, stack = {value}, set(), [value]
        while stack:
            v = stack.pop()
            j = self.producer.get(v)
            if j is None or j in nodes:
                continue
            nodes.add(j)
            for name in self.nodes[j].input:
                if name and name not in values:
                    values.add(name)
                    stack.append(name)
        return values, nodes

    def mark_residuals(self) -> None:
        position = {id(layer): k for k, layer in enumerate(self.layers)}
        used: set[str] = {layer.name for layer in self.layers}
        for i in self.loaded.order:
            node = self.nodes[i]
            if node.op_type != "Add" or i in self.layer_of_node or len(node.input) != 2:
                continue
            a, b = node.input
            if (
                a in self.inits
                or b in self.inits
                or self.scalar(a) is not None
                or self.scalar(b) is not None
            ):
                continue
            b_values, b_nodes = self.upstream(b)
            a_values, a_nodes = self.upstream(a)
            if a in b_values:
                skip_nodes, branch_nodes = a_nodes, b_nodes
            elif b in a_values:
                skip_nodes, branch_nodes = b_nodes, a_nodes
            else:
                continue  # two paths from a common input (a projected skip): not a plain skip
            members = [
                layer
                for layer in self.layers
                if layer.node in branch_nodes and layer.node not in skip_nodes
            ]
            if not members:
                continue
            ks = sorted(position[id(layer)] for layer in members)
            if ks != list(range(ks[0], ks[-1] + 1)) or any(m.branch for m in members):
                self.notes.append(
                    f"{self.label(i)} adds a skip to a path whose layers are not "
                    "one run of layers (or are in another branch): not marked as "
                    "a residual branch"
                )
                continue
            name = _unique(_clean(node.name or f"residual_{i}"), used)
            for layer in members:
                layer.branch = name

    # -- the claimed / left / refused initializers -------------------------------------------

    def leftovers(self, claimed: set[str]) -> tuple[list[str], list[str]]:
        """(kept, constants) among unclaimed float initializers; refuses the rest."""
        kept, constants, refused = [], [], []
        for name, init in self.inits.items():
            if name in claimed or init.data_type not in FLOAT_TYPES:
                continue
            readers = [self.nodes[j].op_type for j in self.consumers.get(name, [])]
            if name in self.keep:
                kept.append(name)
            elif prod(init.dims) <= 1 and all(op in ARITHMETIC for op in readers):
                constants.append(name)
            elif not readers:
                kept.append(name)  # read by nothing: cannot matter, left as it is
                self.notes.append(f"initializer {name!r} is read by no node; left as it is")
            else:
                refused.append(f"{name!r} (read by {', '.join(sorted(set(readers)))})")
        for j, node in enumerate(self.nodes):
            # A float tensor held by a Constant node (some exporters fold weights into one)
            # or inside a control-flow subgraph is as trainable as an initializer.
            if node.op_type == "Constant" and node.output and node.output[0] not in self.keep:
                size = _constant_size(node)
                if size > 1:
                    readers = sorted(
                        {self.nodes[k].op_type for k in self.consumers.get(node.output[0], [])}
                    )
                    refused.append(
                        f"{node.output[0]!r} (a Constant node of {size} floats, "
                        f"read by {', '.join(readers) or 'nothing'})"
                    )
            for held in _subgraph_weights(node):
                if held not in self.keep:
                    refused.append(f"{held!r} (inside the subgraph of {self.label(j)})")
        if refused:
            raise ModelRefused(
                "unsupported_weights",
                f"{len(refused)} float initializer(s) are read by operators that seedbed does "
                f"not fill: {', '.join(refused[:10])}{' ...' if len(refused) > 10 else ''}; "
                "pass their names in keep to leave them exactly as they are",
                names=tuple(r.split("'")[1] for r in refused),
            )
        return kept, constants


def _apply_overrides(reader: _Reader, activations: Mapping[str, tuple[str, float | None]]) -> None:
    by_name = {layer.name: layer for layer in reader.layers}
    for key, (name, param) in activations.items():
        layer = by_name.get(key)
        if layer is None:
            close = difflib.get_close_matches(key, list(by_name), n=1, cutoff=0.5)
            hint = f"; did you mean {close[0]!r}?" if close else ""
            raise ModelRefused(
                "unknown_layer",
                f"activation names layer {key!r}, which the "
                f"graph does not have{hint} Layers: "
                f"{', '.join(list(by_name)[:30])}",
                field="activation",
            )
        if layer.fields["kind"] == "recurrent" and layer.fields["cell"] != "simple":
            raise ModelRefused(
                "not_allowed",
                f"{key!r} is a gated {layer.op} cell: its gate "
                "functions are fixed, it takes no activation",
                field="activation",
            )
        layer.activation, layer.activation_param = name, param
        layer.activation_from = "caller override"


def _constant_size(node: onnx.NodeProto) -> int:
    """How many floats a Constant node holds (0 when it holds something else)."""
    for a in node.attribute:
        if a.name == "value" and a.t.data_type in FLOAT_TYPES:
            return prod(a.t.dims)
        if a.name == "value_floats":
            return len(a.floats)
    return 0


def _subgraph_weights(node: onnx.NodeProto) -> list[str]:
    """Float initializers and float Constant outputs inside a node's subgraphs (If, Loop,
    Scan bodies), at any depth: the walk above does not read them, so they are refused."""
    found: list[str] = []
    graphs = [a.g for a in node.attribute if a.type == onnx.AttributeProto.GRAPH]
    graphs += [g for a in node.attribute if a.type == onnx.AttributeProto.GRAPHS for g in a.graphs]
    for graph in graphs:
        found += [t.name for t in graph.initializer if t.data_type in FLOAT_TYPES]
        for inner in graph.node:
            if inner.op_type == "Constant" and _constant_size(inner) > 1:
                found.append(inner.output[0])
            found += _subgraph_weights(inner)
    return found


def _float32_text(value: float) -> float:
    """An attribute stored as float32 (0.2 arrives as 0.20000000298...), read back as the
    shortest decimal that rounds to it: what the exporter's author wrote."""
    return float(str(np.float32(value)))


def _standard_gates(op: str, directions: int) -> list[str]:
    one = {"LSTM": ["Sigmoid", "Tanh", "Tanh"], "GRU": ["Sigmoid", "Tanh"]}[op]
    return one * directions


def _clean(text: str) -> str:
    cleaned = re.sub(r"[^A-Za-z0-9_.\-]", "_", text.strip())
    cleaned = cleaned.lstrip(".-")
    return cleaned[:100] or "layer"


def _unique(name: str, used: set[str]) -> str:
    candidate, k = name, 1
    while candidate in used or any(
        candidate.startswith(u + ".") or u.startswith(candidate + ".") for u in used
    ):
        k += 1
        candidate = f"{name}_{k}"
    used.add(candidate)
    return candidate


def translate(
    loaded: LoadedModel,
    seed: int | str,
    keep: Iterable[str] = (),
    activations: Mapping[str, tuple[str, float | None]] | None = None,
) -> Translation:
    """The seedbed request for the model, and one binding per initializer it fills.

    `activations` replaces what was read for the named layers (layer -> (name, parameter));
    a key that names no layer is refused with the layer names."""
    keep_set = frozenset(keep)
    known = set(loaded.initializers)
    for node in loaded.model.graph.node:
        known.update(node.output if node.op_type == "Constant" else ())
        known.update(_subgraph_weights(node))
    unknown = sorted(keep_set - known)
    if unknown:
        raise ModelRefused(
            "unknown_initializer",
            f"keep names {unknown[:5]}, which the model has no initializer of",
            field="keep",
            names=tuple(unknown),
        )
    reader = _Reader(loaded, keep_set)
    reader.read_layers()
    if not reader.layers:
        reader.leftovers(set())  # weights held where seedbed does not read are named first
        raise ModelRefused(
            "no_weights",
            "the graph has no operator whose weights seedbed reads "
            "(Gemm, MatMul, Conv, ConvTranspose, Gather, LSTM, GRU, RNN, "
            "LayerNormalization, BatchNormalization)",
        )
    used: set[str] = set()
    for layer in reader.layers:
        layer.name = _unique(_clean(layer.name_hint), used)
    for layer in reader.layers:
        reader.follow(layer)
    reader.mark_residuals()
    _apply_overrides(reader, activations or {})
    for layer in reader.layers:
        if layer.branch and layer.role == "output":
            layer.role = "hidden"

    dtypes = {
        FLOAT_TYPES[loaded.initializers[name].data_type]
        for layer in reader.layers
        for name, part, _ in layer.bindings
        if part
    }
    if len(dtypes) > 1:
        raise ModelRefused(
            "mixed_dtypes",
            f"the weights are stored in {sorted(dtypes)}; one float type for every weight is read",
        )
    dtype = dtypes.pop()

    layers_json: list[dict[str, Any]] = []
    bindings: list[Binding] = []
    inference: list[dict[str, Any]] = []
    claimed: set[str] = set()
    # Names of the layer group emitted last: a bidirectional layer's two halves both read what
    # came before them, and whatever follows reads both halves joined (widths add up).
    previous: list[str] = []
    for layer in reader.layers:
        names = (
            [layer.name]
            if layer.directions == 1
            else [f"{layer.name}.forward", f"{layer.name}.reverse"]
        )
        for position, name in enumerate(names):
            entry: dict[str, Any] = {"name": name, **layer.fields}
            if not layer.branch and (position == 1 or len(previous) > 1):
                entry["reads"] = list(previous)
            if layer.fields["kind"] != "recurrent" or layer.fields["cell"] == "simple":
                entry["activation"] = layer.activation
                if layer.activation_param is not None:
                    entry["activation_param"] = layer.activation_param
            if layer.fields["kind"] != "norm" and layer.role == "output":
                entry["role"] = "output"
            if layer.branch:
                entry["branch"] = layer.branch
            layers_json.append(entry)
        previous = names
        for init, part, args in layer.bindings:
            claimed.add(init)
            if init in keep_set:
                continue
            sources = tuple(f"{n}.{part}" for n in names) if part else ()
            bindings.append(
                Binding(
                    init,
                    tuple(int(d) for d in loaded.initializers[init].dims),
                    sources=sources,
                    **args,
                )
            )
        inference.append(
            {
                "layer": names if len(names) > 1 else names[0],
                "node": reader.label(layer.node),
                "kind": layer.fields["kind"],
                "activation": layer.activation,
                "activation_param": layer.activation_param,
                "activation_from": layer.activation_from,
                "role": layer.role,
                "branch": layer.branch,
                "initializers": [init for init, _, _ in layer.bindings],
            }
        )
    kept, constants = reader.leftovers(claimed)
    kept.extend(sorted(keep_set & claimed))
    request = {"seed": seed, "dtype": dtype, "layout": "out_in", "layers": layers_json}
    return Translation(
        request,
        tuple(bindings),
        tuple(inference),
        tuple(kept),
        tuple(constants),
        tuple(reader.notes),
    )
