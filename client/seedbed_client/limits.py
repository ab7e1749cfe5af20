"""The service's default request limits, checked so a request can be refused before it is sent.

The numbers and the raw-body checks (layer count before and after expanding block
shorthands) come from seedbed_client.wire_facts, which the service imports too: a request
refused here is refused by the service with the same code (a property test checks that). A
service started with larger SEEDBED_MAX_* settings accepts more than these: pass your own
`RequestLimits` to the client, or `limits=None` to leave every size check to the service.

Like the service, the checks run in stages and stop at the first that finds something: the
raw layer count, the count after expanding blocks, then names, then tensor sizes.

The element counts follow the tensor table of the service (one weight per dense/conv/embedding
layer, input + recurrent weights for recurrent cells with 1/4/3 gate blocks for simple/lstm/gru,
four dim x dim projections for attention, a vector or two for norm).
"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from dataclasses import dataclass, fields
from math import prod
from typing import Any

from seedbed_client import wire_facts
from seedbed_client.errors import Problem

__all__ = [
    "RequestLimits",
    "limit_problems",
]

# Largest single size field (n_in, channels_out, kernel entries ...): a signed 32-bit index.
MAX_SIZE = wire_facts.MAX_SIZE
GATE_BLOCKS: Mapping[str, int] = {cell: len(g) for cell, g in wire_facts.GATES.items()}
ATTENTION_PARTS = wire_facts.ATTENTION_PROJECTIONS


@dataclass(frozen=True)
class RequestLimits:
    """How large a request may be; the defaults are the service's defaults."""

    max_layers: int = wire_facts.DEFAULT_MAX_LAYERS
    max_tensor_elements: int = wire_facts.DEFAULT_MAX_TENSOR_ELEMENTS
    max_request_elements: int = wire_facts.DEFAULT_MAX_REQUEST_ELEMENTS
    max_orthogonal_dim: int = wire_facts.DEFAULT_MAX_ORTHOGONAL_DIM
    max_name_length: int = wire_facts.DEFAULT_MAX_NAME_LENGTH

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(
                    f"RequestLimits.{f.name} must be a positive integer, got {value!r}"
                )


@dataclass(frozen=True)
class _Tensor:
    name: str
    shape: tuple[int, ...]  # generation order: output axis first
    gate_blocks: int = 1
    is_bias: bool = False


def _size(layer: Mapping[str, Any], key: str) -> int | None:
    value = layer.get(key)
    if isinstance(value, bool) or not isinstance(value, int) or not 1 <= value <= MAX_SIZE:
        return None
    return value


def layer_tensors(layer: Mapping[str, Any]) -> list[_Tensor] | None:
    """The tensors one raw layer dict describes, or None when its size fields are not usable
    (the field checks report that; the size check skips the layer)."""
    kind = layer.get("kind")
    name = str(layer.get("name", ""))
    bias = layer.get("bias", kind != "embedding") is not False
    if kind == "dense":
        n_in, n_out = _size(layer, "n_in"), _size(layer, "n_out")
        if n_in is None or n_out is None:
            return None
        out = [_Tensor(f"{name}.weight", (n_out, n_in))]
        return out + ([_Tensor(f"{name}.bias", (n_out,), is_bias=True)] if bias else [])
    if kind == "conv":
        c_in, c_out = _size(layer, "channels_in"), _size(layer, "channels_out")
        groups = layer.get("groups", 1)
        kernel = layer.get("kernel")
        if (
            c_in is None
            or c_out is None
            or isinstance(groups, bool)
            or not isinstance(groups, int)
            or groups < 1
            or not isinstance(kernel, list | tuple)
            or not all(isinstance(k, int) and not isinstance(k, bool) and k > 0 for k in kernel)
        ):
            return None
        out = [_Tensor(f"{name}.weight", (c_out, c_in // groups, *kernel))]
        return out + ([_Tensor(f"{name}.bias", (c_out,), is_bias=True)] if bias else [])
    if kind == "embedding":
        vocab, dim = _size(layer, "vocab"), _size(layer, "dim")
        if vocab is None or dim is None:
            return None
        return [_Tensor(f"{name}.weight", (vocab, dim))]
    if kind == "recurrent":
        n_in, hidden = _size(layer, "n_in"), _size(layer, "hidden")
        blocks = GATE_BLOCKS.get(str(layer.get("cell")))
        if n_in is None or hidden is None or blocks is None:
            return None
        rows = blocks * hidden
        out = [
            _Tensor(f"{name}.input_weight", (rows, n_in), blocks),
            _Tensor(f"{name}.recurrent_weight", (rows, hidden), blocks),
        ]
        return out + ([_Tensor(f"{name}.bias", (rows,), blocks, is_bias=True)] if bias else [])
    if kind == "attention":
        dim = _size(layer, "dim")
        if dim is None:
            return None
        out = []
        for part in ATTENTION_PARTS:
            out.append(_Tensor(f"{name}.{part}.weight", (dim, dim)))
            if bias:
                out.append(_Tensor(f"{name}.{part}.bias", (dim,), is_bias=True))
        return out
    if kind == "norm":
        dim = _size(layer, "dim")
        if dim is None:
            return None
        out = [_Tensor(f"{name}.scale", (dim,))]
        return out + ([_Tensor(f"{name}.shift", (dim,), is_bias=True)] if bias else [])
    return None


def _orthogonal_problems(
    i: int, layer: Mapping[str, Any], tensors: list[_Tensor], cap: int
) -> Iterator[Problem]:
    init = layer.get("init")
    explicit = isinstance(init, Mapping) and init.get("method") == "orthogonal"
    for t in tensors:
        if t.is_bias or len(t.shape) < 2:
            continue
        if explicit:
            rows, cols = t.shape[0] // t.gate_blocks, prod(t.shape[1:])
            if max(rows, cols) > cap:
                yield Problem(
                    f"layers[{i}].init.method",
                    "too_large",
                    f"orthogonal initialisation of {t.name!r} needs a QR factorisation of a "
                    f"{rows} x {cols} matrix; the larger side may be at most {cap}",
                )
        elif init is None and t.name.endswith(".recurrent_weight") and t.shape[1] > cap:
            # The service initialises recurrent matrices orthogonal unless told otherwise.
            yield Problem(
                f"layers[{i}].hidden",
                "too_large",
                f"hidden = {t.shape[1]}: the recurrent matrix is initialised orthogonal, which "
                f"needs a {t.shape[1]} x {t.shape[1]} QR factorisation; hidden may be at most "
                f"{cap} (or give a non-orthogonal init override)",
            )


def _block_copy(block: Mapping[str, Any]) -> list[dict[str, Any]] | None:
    """The basic layers of one copy of a block shorthand, as raw dicts (sizes only), or None
    when its size fields are not usable."""
    name, bias = str(block.get("name", "")), block.get("bias", True)
    if block.get("kind") == "transformer_block":
        dim, heads, mlp = (block.get(k) for k in ("dim", "heads", "mlp_dim"))
        if not all(isinstance(v, int) and not isinstance(v, bool) for v in (dim, heads, mlp)):
            return None
        return [
            {"name": f"{name}.0.attn_norm", "kind": "norm", "dim": dim, "bias": bias},
            {"name": f"{name}.0.attn", "kind": "attention", "dim": dim, "bias": bias},
            {"name": f"{name}.0.mlp_norm", "kind": "norm", "dim": dim, "bias": bias},
            {"name": f"{name}.0.mlp_in", "kind": "dense", "n_in": dim, "n_out": mlp, "bias": bias},
            {"name": f"{name}.0.mlp_out", "kind": "dense", "n_in": mlp, "n_out": dim, "bias": bias},
        ]
    channels, kernel = block.get("channels"), block.get("kernel")
    conv = {"kind": "conv", "channels_in": channels, "channels_out": channels, "kernel": kernel,
            "bias": bias}  # fmt: skip
    out = [{**conv, "name": f"{name}.0.conv1"}, {**conv, "name": f"{name}.0.conv2"}]
    if block.get("norm") is not None:
        out += [{"name": f"{name}.0.norm{k}", "kind": "norm", "dim": channels, "bias": bias}
                for k in (1, 2)]  # fmt: skip
    return out


def limit_problems(request: Mapping[str, Any], limits: RequestLimits) -> list[Problem]:
    """Everything in a raw request dict that is over `limits`, as the service would report it.

    Only sizes and name lengths are judged here; a malformed layer is skipped (the service names
    its problem).
    """
    layers = request.get("layers")
    if not isinstance(layers, list | tuple):
        return []
    for check in (wire_facts.layer_count_refusal, wire_facts.expanded_count_refusal):
        refusal = check(layers, limits.max_layers)
        if refusal is not None:
            field, code, message = refusal
            # Word for word the service's refusal, which names the setting that raises it.
            return [Problem(field, code, message + wire_facts.raised_by("max_layers"))]
    names: list[Problem] = []
    for i, layer in enumerate(layers):
        name = layer.get("name") if isinstance(layer, Mapping) else None
        if isinstance(name, str) and len(name) > limits.max_name_length:
            names.append(
                Problem(
                    f"layers[{i}].name",
                    "invalid_value",
                    f"layer names have 1 to {limits.max_name_length} characters; got {len(name)}",
                )
            )
    if names:
        # The service validates every field before it looks at sizes.
        return names
    problems: list[Problem] = []
    total = 0
    for i, layer in enumerate(layers):
        if not isinstance(layer, Mapping):
            continue
        copies = 1
        parts: list[Mapping[str, Any]] = [layer]
        if wire_facts.is_block_item(layer):
            per_copy = _block_copy(layer) or []
            copies = wire_facts.raw_layer_count(layer) // max(1, len(per_copy))
            parts = list(per_copy)
        for part in parts:
            tensors = layer_tensors(part)
            if tensors is None:
                continue
            for t in tensors:
                count = prod(t.shape)
                total += count * copies
                if count > limits.max_tensor_elements:
                    problems.append(
                        Problem(
                            f"layers[{i}]",
                            "too_large",
                            f"tensor {t.name!r} would have {count} elements; the limit is "
                            f"{limits.max_tensor_elements} elements per tensor",
                        )
                    )
            problems.extend(_orthogonal_problems(i, part, tensors, limits.max_orthogonal_dim))
    if total > limits.max_request_elements:
        problems.append(
            Problem(
                "layers",
                "too_large",
                f"the request's tensors have {total} elements in total; the limit is "
                f"{limits.max_request_elements} elements per request",
            )
        )
    return problems
