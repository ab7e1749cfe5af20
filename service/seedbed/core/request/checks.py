"""The request-wide checks `parse` runs once the models have validated every field.

A model validator sees one object; what spans layers is checked here, on the parsed request
(its layers with blocks expanded, its tensor slots and its residual branches computed once).
Each check is a function (parsed request, limits) -> problems. `parse` runs every check in
`CHECKS`, in order, and reports all their problems together at the fields of the request as
written; `POLICY_CHECK` runs last and only when the structure checks found nothing, since a
policy's fit to a network means nothing while the branches themselves are wrong.

To add a request-wide check: write the function here (or in a sibling module) and add it to
`CHECKS` (or to `STRUCTURE_CHECKS` when a depth policy cannot be judged while it fails).
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from math import prod

from seedbed.core.policies import policy_problems
from seedbed.core.request.branches import branch_problems
from seedbed.core.request.layers import RecurrentLayer
from seedbed.core.request.limits import Limits, raised_by
from seedbed.core.request.names import layer_name_problems
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.policy_models import ScaledResidualPolicy
from seedbed.core.request.problems import Problem
from seedbed.core.request.vocabulary import DTYPE_MAX, DTYPE_TINY, NORMAL_EXTREME
from seedbed.core.request.width_chain import chain_problems
from seedbed.core.tensors import TensorSlot, tensor_name_problems

RequestCheck = Callable[[ParsedRequest, Limits], list[Problem]]


def _layer_names(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    return layer_name_problems(parsed.request)


def _tensor_names(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    return tensor_name_problems(parsed.request, parsed.slots)


def _branches(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    return branch_problems(parsed.request.layers, parsed.branches)


def _dtype_ranges(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    return dtype_range_problems(parsed.request)


def _sizes(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    return size_problems(parsed.request, parsed.slots, limits)


def _policy(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    return policy_problems(parsed)


# Checks whose problems make a depth policy's fit meaningless (the policy check is skipped).
STRUCTURE_CHECKS: tuple[RequestCheck, ...] = (_branches,)
# Every request-wide check, in the order its problems are reported.
CHECKS: tuple[RequestCheck, ...] = (
    _layer_names,
    _tensor_names,
    _branches,
    chain_problems,
    _dtype_ranges,
    _sizes,
)
POLICY_CHECK: RequestCheck = _policy


def request_problems(parsed: ParsedRequest, limits: Limits) -> list[Problem]:
    """Every request-wide problem of a request whose fields are individually valid."""
    problems: list[Problem] = []
    structure_ok = True
    for check in CHECKS:
        found = check(parsed, limits)
        if found and check in STRUCTURE_CHECKS:
            structure_ok = False
        problems += found
    if structure_ok:
        problems += POLICY_CHECK(parsed, limits)
    return problems


def dtype_range_problems(request: NetworkRequest) -> list[Problem]:
    """Explicit numbers that would overflow the request's dtype, or scales that underflow it."""
    top = DTYPE_MAX[request.dtype]
    tiny = DTYPE_TINY[request.dtype]
    problems: list[Problem] = []

    def check_tiny(path: str, scale: float, what: str) -> None:
        if scale < tiny:
            problems.append(
                Problem(
                    path,
                    "invalid_value",
                    f"{what} {scale!r} is below {request.dtype}'s smallest normal number "
                    f"{tiny:g}: the values would lose their precision or round to zero; "
                    f"allowed: at least {tiny:g}",
                )
            )

    def check(path: str, magnitude: float, what: str, limit: float) -> None:
        if magnitude > limit:
            problems.append(
                Problem(
                    path,
                    "invalid_value",
                    f"{what} does not fit {request.dtype}, whose largest finite value is "
                    f"{top:g}; allowed: at most {limit:g} in magnitude",
                )
            )

    for i, layer in enumerate(request.layers):
        init = layer.init
        if init is not None:
            if init.value is not None:
                check(f"layers[{i}].init.value", abs(init.value), f"{init.value!r}", top)
            if init.bound is not None:
                check(f"layers[{i}].init.bound", init.bound, f"bound {init.bound!r}", top)
                check_tiny(f"layers[{i}].init.bound", init.bound, "bound")
            if init.std is not None:
                check(
                    f"layers[{i}].init.std",
                    init.std,
                    f"std {init.std!r} (normal draws reach {NORMAL_EXTREME} std)",
                    top / NORMAL_EXTREME,
                )
                check_tiny(f"layers[{i}].init.std", init.std, "std")
        if layer.bias_init is not None:
            v = layer.bias_init.value
            check(f"layers[{i}].bias_init.value", abs(v), f"{v!r}", top)
        if isinstance(layer, RecurrentLayer) and layer.forget_bias is not None:
            v = layer.forget_bias
            check(f"layers[{i}].forget_bias", abs(v), f"{v!r}", top)
    policy = request.depth_policy
    if isinstance(policy, ScaledResidualPolicy):
        path = "depth_policy.base_std"
        check(path, policy.base_std, f"base_std {policy.base_std!r} (normal draws reach "
              f"{NORMAL_EXTREME} std)", top / NORMAL_EXTREME)  # fmt: skip
        check_tiny(path, policy.base_std, "base_std")
    return problems


def _orthogonal_side(slot: TensorSlot) -> tuple[int, int]:
    """Rows and columns of one orthogonal block: one gate block by the flattened input axes."""
    rows = slot.logical_shape[0] // slot.gate_blocks
    cols = prod(slot.logical_shape[1:])
    return rows, cols


def size_problems(
    request: NetworkRequest, slots: Sequence[Sequence[TensorSlot]], limits: Limits
) -> list[Problem]:
    """Element and QR-size problems of a validated request, from its tensor shapes alone.

    `slots[i]` are the tensors of `request.layers[i]` (see `seedbed.core.tensors.tensor_slots`).
    """
    problems: list[Problem] = []
    total = 0
    for i, layer_slots in enumerate(slots):
        for slot in layer_slots:
            count = prod(slot.logical_shape)
            total += count
            if count > limits.max_tensor_elements:
                problems.append(
                    Problem(
                        f"layers[{i}]",
                        "too_large",
                        f"tensor {slot.tensor!r} would have {count} elements (shape "
                        f"{list(slot.served_shape)}); the limit is "
                        f"{limits.max_tensor_elements} elements per tensor"
                        f"{raised_by('max_tensor_elements')}",
                    )
                )
        problems.extend(_orthogonal_problems(request, i, layer_slots, limits))
    if total > limits.max_request_elements:
        problems.append(
            Problem(
                "layers",
                "too_large",
                f"the request's tensors have {total} elements in total; the limit is "
                f"{limits.max_request_elements} elements per request"
                f"{raised_by('max_request_elements')}",
            )
        )
    return problems


def _orthogonal_problems(
    request: NetworkRequest, i: int, slots: Sequence[TensorSlot], limits: Limits
) -> list[Problem]:
    problems: list[Problem] = []
    cap = limits.max_orthogonal_dim
    init = request.layers[i].init
    for slot in slots:
        if slot.is_bias or len(slot.logical_shape) < 2:
            continue
        if init is not None and init.method == "orthogonal":
            rows, cols = _orthogonal_side(slot)
            if max(rows, cols) > cap:
                problems.append(
                    Problem(
                        f"layers[{i}].init.method",
                        "too_large",
                        f"orthogonal initialisation of {slot.tensor!r} needs a QR factorisation "
                        f"of a {rows} x {cols} matrix; the larger side may be at most {cap}"
                        f"{raised_by('max_orthogonal_dim')}",
                    )
                )
        elif init is None and slot.part == "recurrent_weight":
            # Without an override, recurrent matrices are recommended orthogonal (one square
            # hidden x hidden block per gate), so the same QR bound applies.
            hidden = slot.logical_shape[1]
            if hidden > cap:
                problems.append(
                    Problem(
                        f"layers[{i}].hidden",
                        "too_large",
                        f"hidden = {hidden}: the recurrent matrix is initialised orthogonal, "
                        f"which needs a QR factorisation of a {hidden} x {hidden} matrix; "
                        f"hidden may be at most {cap} (or give an init override that is not "
                        f"orthogonal){raised_by('max_orthogonal_dim')}",
                    )
                )
    return problems
