"""Widths that chain: each layer reads what the layer before it writes, as far as a request says.

A request lists layers in signal order, so layer i reads the output of layer i-1 unless it says
otherwise with `reads`: the names of earlier layers whose outputs are concatenated into its
input (checked against their sum), or an empty list for an input of the network (nothing to
check). A request whose layers are a collection rather than a network says `"widths":
"unchecked"`, and then only branches are checked. `chain_problems` checks the widths the
request can know, refusing what plan and weights used to accept silently (a `dense 64->32`
followed by a `dense 33->10`). What the request cannot know is not refused:

* The stream after a conv is a *map* (channels on a grid). A dense, recurrent or attention
  layer after a map sits behind a flatten or a pooling whose size the request does not carry
  (channels x positions, or channels), so its input width is not checked; a norm after a map
  normalises the channels or the flattened map, so it is not checked either. The next conv
  after such a norm is checked against the norm's dim.
* A conv after dense, recurrent or attention layers sits behind a reshape of features into a
  grid (a generator's dense -> channels x height x width), so it is not checked.
* An embedding writes one vector per token, read as features (dense, attention, recurrent,
  norm) or as the channels of a 1-d conv over the sequence: what follows is always checked.
  An embedding reads token ids, so nothing is checked into it.

Residual branches are stricter, because a branch's output is *added* to its input: every step
inside a branch and the step into its first layer is checked whatever the kinds, a branch may
not hold an embedding (its input is token ids, not the branch's input), and its layers may not
use `reads`. The check that a branch's output width equals its input width is
`branches.branch_problems`; a width it already reports is not reported twice.

API: chain_problems(parsed, limits) -> [Problem] (one of the request-wide checks `parse`
runs, see checks.py); stream_widths(request) -> [(width, domain)].
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Literal

from seedbed.core.request.branches import Branch, branch_problems, input_width, output_width
from seedbed.core.request.layers import AnyLayer
from seedbed.core.request.limits import Limits
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.problems import Problem
from seedbed.core.request.suggest import did_you_mean

# What the stream between two layers is: features per sample or token, a map of channels on a
# grid (after a conv), or token vectors from an embedding (readable as either).
Domain = Literal["features", "map", "tokens"]
READS_DOC = 'docs/service.md, "Widths that chain"'


@dataclass(frozen=True)
class _Out:
    index: int
    width: int
    field: str
    domain: Domain


def _domain_after(layer: AnyLayer, before: Domain) -> Domain:
    if layer.kind == "conv":
        return "map"
    if layer.kind == "embedding":
        return "tokens"
    if layer.kind == "norm":
        return before
    return "features"


def _knowable(reader: AnyLayer, domain: Domain) -> bool:
    """Whether the request fixes the width `reader` sees when the stream is `domain`."""
    if reader.kind == "embedding":
        return False
    if domain == "tokens":
        return True
    if reader.kind == "conv":
        return domain == "map"
    return domain == "features"


def _outputs(request: NetworkRequest) -> list[_Out]:
    """Each layer's output width and the stream's domain after it, in order."""
    out: list[_Out] = []
    domain: Domain = "features"
    for i, layer in enumerate(request.layers):
        domain = _domain_after(layer, domain)
        width, field = output_width(layer)
        out.append(_Out(i, width, field, domain))
    return out


def _describe(request: NetworkRequest, k: int) -> str:
    return f"layers[{k}] {request.layers[k].name!r}"


def _mismatch(request: NetworkRequest, i: int, sources: list[_Out], why: str = "") -> Problem:
    layer = request.layers[i]
    into = input_width(layer)
    assert into is not None  # callers check first
    width, field = into
    total = sum(s.width for s in sources)
    if len(sources) == 1:
        s = sources[0]
        given = f"{_describe(request, s.index)} writes {s.width} ({s.field})"
    else:
        parts = " + ".join(
            f"{s.width} ({s.field} of {_describe(request, s.index)})" for s in sources
        )
        given = f"its `reads` join {parts} = {total}"
    other = (
        ""
        if layer.reads is not None
        else ", or, when this layer does not read the layer before it, name what it reads in "
        f"`reads` (see {READS_DOC})"
    )
    return Problem(
        f"layers[{i}].{field}",
        "invalid_value",
        f"{_describe(request, i)} takes {width} inputs ({field}) but {given}{why}; allowed: "
        f"{field} = {total}{other}",
    )


def _reads_problems(
    request: NetworkRequest, i: int, outs: list[_Out]
) -> tuple[list[Problem], list[_Out]]:
    """Problems with layer i's `reads`, and its resolved sources (empty when unresolved)."""
    layer = request.layers[i]
    names = layer.reads or []
    earlier = {request.layers[k].name: k for k in range(i)}
    problems: list[Problem] = []
    sources: list[_Out] = []
    for j, name in enumerate(names):
        k = earlier.get(name)
        if k is not None:
            sources.append(outs[k])
            continue
        if name == layer.name:
            why = "a layer cannot read its own output"
        elif any(other.name == name for other in request.layers[i + 1 :]):
            why = "it comes later; a layer reads only layers before it"
        else:
            why = "no layer has that name; allowed: names of layers before this one" + did_you_mean(
                name, list(earlier)
            )
        problems.append(
            Problem(
                f"layers[{i}].reads[{j}]",
                "invalid_value",
                f"{layer.name!r} reads {name!r}, but {why}",
            )
        )
    return problems, ([] if problems else sources)


def chain_problems(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    """Every step where a layer's input width differs from what it reads, and misuse of
    `reads` and of branches that the chain rule depends on."""
    request = parsed.request
    told = {p.field for p in branch_problems(request.layers, parsed.branches)}
    return [p for p in _chain(request, parsed.branches) if p.field not in told]


def _chain(request: NetworkRequest, branches: tuple[Branch, ...]) -> list[Problem]:
    layers = request.layers
    outs = _outputs(request)
    in_branch = {k: b for b in branches for k in b.indices}
    problems: list[Problem] = []
    unchecked = request.widths == "unchecked"
    for i, layer in enumerate(layers):
        branch = in_branch.get(i)
        if branch is not None and layer.kind == "embedding":
            problems.append(
                Problem(
                    f"layers[{i}].branch",
                    "not_allowed",
                    f"{_describe(request, i)} is an embedding inside residual branch "
                    f"{branch.name!r}: an embedding reads token ids, not the branch's input, so "
                    "nothing can be added back to it; allowed: an embedding outside branches "
                    "(usually the first layer)",
                )
            )
            continue
        if layer.reads is not None:
            if branch is not None:
                problems.append(
                    Problem(
                        f"layers[{i}].reads",
                        "not_allowed",
                        f"{_describe(request, i)} is inside residual branch {branch.name!r}, whose "
                        "layers read the branch's own stream; allowed: reads on layers outside "
                        "branches",
                    )
                )
                continue
            found, sources = _reads_problems(request, i, outs)
            problems += found
            into = input_width(layer)
            if (
                sources
                and into is not None
                and not unchecked
                and all(_knowable(layer, s.domain) for s in sources)
                and into[0] != sum(s.width for s in sources)
            ):
                problems.append(_mismatch(request, i, sources))
            continue
        if i == 0 or (unchecked and branch is None):
            continue
        into = input_width(layer)
        if into is None:
            continue
        before = outs[i - 1]
        strict = branch is not None  # inside a branch, or its first layer
        if not strict and not _knowable(layer, before.domain):
            continue
        if into[0] != before.width:
            why = (
                f" (inside residual branch {branch.name!r} every width must chain: the "
                "branch's output is added to its input)"
                if strict and branch
                else ""
            )
            problems.append(_mismatch(request, i, [before], why))
    return problems


def stream_widths(request: NetworkRequest) -> list[tuple[int, Domain]]:
    """(output width, domain of the stream) after each layer: what the next layer reads."""
    return [(o.width, o.domain) for o in _outputs(request)]


__all__ = ["READS_DOC", "Domain", "chain_problems", "stream_widths"]
