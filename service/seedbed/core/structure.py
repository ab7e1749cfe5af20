"""Residual structure: block shorthands expanded into layers, and the branches of a network.

Block shorthands (`transformer_block`, `residual_conv_block`, models in seedbed.core.spec) are
expanded here into basic layers carrying `branch` and `block`, deterministically and with
documented names (see the models' docstrings and docs/depth.md), so that everything after
parsing — plan, render, diagnostics, web — sees only the six basic kinds.

A *branch* is a run of consecutive layers with the same `branch` name. Its input (the output
of the layer before the run, or the network input) is added to the output of its last layer.
The branch's *last map* is its last layer with a weight matrix (dense, conv, attention,
recurrent): the layer that residual rules (Fixup's zero layer, scaled residual outputs) act
on. A norm after it inside the branch (a post-norm conv block) does not change which layer
that is.

API:
    check_expanded_count(data, limits)       refuse a raw body whose blocks expand too far,
                                             from the shorthands' numbers alone
    expand_layers(items, context) -> layers  validated items with blocks replaced (spec uses it)
    block_layer_dicts(block) -> [dict]       the basic layers of one block, as request JSON
    branches_of(request) -> [Branch]         the branches, in order
    branch_problems(request) -> [Problem]    misuse of `branch`, checked by parse_request
    input_width(layer), output_width(layer)  feature widths where the kind fixes them
    relocate_problems(problems, raw, request)  problems of expanded layers pointed at the
                                             fields of the request as written
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from seedbed.core.limits import Limits, raised_by
from seedbed.core.problems import Problem, RequestRejected, describe_input
from seedbed.core.spec import (
    BLOCK_MODELS,
    CONV_BRANCH_PART,
    CONV_LAYER_PARTS,
    LAYER_MODELS,
    TRANSFORMER_LAYER_PARTS,
    AnyLayer,
    AttentionLayer,
    ConvLayer,
    DenseLayer,
    NetworkRequest,
    NormLayer,
    RecurrentLayer,
    ResidualConvBlock,
    TransformerBlock,
    _BlockBase,
)

# Layer kinds with a weight matrix: the maps a residual branch is made of.
MAP_KINDS: frozenset[str] = frozenset({"dense", "conv", "attention", "recurrent"})


# ---------------------------------------------------------------------------------------------
# Counting and expanding block shorthands


def _is_block(item: object) -> bool:
    """A raw layer item that names a block kind (kind may be any JSON value here)."""
    if not isinstance(item, Mapping):
        return False
    kind = item.get("kind")
    return isinstance(kind, str) and kind in BLOCK_MODELS


def _raw_count(item: object) -> int:
    """Layers a raw layer item stands for, from its numbers alone (1 for anything unclear).

    Anything malformed counts as one layer here and is reported by validation afterwards.
    """
    if not isinstance(item, Mapping) or not _is_block(item):
        return 1
    repeat = item.get("repeat", 1)
    if isinstance(repeat, bool) or not isinstance(repeat, int) or repeat < 1:
        repeat = 1
    if item["kind"] == "transformer_block":
        return repeat * len(TRANSFORMER_LAYER_PARTS)
    return repeat * (2 if item.get("norm") is None else len(CONV_LAYER_PARTS))


def _number(n: object) -> str:
    """A count for a message; huge integers by their magnitude (str() of one may be refused)."""
    if isinstance(n, int) and not isinstance(n, bool) and n.bit_length() > 80:
        return f"about 10^{int(n.bit_length() * 0.30103)}"
    return describe_input(n).removeprefix("the integer ")


def check_expanded_count(data: object, limits: Limits) -> None:
    """Refuse a body whose layers, after expanding block shorthands, exceed the layer limit.

    Looks only at each block's kind, repeat and norm (no expansion, no validation), so a
    repeat of 10**9 costs one multiplication. Call after `limits.check_layer_count`.
    """
    if not isinstance(data, dict) or not isinstance(data.get("layers"), list):
        return
    counts = [_raw_count(item) for item in data["layers"]]
    total = sum(counts)
    if total <= limits.max_layers:
        return
    biggest = max(range(len(counts)), key=counts.__getitem__)
    item = data["layers"][biggest]
    repeat = _number(item.get("repeat", 1))
    what = (f"; layers[{biggest}] (a {item['kind']} with repeat {repeat}) alone expands to "
            f"{_number(counts[biggest])}" if counts[biggest] > 1 else "")
    field = f"layers[{biggest}].repeat" if counts[biggest] > limits.max_layers else "layers"
    raise RequestRejected([Problem(
        field, "too_large",
        f"the layers expand to {_number(total)} layers{what}; the limit is {limits.max_layers} "
        "layers per request, counted after expanding block shorthands"
        f"{raised_by('max_layers')}")])  # fmt: skip


def _activation(block: _BlockBase) -> dict[str, Any]:
    out: dict[str, Any] = {"activation": block.activation}
    if block.activation_param is not None:
        out["activation_param"] = block.activation_param
    return out


def _transformer_copy(block: TransformerBlock, i: int) -> list[dict[str, Any]]:
    p = f"{block.name}.{i}."
    attn_branch, mlp_branch = p + "attn_branch", p + "mlp_branch"
    common = {"bias": block.bias, "block": block.name}
    pre = block.norm == "pre"
    attn_norm = {"name": p + "attn_norm", "kind": "norm", "dim": block.dim, **common}
    mlp_norm = {"name": p + "mlp_norm", "kind": "norm", "dim": block.dim, **common}
    if pre:
        attn_norm["branch"], mlp_norm["branch"] = attn_branch, mlp_branch
    attn = {"name": p + "attn", "kind": "attention", "dim": block.dim, "heads": block.heads,
            "role": "residual_out", "branch": attn_branch, **common}
    mlp_in = {"name": p + "mlp_in", "kind": "dense", "n_in": block.dim, "n_out": block.mlp_dim,
              **_activation(block), "branch": mlp_branch, **common}
    mlp_out = {"name": p + "mlp_out", "kind": "dense", "n_in": block.mlp_dim,
               "n_out": block.dim, "role": "residual_out", "branch": mlp_branch, **common}
    if pre:
        return [attn_norm, attn, mlp_norm, mlp_in, mlp_out]
    return [attn, attn_norm, mlp_in, mlp_out, mlp_norm]


def _conv_copy(block: ResidualConvBlock, i: int) -> list[dict[str, Any]]:
    p = f"{block.name}.{i}."
    common = {"bias": block.bias, "block": block.name, "branch": p + CONV_BRANCH_PART}
    act = _activation(block)

    def conv(k: int, inner: dict[str, Any], role: str = "hidden") -> dict[str, Any]:
        return {"name": f"{p}conv{k}", "kind": "conv", "channels_in": block.channels,
                "channels_out": block.channels, "kernel": list(block.kernel), "role": role,
                **inner, **common}

    def norm(k: int, inner: dict[str, Any]) -> dict[str, Any]:
        return {"name": f"{p}norm{k}", "kind": "norm", "dim": block.channels, **inner, **common}

    if block.norm is None:
        return [conv(1, act), conv(2, {}, "residual_out")]
    if block.norm == "post":
        return [conv(1, {}), norm(1, act), conv(2, {}, "residual_out"), norm(2, {})]
    return [norm(1, act), conv(1, {}), norm(2, act), conv(2, {}, "residual_out")]


def block_layer_dicts(block: _BlockBase) -> list[dict[str, Any]]:
    """The basic layers of a validated block shorthand, in signal order, as request JSON."""
    out: list[dict[str, Any]] = []
    for i in range(block.repeat):
        if isinstance(block, TransformerBlock):
            out.extend(_transformer_copy(block, i))
        elif isinstance(block, ResidualConvBlock):
            out.extend(_conv_copy(block, i))
        else:  # pragma: no cover - every block model is handled above
            raise TypeError(f"not a block model: {type(block).__name__}")
    return out


def expand_layers(items: Sequence[Any], context: Any) -> list[AnyLayer]:
    """Validated layer items with every block replaced by its validated basic layers.

    The count has been checked against the limit by the caller; `context` is passed on so the
    expanded names meet the same limits as written ones.
    """
    out: list[AnyLayer] = []
    for item in items:
        if isinstance(item, _BlockBase):
            for data in block_layer_dicts(item):
                model = LAYER_MODELS[data["kind"]]
                out.append(model.model_validate(data, context=context))  # type: ignore[arg-type]
        else:
            out.append(item)
    return out


# ---------------------------------------------------------------------------------------------
# Branches


@dataclass(frozen=True)
class Branch:
    """A residual branch: layers[start:stop] of the request, all with `branch == name`."""

    name: str
    start: int
    stop: int  # one past the last layer
    maps: tuple[int, ...]  # indices of the layers with weight matrices, in order

    @property
    def indices(self) -> range:
        return range(self.start, self.stop)

    @property
    def last_map(self) -> int | None:
        """Index of the map whose output closes the branch (None: a branch of norms only)."""
        return self.maps[-1] if self.maps else None


def branches_of(request: NetworkRequest) -> list[Branch]:
    """The branches of a request, in order (one entry per consecutive run of a name)."""
    out: list[Branch] = []
    layers = request.layers
    i = 0
    while i < len(layers):
        name = layers[i].branch
        if name is None:
            i += 1
            continue
        j = i
        while j < len(layers) and layers[j].branch == name:
            j += 1
        maps = tuple(k for k in range(i, j) if layers[k].kind in MAP_KINDS)
        out.append(Branch(name, i, j, maps))
        i = j
    return out


def branch_of_layer(request: NetworkRequest) -> dict[int, Branch]:
    """Layer index -> the branch it belongs to (layers outside branches are absent)."""
    return {k: b for b in branches_of(request) for k in b.indices}


def input_width(layer: AnyLayer) -> tuple[int, str] | None:
    """(features a layer reads, the field that says so), or None when the kind has no width."""
    if isinstance(layer, DenseLayer | RecurrentLayer):
        return layer.n_in, "n_in"
    if isinstance(layer, ConvLayer):
        return layer.channels_in, "channels_in"
    if isinstance(layer, AttentionLayer | NormLayer):
        return layer.dim, "dim"
    return None  # embedding: token ids


def output_width(layer: AnyLayer) -> tuple[int, str]:
    """(features a layer writes, the field that says so)."""
    if isinstance(layer, DenseLayer):
        return layer.n_out, "n_out"
    if isinstance(layer, ConvLayer):
        return layer.channels_out, "channels_out"
    if isinstance(layer, RecurrentLayer):
        return layer.hidden, "hidden"
    return layer.dim, "dim"


def branch_problems(request: NetworkRequest) -> list[Problem]:
    """Misuse of `branch`: a layer's name, a name reused further down, an output layer inside
    a branch, or a branch whose output width differs from its input width."""
    layers = request.layers
    names = {layer.name: i for i, layer in enumerate(layers)}
    problems: list[Problem] = []
    ended: dict[str, int] = {}
    for b in branches_of(request):
        field = f"layers[{b.start}].branch"
        if b.name in names:
            problems.append(Problem(
                field, "invalid_value",
                f"branch name {b.name!r} is also the name of layers[{names[b.name]}]; branch "
                "names must differ from layer names"))  # fmt: skip
        if b.name in ended:
            problems.append(Problem(
                field, "invalid_value",
                f"branch {b.name!r} already ended at layers[{ended[b.name]}]; the layers of a "
                "branch must be consecutive (give a later branch its own name)"))  # fmt: skip
        ended[b.name] = b.stop - 1
        for k in b.indices:
            if layers[k].role == "output":
                problems.append(Problem(
                    f"layers[{k}].role", "not_allowed",
                    f"the network's output layer cannot be inside residual branch {b.name!r}: "
                    "a branch's output is added back to its input; allowed roles inside a "
                    "branch: hidden, residual_out"))  # fmt: skip
        problems.extend(_width_problems(request, b))
    return problems


def _width_problems(request: NetworkRequest, b: Branch) -> list[Problem]:
    first, last = request.layers[b.start], request.layers[b.stop - 1]
    into = input_width(first)
    out, out_field = output_width(last)
    if into is None or into[0] == out:
        return []
    width, in_field = into
    return [Problem(
        f"layers[{b.stop - 1}].{out_field}", "invalid_value",
        f"branch {b.name!r} adds its input to its output, so they need the same width: its "
        f"input has {width} features ({in_field} of layers[{b.start}] {first.name!r}) and its "
        f"output {out} ({out_field} of layers[{b.stop - 1}] {last.name!r}); allowed: "
        f"{out_field} = {width}")]  # fmt: skip


# ---------------------------------------------------------------------------------------------
# Pointing problems of expanded layers at what the caller wrote

_LAYER_REF = re.compile(r"layers\[(\d+)\]((?:\.[a-z_]+)*)")


def relocate_problems(problems: Sequence[Problem], raw_layers: Sequence[Any],
                      request: NetworkRequest) -> list[Problem]:
    """Problems found on the expanded request, with paths into the request as written.

    A layer written by the caller keeps its fields under its original index. A layer made by a
    block points at the block (and at its name when the name is at fault), the message says
    which expanded layer is meant, and the same problem on many layers of one block is told
    once with a count. Without blocks nothing changes.
    """
    origin: list[tuple[int, bool]] = []
    for j, item in enumerate(raw_layers):
        is_block = _is_block(item)
        origin.extend([(j, is_block)] * _raw_count(item))
    if not any(is_block for _, is_block in origin) or len(origin) != len(request.layers):
        return list(problems)

    def ref(m: re.Match[str]) -> str:
        k = int(m.group(1))
        if k >= len(origin):
            return m.group(0)
        j, is_block = origin[k]
        if is_block:
            return f"layers[{j}] (its layer {request.layers[k].name!r})"
        return f"layers[{j}]{m.group(2)}"

    out: list[Problem] = []
    repeats: dict[tuple[str, str], int] = {}
    for p in problems:
        message = _LAYER_REF.sub(ref, p.message)
        head = _LAYER_REF.match(p.field)
        if head is None or int(head.group(1)) >= len(origin):
            out.append(Problem(p.field, p.code, message))
            continue
        k = int(head.group(1))
        j, is_block = origin[k]
        rest = p.field[len(f"layers[{k}]"):]
        if not is_block:
            out.append(Problem(f"layers[{j}]{rest}", p.code, message))
            continue
        field = f"layers[{j}]" + (".name" if rest == ".name" else "")
        if (field, p.code) in repeats:
            repeats[field, p.code] += 1
            continue
        repeats[field, p.code] = 0
        out.append(Problem(field, p.code, f"in layer {request.layers[k].name!r}, expanded from "
                                          f"layers[{j}]: {message}"))  # fmt: skip
    return [_with_count(p, repeats) for p in out]


def _with_count(p: Problem, repeats: dict[tuple[str, str], int]) -> Problem:
    more = repeats.get((p.field, p.code), 0)
    if not more:
        return p
    return Problem(p.field, p.code, f"{p.message} (and {more} more like it from the same block)")


__all__ = [
    "MAP_KINDS",
    "Branch",
    "block_layer_dicts",
    "branch_of_layer",
    "branch_problems",
    "branches_of",
    "check_expanded_count",
    "expand_layers",
    "input_width",
    "output_width",
    "relocate_problems",
]
