"""Layer names used once per request (tensor names: seedbed.core.tensors)."""

from __future__ import annotations

from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.problems import Problem


def layer_name_problems(request: NetworkRequest) -> list[Problem]:
    """Layer names used more than once; each repeat names the first use."""
    first: dict[str, int] = {}
    problems: list[Problem] = []
    for i, layer in enumerate(request.layers):
        if layer.name in first:
            problems.append(
                Problem(
                    f"layers[{i}].name",
                    "duplicate_name",
                    f"layer name {layer.name!r} is already used by layers[{first[layer.name]}]"
                    ".name; layer names must be unique",
                )
            )
        else:
            first[layer.name] = i
    return problems
