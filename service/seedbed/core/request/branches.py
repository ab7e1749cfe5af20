"""Residual branches: which layers form one, and the checks on their use.

A *branch* is a run of consecutive layers with the same `branch` name. Its input (the output
of the layer before the run, or the network input) is added to the output of its last layer.
The branch's *last map* is its last layer with a weight matrix (dense, conv, attention,
recurrent): the layer that residual rules (Fixup's zero layer, scaled residual outputs) act
on. A norm after it inside the branch (a post-norm conv block) does not change which layer
that is.

Parsing computes the branches once (`ParsedRequest.branches`); everything downstream takes
them from there.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

from seedbed.core.request.layers import (
    AnyLayer,
    AttentionLayer,
    ConvLayer,
    DenseLayer,
    NormLayer,
    RecurrentLayer,
)
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.problems import Problem

# Layer kinds with a weight matrix: the maps a residual branch is made of.
MAP_KINDS: frozenset[str] = frozenset({"dense", "conv", "attention", "recurrent"})


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


def branch_problems(layers: Sequence[AnyLayer], branches: Sequence[Branch]) -> list[Problem]:
    """Misuse of `branch`: a layer's name, a name reused further down, an output layer inside
    a branch, or a branch whose output width differs from its input width."""
    names = {layer.name: i for i, layer in enumerate(layers)}
    problems: list[Problem] = []
    ended: dict[str, int] = {}
    for b in branches:
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
        problems.extend(_width_problems(layers, b))
    return problems


def _width_problems(layers: Sequence[AnyLayer], b: Branch) -> list[Problem]:
    first, last = layers[b.start], layers[b.stop - 1]
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
