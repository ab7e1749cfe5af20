"""How big a request may be, checked from shapes alone before anything is allocated.

Three kinds of check, in the order a request meets them:

1. `check_layer_count(data, limits)` looks at the raw parsed body, before pydantic validates a
   single layer: a body with ten million layers is refused after one `len()`.
2. Every size field (n_in, channels_out, kernel entries, vocab, hidden ...) is capped at
   `MAX_SIZE` by the models themselves, so shape arithmetic never meets a 30-digit integer.
3. `size_problems(request, slots, limits)` (seedbed.core.request.checks) runs on the
   validated request and its tensor slots: elements per tensor, elements per request, and the
   size of every matrix that needs a QR factorisation (orthogonal initialisation).

Each refusal is a `Problem` with code ``too_large``, the field that causes it, the actual
number and the limit.
"""

from __future__ import annotations

from dataclasses import dataclass, fields

from pydantic import ValidationInfo

from seedbed.core.request.problems import Problem, RequestRejected
from seedbed_client import wire_facts

# Cap on any single size in a request. 2**31 - 1 is the largest dimension every framework and
# file format indexes with a signed 32-bit integer, and it keeps the product of a conv shape
# (at most five sizes) far below anything that would make integer arithmetic slow.
MAX_SIZE = wire_facts.MAX_SIZE


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

    max_layers: int = wire_facts.DEFAULT_MAX_LAYERS
    max_tensor_elements: int = wire_facts.DEFAULT_MAX_TENSOR_ELEMENTS
    max_request_elements: int = wire_facts.DEFAULT_MAX_REQUEST_ELEMENTS
    max_orthogonal_dim: int = wire_facts.DEFAULT_MAX_ORTHOGONAL_DIM
    max_name_length: int = wire_facts.DEFAULT_MAX_NAME_LENGTH

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(f"Limits.{f.name} must be a positive integer, got {value!r}")


def check_layer_count(data: object, limits: Limits) -> None:
    """Refuse a body whose raw `layers` list is longer than allowed, before any item is read.

    Only the length of the list is looked at; anything else wrong with the body is left to
    validation (which runs only when this passes). The client runs the same check
    (seedbed_client.wire_facts.layer_count_refusal).
    """
    if isinstance(data, dict):
        layers = data.get("layers")
        if isinstance(layers, list | tuple):
            refusal = wire_facts.layer_count_refusal(layers, limits.max_layers)
            if refusal is not None:
                field, code, message = refusal
                raise RequestRejected([Problem(field, code, message + raised_by("max_layers"))])


# The service reads each limit from the environment variable of its name (seedbed.settings);
# a refusal names it so that whoever runs the service knows which one to raise.
SETTING_PREFIX = "SEEDBED_"


def raised_by(limit: str, prefix: str = SETTING_PREFIX) -> str:
    """ "; the service's setting SEEDBED_<LIMIT> raises it", to end a refusal with (one
    spelling, shared with the client's local checks)."""
    return wire_facts.raised_by(limit, prefix)


def limits_from_context(info: ValidationInfo) -> Limits:
    """The limits a model validator runs under (passed as validation context by `parse`)."""
    context = info.context
    if isinstance(context, dict):
        limits = context.get("limits")
        if isinstance(limits, Limits):
            return limits
    return Limits()
