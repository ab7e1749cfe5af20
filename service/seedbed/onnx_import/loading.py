"""From uploaded bytes to a model whose graph is safe to walk.

The model is parsed with the `onnx` package's protobuf classes and never executed: nothing here
runs an operator, loads external data or follows a path named inside the file. Every refusal
is a `ModelRefused` with a code:

    empty_model        no bytes
    not_onnx           the bytes are not an ONNX ModelProto (not protobuf, truncated, no graph)
    too_large          more bytes than the configured limit (413)
    cyclic_graph       a node depends on its own output
    undefined_input    a node reads a value nothing produces
    duplicate_output   two nodes (or a node and an initializer) produce the same value
    graph_too_large    more nodes or initializers than MAX_NODES / MAX_INITIALIZERS
"""

from __future__ import annotations

from collections import deque
from dataclasses import dataclass

import onnx
from google.protobuf.message import DecodeError

from seedbed.onnx_import.refusals import ModelRefused

# Far above any real network's node count, yet bounded so a hostile file cannot make the walk
# quadratic in something huge.
MAX_NODES = 200_000
MAX_INITIALIZERS = 100_000


@dataclass(frozen=True)
class LoadedModel:
    model: onnx.ModelProto
    order: tuple[int, ...]  # node indices, each after every node whose output it reads
    initializers: dict[str, onnx.TensorProto]
    opset: int  # of the default ("" / ai.onnx) domain


def parse_model(data: bytes, limit: int) -> LoadedModel:
    if not data:
        raise ModelRefused("empty_model", "the upload is empty; send an ONNX model file")
    if len(data) > limit:
        raise ModelRefused(
            "too_large",
            f"the model is {len(data)} bytes; at most {limit} are "
            "accepted (SEEDBED_MAX_ONNX_BYTES)",
            status=413,
        )
    model = onnx.ModelProto()
    try:
        model.ParseFromString(data)
    except (DecodeError, RuntimeError, ValueError) as exc:
        raise ModelRefused(
            "not_onnx",
            "the upload is not an ONNX model (a protobuf ModelProto): "
            f"{str(exc)[:160] or 'it does not decode'}; a truncated file "
            "reads the same way",
        ) from None
    graph = model.graph
    if not model.HasField("graph") or not graph.node:
        # Random bytes sometimes decode as an empty message: an ONNX file always has a graph.
        raise ModelRefused(
            "not_onnx",
            "the upload decodes as protobuf but holds no ONNX graph "
            "with nodes (truncated, or not an ONNX model file)",
        )
    if len(graph.node) > MAX_NODES or len(graph.initializer) > MAX_INITIALIZERS:
        raise ModelRefused(
            "graph_too_large",
            f"the graph has {len(graph.node)} nodes and "
            f"{len(graph.initializer)} initializers; at most {MAX_NODES} and "
            f"{MAX_INITIALIZERS} are read",
            status=413,
        )
    opset = 0
    for entry in model.opset_import:
        if entry.domain in ("", "ai.onnx"):
            opset = int(entry.version)
    if opset == 0:
        raise ModelRefused(
            "not_onnx",
            "the model imports no opset of the standard (ai.onnx) "
            "domain, so its operators have no defined meaning",
        )
    initializers: dict[str, onnx.TensorProto] = {}
    for init in graph.initializer:
        if init.name in initializers:
            raise ModelRefused(
                "duplicate_output",
                f"initializer {init.name!r} is defined twice",
                names=(init.name,),
            )
        initializers[init.name] = init
    return LoadedModel(model, _dependency_order(graph, initializers), initializers, opset)


def _dependency_order(
    graph: onnx.GraphProto, initializers: dict[str, onnx.TensorProto]
) -> tuple[int, ...]:
    """Kahn's algorithm over the values nodes read and write; refuses cycles and dangling reads."""
    available = set(initializers) | {v.name for v in graph.input} | {""}
    producer: dict[str, int] = {}
    for i, node in enumerate(graph.node):
        for out in node.output:
            if not out:
                continue
            if out in producer or out in initializers:
                raise ModelRefused(
                    "duplicate_output",
                    f"value {out!r} is produced twice (node {_label(node, i)} and another)",
                    names=(out,),
                )
            producer[out] = i
    waiting = [0] * len(graph.node)
    readers: dict[int, list[int]] = {}
    for i, node in enumerate(graph.node):
        for name in set(node.input):
            if name in available and name not in producer:
                continue
            if name not in producer:
                raise ModelRefused(
                    "undefined_input",
                    f"node {_label(node, i)} reads {name!r}, "
                    "which no node, graph input or initializer provides",
                    names=(name,),
                )
            waiting[i] += 1
            readers.setdefault(producer[name], []).append(i)
    ready = deque(i for i, count in enumerate(waiting) if count == 0)
    order: list[int] = []
    while ready:
        i = ready.popleft()
        order.append(i)
        for j in readers.get(i, ()):
            waiting[j] -= 1
            if waiting[j] == 0:
                ready.append(j)
    if len(order) != len(graph.node):
        stuck = [_label(graph.node[i], i) for i, count in enumerate(waiting) if count][:5]
        raise ModelRefused(
            "cyclic_graph",
            f"the graph has a cycle: these nodes wait on their own outputs: {', '.join(stuck)}",
            names=tuple(stuck),
        )
    return tuple(order)


def _label(node: onnx.NodeProto, index: int) -> str:
    return f"{node.name!r} ({node.op_type})" if node.name else f"#{index} ({node.op_type})"
