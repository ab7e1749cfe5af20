"""The network as the simulation sees it: an ordered list of steps with their geometry.

The synthetic signal is an array of shape (batch, *grid, features): features last, and a grid
of positions that every layer shares. Which grid a network gets (fixed, small, documented):

* first layer an embedding: a sequence of `SEQUENCE_LENGTH` tokens (longer if a 1-d conv kernel
  needs it);
* otherwise, if the network has a conv: the first conv's number of spatial dims, with
  `GRID_SIDE[d]` positions per dim (64 positions in 1, 2 and 3 dims), larger if a kernel is;
* otherwise, if it has an attention layer: a sequence of `SEQUENCE_LENGTH` tokens;
* otherwise (an MLP): no grid, one vector per sample.

Dense and norm layers act on the features at every position; attention attends over all
positions (the flattened grid); convs need the grid to have as many dims as their kernel.
Strided convs shrink the grid (ceil(n/s)), transposed convs with stride s enlarge it (n*s).

Residual structure: a layer's optional `branch` attribute (see seedbed.core.request.branches);
consecutive
layers with the same branch form one branch, whose input is added to its last layer's output,
after multiplying that output by the 1-element tensors "<branch>.gate" and
"<branch>.multiplier" when the plan has them. The branch's input and output must have the same
features and grid.

Refused, with the field and what is allowed: recurrent layers (not simulated), an embedding
anywhere but first, convs whose kernel has a different number of dims than the grid, and width
or grid mismatches between consecutive layers or across a branch.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.problems import Problem, RequestRejected

SEQUENCE_LENGTH = 16
GRID_SIDE: dict[int, int] = {1: 64, 2: 8, 3: 4}
SIMULATED_KINDS = ("dense", "conv", "attention", "norm", "embedding")


@dataclass(frozen=True)
class Step:
    """One layer of the request, with what the simulation needs to know about it."""

    index: int  # position in request.layers
    layer: Any  # the validated layer model
    name: str
    kind: str
    activation: str
    activation_param: float | None
    role: str
    branch: str | None
    branch_start: bool  # first layer of its branch
    branch_end: bool  # last layer of its branch: its output is added to the branch input
    in_features: int
    out_features: int
    grid_in: tuple[int, ...]
    grid_out: tuple[int, ...]

    @property
    def on_main_path(self) -> bool:
        """Its output (after the residual sum for a branch end) is the network's stream."""
        return self.branch is None or self.branch_end


@dataclass(frozen=True)
class Network:
    steps: tuple[Step, ...]
    input_grid: tuple[int, ...]
    input_features: int  # for an embedding first: its dim (the input is token ids)
    vocab: int | None  # set when the first layer is an embedding

    def positions(self, grid: tuple[int, ...]) -> int:
        return math.prod(grid)


def _in_field(kind: str) -> str:
    return {"dense": "n_in", "conv": "channels_in", "attention": "dim", "norm": "dim"}[kind]


def _widths(layer: Any) -> tuple[int, int]:
    kind = layer.kind
    if kind == "dense":
        return layer.n_in, layer.n_out
    if kind == "conv":
        return layer.channels_in, layer.channels_out
    if kind == "embedding":
        return layer.dim, layer.dim
    return layer.dim, layer.dim  # attention, norm


def _initial_grid(layers: list[Any]) -> tuple[int, ...]:
    convs = [lay for lay in layers if lay.kind == "conv"]
    if layers[0].kind == "embedding":
        longest = max((lay.kernel[0] for lay in convs if len(lay.kernel) == 1), default=1)
        return (max(SEQUENCE_LENGTH, longest),)
    if convs:
        dims = len(convs[0].kernel)
        side = GRID_SIDE[dims]
        for lay in convs:
            if len(lay.kernel) == dims:
                side = max(side, *lay.kernel)
        return (side,) * dims
    if any(lay.kind == "attention" for lay in layers):
        return (SEQUENCE_LENGTH,)
    return ()


def _grid_after(layer: Any, grid: tuple[int, ...]) -> tuple[int, ...]:
    if layer.kind != "conv":
        return grid
    stride = layer.stride or [1] * len(layer.kernel)
    if layer.transposed:
        return tuple(n * s for n, s in zip(grid, stride, strict=True))
    return tuple(-(-n // s) for n, s in zip(grid, stride, strict=True))


def _branch_flags(parsed: ParsedRequest) -> list[tuple[bool, bool]]:
    """(branch_start, branch_end) per layer, from the branches found at parse time."""
    out = [(False, False)] * len(parsed.request.layers)
    for b in parsed.branches:
        out[b.start] = (True, out[b.start][1])
        out[b.stop - 1] = (out[b.stop - 1][0], True)
    return out


def _shape_text(features: int, grid: tuple[int, ...]) -> str:
    where = f" on a grid of {list(grid)} positions" if grid else ""
    return f"{features} features{where}"


def build_network(parsed: ParsedRequest) -> Network:
    """The steps of a parsed request, or RequestRejected naming every unsupported layer."""
    layers = list(parsed.request.layers)
    problems: list[Problem] = []
    if parsed.request.widths == "unchecked":
        problems.append(
            Problem(
                "widths",
                "not_allowed",
                'widths "unchecked" says the layers are a collection, not one network; '
                "diagnostics run a signal through the layers in order, so they need layers that "
                "chain: omit widths",
            )
        )
    for i, lay in enumerate(layers):
        if lay.reads is not None:
            problems.append(
                Problem(
                    f"layers[{i}].reads",
                    "not_allowed",
                    f"layer {lay.name!r} reads {list(lay.reads) or 'an input of the network'} "
                    "rather than the layer before it; diagnostics simulate one chain of layers. "
                    "Diagnose each path (the trunk with one head) as its own request",
                )
            )
        if lay.kind == "recurrent":
            problems.append(
                Problem(
                    f"layers[{i}].kind",
                    "not_allowed",
                    f"layer {lay.name!r} is recurrent; diagnostics do not simulate "
                    "recurrent layers "
                    f"(allowed: {', '.join(SIMULATED_KINDS)}, an embedding only as the first "
                    "layer). Diagnose the feed-forward part on its own.",
                )
            )
        elif lay.kind == "embedding" and i > 0:
            problems.append(
                Problem(
                    f"layers[{i}].kind",
                    "not_allowed",
                    f"layer {lay.name!r} is an embedding after layers[0]; diagnostics feed token "
                    "ids only to an embedding that is the first layer",
                )
            )
    if problems:
        raise RequestRejected(problems)

    grid = _initial_grid(layers)
    first_in, _ = _widths(layers[0])
    vocab = layers[0].vocab if layers[0].kind == "embedding" else None
    features = first_in
    flags = _branch_flags(parsed)
    steps: list[Step] = []
    branch_input: tuple[int, tuple[int, ...], int] | None = None  # features, grid, first index
    for i, lay in enumerate(layers):
        n_in, n_out = _widths(lay)
        if lay.kind != "embedding" and n_in != features:
            before = (
                f"layers[{i - 1}] ({layers[i - 1].name!r}) produces"
                if i
                else "the network input has"
            )
            problems.append(
                Problem(
                    f"layers[{i}].{_in_field(lay.kind)}",
                    "invalid_value",
                    f"layer {lay.name!r} expects {n_in} input features but {before} {features}; "
                    f"allowed: {features}",
                )
            )
        if lay.kind == "conv" and len(lay.kernel) != len(grid):
            problems.append(
                Problem(
                    f"layers[{i}].kernel",
                    "not_allowed",
                    f"layer {lay.name!r} has a {len(lay.kernel)}-d kernel but the simulated signal "
                    f"has {len(grid)} spatial dims here (grid {list(grid)}); diagnostics run every "
                    "conv of a network on one grid, so all kernels need the same number of dims",
                )
            )
            grid_out = grid
        else:
            grid_out = _grid_after(lay, grid)
        start, end = flags[i]
        if start:
            branch_input = (features, grid, i)
        steps.append(
            Step(
                index=i,
                layer=lay,
                name=lay.name,
                kind=lay.kind,
                activation=lay.activation or "linear",
                activation_param=lay.activation_param,
                role=lay.role,
                branch=getattr(lay, "branch", None),
                branch_start=start,
                branch_end=end,
                in_features=features if lay.kind != "embedding" else n_in,
                out_features=n_out,
                grid_in=grid,
                grid_out=grid_out,
            )
        )
        features, grid = n_out, grid_out
        if end and branch_input is not None:
            b_features, b_grid, b_first = branch_input
            if (b_features, b_grid) != (features, grid):
                problems.append(
                    Problem(
                        f"layers[{i}]",
                        "invalid_value",
                        f"residual branch {steps[-1].branch!r} (layers[{b_first}]..layers[{i}]) "
                        f"takes {_shape_text(b_features, b_grid)} but its last layer {lay.name!r} "
                        f"gives {_shape_text(features, grid)}; the two are added, so they must "
                        "match",
                    )
                )
            branch_input = None
    if problems:
        raise RequestRejected(problems)
    return Network(
        steps=tuple(steps), input_grid=_initial_grid(layers), input_features=first_in, vocab=vocab
    )


__all__ = ["GRID_SIDE", "SEQUENCE_LENGTH", "Network", "Step", "build_network"]
