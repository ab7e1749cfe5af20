"""The entry point for untrusted input: a parsed JSON body in, a `ParsedRequest` out, or
`RequestRejected` with every problem."""

from __future__ import annotations

from pydantic import ValidationError

from seedbed.core.request.blocks import check_expanded_count, relocate_problems
from seedbed.core.request.checks import request_problems
from seedbed.core.request.limits import Limits, check_layer_count
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.problems import (
    BODY,
    Problem,
    RequestRejected,
    describe_input,
    problems_from_validation_error,
)


def parse(data: object, limits: Limits | None = None) -> ParsedRequest:
    """Validate a parsed JSON body into a `ParsedRequest`, or raise `RequestRejected`.

    Order: the raw layer count and the count after expanding block shorthands (both before
    any layer is looked at), the models (types, ranges, per-layer combinations; blocks are
    expanded here), then what spans layers (seedbed.core.request.checks): unique layer and
    tensor names, residual branches, explicit values that must fit the dtype, the size limits
    and the depth policy's fit to the network. All problems of the last stage are reported
    together, at the fields of the request as written (a problem of an expanded layer points
    at its block).
    """
    limits = limits if limits is not None else Limits()
    if not isinstance(data, dict):
        raise RequestRejected(
            [
                Problem(
                    BODY,
                    "invalid_type",
                    f"got {describe_input(data)}; allowed: a JSON object with fields seed, "
                    "dtype, layout, layers",
                )
            ]
        )
    check_layer_count(data, limits)
    check_expanded_count(data, limits)
    try:
        request = NetworkRequest.model_validate(data, context={"limits": limits})
    except ValidationError as err:
        raise RequestRejected(problems_from_validation_error(NetworkRequest, err)) from None
    parsed = ParsedRequest.of(request)
    problems = request_problems(parsed, limits)
    if problems:
        raise RequestRejected(relocate_problems(problems, data["layers"], request.layers))
    return parsed


__all__ = ["parse"]
