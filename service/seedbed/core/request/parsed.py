"""A request after parsing, with what every later stage needs computed once."""

from __future__ import annotations

from dataclasses import dataclass

from seedbed.core.request.branches import Branch, branches_of
from seedbed.core.request.network import NetworkRequest
from seedbed.core.tensors import TensorSlot, slots_by_layer


@dataclass(frozen=True)
class ParsedRequest:
    """A validated request with its tensor slots (one tuple per layer, aligned with
    `request.layers`) and its residual branches, in order.

    Build one with `seedbed.core.request.parse.parse` from untrusted input. `of` wraps a
    request built in code (a diagnose alternative: a parsed request with other overrides) and
    does not run the request-wide checks.
    """

    request: NetworkRequest
    slots: tuple[tuple[TensorSlot, ...], ...]
    branches: tuple[Branch, ...]

    @classmethod
    def of(cls, request: NetworkRequest) -> ParsedRequest:
        return cls(
            request,
            tuple(tuple(s) for s in slots_by_layer(request)),
            tuple(branches_of(request)),
        )


__all__ = ["ParsedRequest"]
