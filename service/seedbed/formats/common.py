"""What every response format is given and what it gives back.

The core hands each format a response-wide `document` (algorithm, seed, dtype, layout, warnings
...) and an ordered sequence of `OutgoingTensor`s. A tensor does not hold its values: it holds a
callable that re-produces the raw bytes in bounded pieces, so a format can stream a tensor of
several GiB without ever holding it, and can run over it twice when a header needs hashes first.

Every format returns an `EncodedBody` whose `content_length` is exact before the first byte is
produced. All validation happens when the body is built, so a bad input fails before the web
layer has sent any header; a producer that breaks its contract while streaming (wrong length,
bytes that differ from the hashing pass) aborts the stream before the tensor's last piece, so the
client always sees a body shorter than Content-Length rather than a complete-looking wrong one.
"""

from __future__ import annotations

import hashlib
import json
import math
import sys
from collections.abc import Callable, Generator, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any, NamedTuple

import numpy as np

# Bytes-like pieces a producer may yield; formats pass `bytes` through without copying.
Chunk = bytes | bytearray | memoryview

ITEMSIZE: Mapping[str, int] = {"float64": 8, "float32": 4, "float16": 2, "bfloat16": 2}
DTYPE_NAMES: tuple[str, ...] = tuple(ITEMSIZE)

# The key that holds the per-tensor entries inside every manifest.
TENSORS_KEY = "tensors"
# Keys the formats add to a tensor's entry; the producer must not set them itself.
RESERVED_ENTRY_KEYS: frozenset[str] = frozenset({"sha256", "data", "stored_as"})

SHA256_HEX_LEN = 64
# Stands in for a digest while lengths are computed: hex digests never need JSON escaping, so a
# manifest rendered with this placeholder has exactly the length of the real one.
DIGEST_PLACEHOLDER = "0" * SHA256_HEX_LEN

DEFAULT_CHUNK_BYTES = 1 << 20
# Small pieces are joined into writes of about this size (fewer, larger sends for the server).
COALESCE_BYTES = 64 << 10


class FormatInputError(ValueError):
    """A tensor or document handed to a format is malformed (the message names the field)."""


class ProducerContractError(RuntimeError):
    """A tensor's `chunks()` broke its promise (length or repeatability): an internal bug."""


class EncodedBody(NamedTuple):
    content_length: int
    media_type: str
    body: Iterator[bytes]


@dataclass(frozen=True)
class OutgoingTensor:
    """One tensor as a format sees it: description, manifest entry, and a way to re-read bytes.

    `chunks()` must return the raw little-endian C-order bytes in bounded pieces; it may be called
    more than once and must yield the same bytes each time, `nbytes` in total.
    """

    name: str
    dtype: str
    shape: tuple[int, ...]
    nbytes: int
    entry: dict[str, Any]
    chunks: Callable[[], Iterator[Chunk]] = field(repr=False, compare=False)

    def __post_init__(self) -> None:
        _check_name(self.name)
        where = f"tensor {self.name!r}"
        if self.dtype not in ITEMSIZE:
            raise FormatInputError(
                f"{where}: dtype {self.dtype!r} is not supported; allowed: {', '.join(DTYPE_NAMES)}"
            )
        if not isinstance(self.shape, tuple) or not all(
            isinstance(d, int) and not isinstance(d, bool) and d >= 0 for d in self.shape
        ):
            raise FormatInputError(
                f"{where}: shape must be a tuple of non-negative integers, got {self.shape!r}"
            )
        expected = math.prod(self.shape) * ITEMSIZE[self.dtype]
        if self.nbytes != expected:
            raise FormatInputError(
                f"{where}: nbytes is {self.nbytes} but shape {list(self.shape)} of {self.dtype} "
                f"needs {expected}"
            )
        if not isinstance(self.entry, dict):
            raise FormatInputError(
                f"{where}: entry must be a dict, got {type(self.entry).__name__}"
            )
        clash = sorted(RESERVED_ENTRY_KEYS.intersection(self.entry))
        if clash:
            raise FormatInputError(
                f"{where}: entry must not contain {clash}; the formats add these keys themselves"
            )
        # The entry repeats some of the description; a disagreement would make the manifest lie.
        described = (("tensor", self.name), ("shape", list(self.shape)), ("dtype", self.dtype))
        for key, ours in described:
            if key in self.entry and self.entry[key] != ours:
                raise FormatInputError(
                    f"{where}: entry[{key!r}] is {self.entry[key]!r} but the tensor's {key} is "
                    f"{ours!r}"
                )
        if not callable(self.chunks):
            raise FormatInputError(f"{where}: chunks must be a callable returning an iterator")


def _check_name(name: object) -> None:
    # Names become zip member paths and JSON keys: refuse anything that could escape a directory
    # when an archive is extracted, or that collides with the safetensors metadata key.
    if not isinstance(name, str) or not name:
        raise FormatInputError(f"tensor name must be a non-empty string, got {name!r}")
    if len(name.encode("utf-8")) > 1000:
        raise FormatInputError(f"tensor name {name[:40]!r}...: at most 1000 UTF-8 bytes allowed")
    if any(ord(c) < 0x20 or ord(c) == 0x7F for c in name) or "\\" in name:
        raise FormatInputError(
            f"tensor name {name!r}: control characters and backslashes are not allowed"
        )
    if name.startswith("/") or ".." in name.split("/"):
        raise FormatInputError(
            f"tensor name {name!r}: must not start with '/' or contain a '..' path segment"
        )
    if name == "__metadata__":
        raise FormatInputError("tensor name '__metadata__' is reserved by the safetensors header")


def check_inputs(document: Mapping[str, Any], tensors: Sequence[OutgoingTensor]) -> None:
    """Checks that hold for every format; raises FormatInputError naming the field."""
    if not isinstance(document, Mapping):
        raise FormatInputError(f"document must be a mapping, got {type(document).__name__}")
    bad_keys = [k for k in document if not isinstance(k, str)]
    if bad_keys:
        raise FormatInputError(f"document keys must be strings, got {bad_keys!r}")
    if TENSORS_KEY in document:
        raise FormatInputError(
            f"document must not contain {TENSORS_KEY!r}; the formats add the tensor entries"
        )
    seen: set[str] = set()
    for i, t in enumerate(tensors):
        if not isinstance(t, OutgoingTensor):
            raise FormatInputError(
                f"tensors[{i}] must be an OutgoingTensor, got {type(t).__name__}"
            )
        if t.name in seen:
            raise FormatInputError(f"tensors[{i}]: duplicate tensor name {t.name!r}")
        seen.add(t.name)
        bad = [k for k in t.entry if not isinstance(k, str)]
        if bad:
            raise FormatInputError(f"tensor {t.name!r}: entry keys must be strings, got {bad!r}")


def canonical_json(value: Any, *, what: str = "value") -> bytes:
    """Stable JSON bytes: sorted keys, compact separators, ASCII only, no NaN/Infinity."""
    try:
        text = json.dumps(
            value, sort_keys=True, separators=(",", ":"), ensure_ascii=True, allow_nan=False
        )
    except (TypeError, ValueError) as exc:
        raise FormatInputError(f"{what} is not JSON-ready: {exc}") from exc
    return text.encode("ascii")


def json_snapshot(value: Any, *, what: str) -> Any:
    """A deep, JSON-pure copy, so a caller mutating its dicts later cannot change a body
    whose length was already announced."""
    return json.loads(canonical_json(value, what=what))


def build_manifest(
    document: Mapping[str, Any],
    tensors: Sequence[OutgoingTensor],
    digests: Mapping[str, str] | None,
    extra: Callable[[OutgoingTensor], Mapping[str, Any]] | None = None,
) -> dict[str, Any]:
    """Document fields plus one entry per tensor carrying its sha256 (placeholder if unknown)."""
    entries = []
    for t in tensors:
        entry = dict(t.entry)
        if extra is not None:
            entry.update(extra(t))
        entry["sha256"] = digests[t.name] if digests is not None else DIGEST_PLACEHOLDER
        entries.append(entry)
    manifest = dict(document)
    manifest[TENSORS_KEY] = entries
    return manifest


def check_digests(digests: Mapping[str, str] | None, tensors: Sequence[OutgoingTensor]) -> None:
    if digests is None:
        return
    for t in tensors:
        d = digests.get(t.name)
        if not isinstance(d, str) or len(d) != SHA256_HEX_LEN or d.strip("0123456789abcdef") != "":
            raise FormatInputError(
                f"digests[{t.name!r}] must be a 64-character lower-case hex SHA-256, got {d!r}"
            )


def _as_bytes(piece: object, tensor: str) -> bytes:
    if isinstance(piece, bytes):
        return piece
    if isinstance(piece, bytearray | memoryview):
        return bytes(piece)
    raise ProducerContractError(
        f"chunks() of tensor {tensor!r} yielded {type(piece).__name__}; expected bytes-like pieces"
    )


def checked_chunks(
    tensor: OutgoingTensor,
    expected_sha256: str | None = None,
    observe: Callable[[bytes], None] | None = None,
) -> Generator[bytes, None, str]:
    """The tensor's bytes, each piece as `bytes`, with the producer's contract enforced.

    Returns (as the generator's return value) the hex SHA-256 of the bytes. One piece is held
    back until the producer is exhausted; only then are the total length and (if given) the
    expected digest checked, and only if both hold is the last piece released. A broken producer
    therefore raises before the tensor is complete on the wire. `observe` sees every piece (for
    running CRCs) before it is released.
    """
    sha = hashlib.sha256()
    total = 0
    held: bytes | None = None
    for raw in tensor.chunks():
        piece = _as_bytes(raw, tensor.name)
        if not piece:
            continue
        total += len(piece)
        if total > tensor.nbytes:
            raise ProducerContractError(
                f"chunks() of tensor {tensor.name!r} produced more than its {tensor.nbytes} bytes"
            )
        sha.update(piece)
        if observe is not None:
            observe(piece)
        if held is not None:
            yield held
        held = piece
    if total != tensor.nbytes:
        raise ProducerContractError(
            f"chunks() of tensor {tensor.name!r} produced {total} bytes, expected {tensor.nbytes}"
        )
    digest = sha.hexdigest()
    if expected_sha256 is not None and digest != expected_sha256:
        raise ProducerContractError(
            f"chunks() of tensor {tensor.name!r} produced bytes whose SHA-256 differs from the "
            "digest given for it: the producer is not repeatable (or the digests are stale)"
        )
    if held is not None:
        yield held
    return digest


def drain(gen: Generator[bytes, None, str]) -> str:
    """Run a `checked_chunks` generator to the end, discarding the bytes; returns its digest."""
    while True:
        try:
            next(gen)
        except StopIteration as stop:
            return str(stop.value)


def tensor_digest(tensor: OutgoingTensor) -> str:
    """Hex SHA-256 of one tensor's raw bytes (one full generation pass)."""
    return drain(checked_chunks(tensor))


def tensor_digests(tensors: Iterable[OutgoingTensor]) -> dict[str, str]:
    """The hashing pass: hex SHA-256 of every tensor's raw bytes, by name.

    This generates every tensor once, in full. safetensors needs it before its first byte
    because its header carries the hashes; its body runs this pass itself when not given the
    digests. Compute it once and pass it to the format functions (and reuse it for an ETag or a
    cache entry) so that no request generates its tensors more than twice.
    """
    return {t.name: tensor_digest(t) for t in tensors}


def coalesced(pieces: Iterable[bytes], target: int = COALESCE_BYTES) -> Iterator[bytes]:
    """Join runs of small pieces (headers, tiny tensors) into writes of about `target` bytes.

    Large pieces pass through untouched, so memory stays bounded by `target` plus one piece.
    """
    buf = bytearray()
    for piece in pieces:
        if len(piece) >= target:
            if buf:
                yield bytes(buf)
                buf.clear()
            yield piece
            continue
        buf += piece
        if len(buf) >= target:
            yield bytes(buf)
            buf.clear()
    if buf:
        yield bytes(buf)


def tensor_from_array(
    name: str,
    array: np.ndarray,
    entry: dict[str, Any] | None = None,
    *,
    dtype: str | None = None,
    chunk_bytes: int = DEFAULT_CHUNK_BYTES,
) -> OutgoingTensor:
    """Wrap an in-memory array (small responses, blocks, tests) as an OutgoingTensor.

    `dtype` defaults to the array's own dtype name; bfloat16 may be given either as an array of
    a 2-byte bfloat16 dtype (e.g. ml_dtypes) or as uint16 bit patterns with dtype="bfloat16".
    """
    if chunk_bytes < 1:
        raise FormatInputError(f"chunk_bytes must be at least 1, got {chunk_bytes}")
    arr = np.asarray(array)
    name_of_dtype = dtype if dtype is not None else arr.dtype.name
    if name_of_dtype not in ITEMSIZE:
        raise FormatInputError(
            f"tensor {name!r}: dtype {name_of_dtype!r} is not supported; "
            f"allowed: {', '.join(DTYPE_NAMES)}"
        )
    if arr.dtype.itemsize != ITEMSIZE[name_of_dtype]:
        raise FormatInputError(
            f"tensor {name!r}: array dtype {arr.dtype} has {arr.dtype.itemsize}-byte items but "
            f"{name_of_dtype} needs {ITEMSIZE[name_of_dtype]}"
        )
    if arr.dtype.byteorder == ">" or (arr.dtype.byteorder == "=" and sys.byteorder == "big"):
        arr = arr.byteswap().view(arr.dtype.newbyteorder("<"))
    data = np.ascontiguousarray(arr).tobytes()
    view = memoryview(data)

    def pieces() -> Iterator[Chunk]:
        for start in range(0, len(view), chunk_bytes):
            yield view[start : start + chunk_bytes]

    return OutgoingTensor(
        name=name,
        dtype=name_of_dtype,
        shape=tuple(int(d) for d in arr.shape),
        nbytes=len(data),
        entry=dict(entry) if entry is not None else {},
        chunks=pieces,
    )
