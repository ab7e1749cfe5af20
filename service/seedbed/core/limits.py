"""How big a request may be, checked from shapes alone before anything is allocated.

Three kinds of check, in the order a request meets them:

1. `check_layer_count(data, limits)` looks at the raw parsed body, before pydantic validates a
   single layer: a body with ten million layers is refused after one `len()`.
2. Every size field (n_in, channels_out, kernel entries, vocab, hidden ...) is capped at
   `MAX_SIZE` by the models themselves, so shape arithmetic never meets a 30-digit integer.
3. `size_problems(request, slots, limits)` runs on the validated request and its tensor slots:
   elements per tensor, elements per request, and the size of every matrix that needs a QR
   factorisation (orthogonal initialisation).

Each refusal is a `Problem` with code ``too_large``, the field that causes it, the actual
number and the limit.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, fields
from math import prod
from typing import TYPE_CHECKING

from seedbed.core.problems import Problem, RequestRejected

if TYPE_CHECKING:
    from seedbed.core.spec import NetworkRequest
    from seedbed.core.tensors import TensorSlot

# Cap on any single size in a request. 2**31 - 1 is the largest dimension every framework and
# file format indexes with a signed 32-bit integer, and it keeps the product of a conv shape
# (at most five sizes) far below anything that would make integer arithmetic slow.
MAX_SIZE = 2**31 - 1


# The service reads each limit from the environment variable of its name (seedbed.web.settings);
# a refusal names it so that whoever runs the service knows which one to raise.
SETTING_PREFIX = "SEEDBED_"


def raised_by(limit: str, prefix: str = SETTING_PREFIX) -> str:
    """"; the service's setting SEEDBED_<LIMIT> raises it", to end a refusal with."""
    return f"; the service's setting {prefix}{limit.upper()} raises it"


@dataclass(frozen=True)
class Limits:
    """Request limits; the web layer builds one from its settings, tests pass their own.

    Defaults and why:
    - max_layers = 4096: room for very deep stacks described layer by layer (a 96-block
      transformer with attention, two norms and two dense layers per block is 480 layers),
      while bounding the validation work per request to milliseconds.
    - max_tensor_elements = 2**28 (268,435,456): 1 GiB in float32 for one tensor, larger than
      the embedding table of a 256k-token, 1024-wide model; beyond that a single block of
      memory per tensor is not a reasonable thing to serve over HTTP.
    - max_request_elements = 2**30 (1,073,741,824): 4 GiB of float32 per request; generation
      is streamed, so this bounds time and bandwidth rather than memory.
    - max_orthogonal_dim = 8192: the larger side of any matrix that is QR-factorised. QR costs
      O(n^3) and n^2 memory in float64: 8192 is ~0.5 GiB and seconds of CPU; 16384 would be
      2 GiB and tens of seconds for one tensor.
    - max_name_length = 128: layer names become tensor names in file headers and URLs; 128
      characters is generous for dotted module paths and keeps headers small.
    """

    max_layers: int = 4096
    max_tensor_elements: int = 1 << 28
    max_request_elements: int = 1 << 30
    max_orthogonal_dim: int = 8192
    max_name_length: int = 128

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"Limits.{f.name} must be a positive integer, got {value!r}")


def check_layer_count(data: object, limits: Limits) -> None:
    """Refuse a body whose raw `layers` list is longer than allowed, before any item is read.

    Only the length of the list is looked at; anything else wrong with the body is left to
    validation (which runs only when this passes).
    """
    if isinstance(data, dict):
        layers = data.get("layers")
        if isinstance(layers, list | tuple) and len(layers) > limits.max_layers:
            raise RequestRejected(
                [
                    Problem(
                        "layers",
                        "too_large",
                        f"the request has {len(layers)} layers; the limit is "
                        f"{limits.max_layers} per request{raised_by('max_layers')}",
                    )
                ]
            )


def _orthogonal_side(slot: TensorSlot) -> tuple[int, int]:
    """Rows and columns of one orthogonal block: one gate block by the flattened input axes."""
    rows = slot.logical_shape[0] // slot.gate_blocks
    cols = prod(slot.logical_shape[1:])
    return rows, cols


def size_problems(
    request: NetworkRequest, slots: Sequence[Sequence[TensorSlot]], limits: Limits
) -> list[Problem]:
    """Element and QR-size problems of a validated request, from its tensor shapes alone.

    `slots[i]` are the tensors of `request.layers[i]` (see `tensors.tensor_slots`).
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
