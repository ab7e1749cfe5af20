"""Response formats: JSON, NPZ and safetensors bodies streamed with their length known up front.

Plain Python + numpy; no web imports. The web layer wraps `EncodedBody.body` in a streaming
response and sets Content-Length to `EncodedBody.content_length` before the first byte.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from typing import Any

from .common import (
    DTYPE_NAMES,
    EncodedBody,
    FormatInputError,
    OutgoingTensor,
    ProducerContractError,
    canonical_json,
    tensor_digest,
    tensor_digests,
    tensor_from_array,
)
from .json_out import json_body, json_size
from .npz_out import npz_body
from .safetensors_out import safetensors_body

BodyBuilder = Callable[..., EncodedBody]

BUILDERS: Mapping[str, BodyBuilder] = {
    "json": json_body,
    "npz": npz_body,
    "safetensors": safetensors_body,
}
FORMAT_NAMES: tuple[str, ...] = tuple(BUILDERS)


def encode_body(
    format_name: str,
    document: Mapping[str, Any],
    tensors: Sequence[OutgoingTensor],
    *,
    digests: Mapping[str, str] | None = None,
    hold_bytes: int = 0,
    on_digests: Callable[[Mapping[str, str]], None] | None = None,
) -> EncodedBody:
    """Dispatch on the requested format name (json | npz | safetensors). `hold_bytes` bounds
    what safetensors may keep from its hashing pass (the other formats walk their tensors
    once and ignore it), and `on_digests` receives the digests of its hashing pass."""
    builder = BUILDERS.get(format_name)
    if builder is None:
        raise FormatInputError(
            f"format {format_name!r} is not supported; allowed: {', '.join(FORMAT_NAMES)}"
        )
    if format_name == "safetensors":
        return safetensors_body(
            document, tensors, digests=digests, hold_bytes=hold_bytes, on_digests=on_digests
        )
    return builder(document, tensors, digests=digests)


__all__ = [
    "BUILDERS",
    "DTYPE_NAMES",
    "FORMAT_NAMES",
    "EncodedBody",
    "FormatInputError",
    "OutgoingTensor",
    "ProducerContractError",
    "canonical_json",
    "encode_body",
    "json_body",
    "json_size",
    "npz_body",
    "safetensors_body",
    "tensor_digest",
    "tensor_digests",
    "tensor_from_array",
]
