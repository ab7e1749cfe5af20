"""The safetensors response: header (with the manifest as metadata) first, then raw data.

Layout (the safetensors format description): 8-byte little-endian header length N, N bytes of
JSON header padded with spaces so that 8 + N is a multiple of 8, then every tensor's raw bytes
back to back in header order. The header maps each tensor name to its dtype code, shape and
[start, end) byte range in the data section, plus "__metadata__", a string -> string map where
our manifest lives as one canonical JSON string.

Because the header comes first and the manifest carries every tensor's SHA-256, the hashes must
be known before the first byte: unless the caller passes them, the body runs a hashing pass over
every tensor (a full generation) before streaming the tensors. Tensors that fit `hold_bytes`
keep the pieces of the hashing pass and send exactly those (hashed once, generated once);
larger ones are generated again and that second walk is checked against the first digest.
"""

from __future__ import annotations

import json
import struct
from collections.abc import Callable, Iterator, Mapping, Sequence
from typing import Any

from .common import (
    TENSORS_KEY,
    EncodedBody,
    FormatInputError,
    OutgoingTensor,
    ProducerContractError,
    build_manifest,
    canonical_json,
    check_digests,
    check_inputs,
    checked_chunks,
    coalesced,
    drain,
    json_snapshot,
)

MEDIA_TYPE = "application/octet-stream"
# Our keys inside "__metadata__" (values must be strings there).
MANIFEST_KEY = "seedbed.manifest"
ALGORITHM_KEY = "seedbed.algorithm"
# Readers built on the safetensors reference implementation refuse headers above 100 MB.
HEADER_LIMIT = 100_000_000

DTYPE_CODES: Mapping[str, str] = {
    "float64": "F64",
    "float32": "F32",
    "float16": "F16",
    "bfloat16": "BF16",
}


def _header(manifest: Mapping[str, Any], tensors: Sequence[OutgoingTensor]) -> bytes:
    """Length prefix + padded JSON header. Tensor order is the caller's order (deterministic);
    the manifest string inside is canonical JSON."""
    metadata = {MANIFEST_KEY: canonical_json(manifest, what="manifest").decode("ascii")}
    algorithm = manifest.get("algorithm")
    if isinstance(algorithm, str):
        metadata[ALGORITHM_KEY] = algorithm
    header: dict[str, Any] = {"__metadata__": metadata}
    offset = 0
    for t in tensors:
        header[t.name] = {
            "dtype": DTYPE_CODES[t.dtype],
            "shape": list(t.shape),
            "data_offsets": [offset, offset + t.nbytes],
        }
        offset += t.nbytes
    text = json.dumps(header, separators=(",", ":"), ensure_ascii=True).encode("ascii")
    text += b" " * (-len(text) % 8)
    return struct.pack("<Q", len(text)) + text


def safetensors_body(
    document: Mapping[str, Any],
    tensors: Sequence[OutgoingTensor],
    *,
    digests: Mapping[str, str] | None = None,
    hold_bytes: int = 0,
    on_digests: Callable[[Mapping[str, str]], None] | None = None,
) -> EncodedBody:
    """Build the safetensors response. Without `digests`, iterating the body first runs the
    hashing pass (every tensor generated once) before the header is sent; up to `hold_bytes`
    of that pass's output are kept and sent as they are instead of being generated again.
    `on_digests` receives the digests that pass computed, before the header is sent."""
    tensors = tuple(tensors)
    check_inputs(document, tensors)
    check_digests(digests, tensors)
    # Snapshot with placeholder digests: fixes the header's length now, and keeps later changes
    # to the caller's dicts out of a body whose length is already announced.
    manifest = json_snapshot(build_manifest(document, tensors, None), what="manifest")
    header_length = len(_header(manifest, tensors))
    if header_length - 8 > HEADER_LIMIT:
        raise FormatInputError(
            f"safetensors header would be {header_length - 8} bytes; readers refuse more than "
            f"{HEADER_LIMIT} (too many tensors or too long entries: use npz or fewer tensors)"
        )
    content_length = header_length + sum(t.nbytes for t in tensors)
    given = dict(digests) if digests is not None else None

    def produce() -> Iterator[bytes]:
        held: dict[str, list[bytes]] = {}
        known = given if given is not None else _hashing_pass(tensors, hold_bytes, held)
        if given is None and on_digests is not None:
            on_digests(known)
        for entry, t in zip(manifest[TENSORS_KEY], tensors, strict=True):
            entry["sha256"] = known[t.name]
        header = _header(manifest, tensors)
        if len(header) != header_length:
            raise ProducerContractError("safetensors header length changed after sizing")
        yield header
        for t in tensors:
            pieces = held.pop(t.name, None)
            if pieces is None:
                yield from checked_chunks(t, known[t.name])
                continue
            # The very pieces the digest was computed over: hashing them again proves nothing.
            # Released one by one, so the held memory shrinks as the tensor goes out.
            pieces.reverse()
            while pieces:
                yield pieces.pop()

    return EncodedBody(content_length, MEDIA_TYPE, coalesced(produce()))


def _hashing_pass(
    tensors: Sequence[OutgoingTensor], hold_bytes: int, held: dict[str, list[bytes]]
) -> dict[str, str]:
    """Every tensor's digest, by name; the pieces of tensors that fit the budget go to `held`."""
    digests: dict[str, str] = {}
    left = hold_bytes
    for t in tensors:
        if t.nbytes > left:
            digests[t.name] = drain(checked_chunks(t))
            continue
        left -= t.nbytes
        pieces: list[bytes] = []
        walk = checked_chunks(t)
        while True:
            try:
                pieces.append(next(walk))
            except StopIteration as done:
                digests[t.name] = str(done.value)
                break
        held[t.name] = pieces
    return digests
