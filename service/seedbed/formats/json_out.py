"""The JSON response: the manifest with each tensor's bytes inline as base64, streamed.

The body is byte for byte what `json.dumps(obj, sort_keys=True, separators=(",", ":"),
ensure_ascii=True)` would give for

    {**document, "tensors": [{**entry, "data": <base64 of raw bytes>, "sha256": <hex>}, ...]}

but it is produced piece by piece: every static part is serialised before streaming (so the
length is known: base64 of n bytes is 4 * ceil(n / 3) characters), the base64 is encoded per
piece at 3-byte-aligned boundaries (so the pieces concatenate to the base64 of the whole), and
because "data" sorts before "sha256", each digest is computed while its data streams.
"""

from __future__ import annotations

import binascii
from collections.abc import Generator, Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from .common import (
    SHA256_HEX_LEN,
    TENSORS_KEY,
    EncodedBody,
    OutgoingTensor,
    canonical_json,
    check_digests,
    check_inputs,
    checked_chunks,
    coalesced,
)

MEDIA_TYPE = "application/json"
DATA_KEY = "data"
DIGEST_KEY = "sha256"


def base64_length(nbytes: int) -> int:
    return 4 * ((nbytes + 2) // 3)


def _render_around(obj: Mapping[str, Any], holes: Sequence[str], what: str) -> list[bytes]:
    """Canonical JSON of `obj` with the values of `holes` left out: returns the static pieces
    between them (len(holes) + 1), the holes taken in sorted-key order."""
    pieces: list[bytes] = []
    current = bytearray(b"{")
    first = True
    for key in sorted([*obj, *holes]):
        if not first:
            current += b","
        first = False
        current += canonical_json(key, what=what) + b":"
        if key in holes:
            pieces.append(bytes(current))
            current = bytearray()
        else:
            current += canonical_json(obj[key], what=f"{what}[{key!r}]")
    current += b"}"
    pieces.append(bytes(current))
    return pieces


@dataclass(frozen=True)
class _Layout:
    head: bytes  # '{...,"tensors":'
    tail: bytes  # ',...}' after the tensors array
    # Per tensor: up to '"data":', between data and '"sha256":', after the digest.
    parts: tuple[tuple[bytes, bytes, bytes], ...]
    content_length: int


def _layout(document: Mapping[str, Any], tensors: Sequence[OutgoingTensor]) -> _Layout:
    check_inputs(document, tensors)
    head, tail = _render_around(document, [TENSORS_KEY], "document")
    parts: list[tuple[bytes, bytes, bytes]] = []
    length = len(head) + len(tail) + 2 + max(len(tensors) - 1, 0)  # brackets and commas
    for t in tensors:
        before, between, after = _render_around(
            t.entry, [DATA_KEY, DIGEST_KEY], f"entry of tensor {t.name!r}"
        )
        parts.append((before, between, after))
        length += (
            len(before)
            + len(between)
            + len(after)
            + 2
            + base64_length(t.nbytes)
            + 2
            + SHA256_HEX_LEN
        )
    return _Layout(head, tail, tuple(parts), length)


def json_size(document: Mapping[str, Any], tensors: Sequence[OutgoingTensor]) -> int:
    """Exact length in bytes of the JSON body, without generating any tensor: lets the web
    layer refuse an over-large JSON response before anything is produced."""
    return _layout(document, tuple(tensors)).content_length


def _base64_of(gen: Generator[bytes, None, str]) -> Generator[bytes, None, str]:
    """Base64 of a checked tensor stream, emitted per piece at 3-byte-aligned boundaries (at most
    2 bytes carried over); returns the stream's digest."""
    carry = b""
    while True:
        try:
            piece = next(gen)
        except StopIteration as stop:
            digest = str(stop.value)
            break
        if carry:
            piece = carry + piece
        cut = len(piece) - len(piece) % 3
        if cut:
            yield binascii.b2a_base64(memoryview(piece)[:cut], newline=False)
        carry = piece[cut:]
    if carry:
        yield binascii.b2a_base64(carry, newline=False)
    return digest


def json_body(
    document: Mapping[str, Any],
    tensors: Sequence[OutgoingTensor],
    *,
    digests: Mapping[str, str] | None = None,
) -> EncodedBody:
    """Build the JSON response; one generation pass. With `digests`, each tensor is checked
    against its digest while streaming (the stream aborts before a mismatching tensor ends)."""
    tensors = tuple(tensors)
    layout = _layout(document, tensors)
    check_digests(digests, tensors)
    given = dict(digests) if digests is not None else None

    def produce() -> Iterator[bytes]:
        yield layout.head + b"["
        for i, (t, (before, between, after)) in enumerate(zip(tensors, layout.parts, strict=True)):
            yield (b"," if i else b"") + before + b'"'
            expected = given[t.name] if given is not None else None
            digest = yield from _base64_of(checked_chunks(t, expected))
            yield b'"' + between + b'"' + digest.encode("ascii") + b'"' + after
        yield b"]" + layout.tail

    return EncodedBody(layout.content_length, MEDIA_TYPE, coalesced(produce()))
