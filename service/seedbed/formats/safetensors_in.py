"""A strict reader for uploaded safetensors files.

Layout (the safetensors format description): 8 bytes little-endian header length N, N bytes
of UTF-8 JSON, then the data section. The JSON maps each tensor name to
`{"dtype", "shape", "data_offsets": [begin, end]}` (offsets relative to the data section) and
may hold `__metadata__`, a string-to-string map.

Everything is checked before a value is read: the header length against the file size, strict
JSON (no duplicate keys, no NaN), exactly the three fields per tensor, a known dtype, a shape of
non-negative integers, offsets that match shape x itemsize, and tensors that tile the data
section exactly (no overlap, no hole, nothing after the last one), as the format requires.
"""

from __future__ import annotations

import json
import struct
from collections.abc import Callable
from typing import IO, Any, NoReturn

import numpy as np

from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.stored import StoredTensor, Upload

# safetensors dtype -> (our name or None when we list but do not analyse it, itemsize, numpy
# dtype of the stored bytes). The format is little-endian throughout.
DTYPES: dict[str, tuple[str | None, int, str | None]] = {
    "F64": ("float64", 8, "<f8"),
    "F32": ("float32", 4, "<f4"),
    "F16": ("float16", 2, "<f2"),
    "BF16": ("bfloat16", 2, "<u2"),
    "I64": ("int64", 8, "<i8"),
    "I32": ("int32", 4, "<i4"),
    "I16": ("int16", 2, "<i2"),
    "I8": ("int8", 1, "i1"),
    "U64": ("uint64", 8, "<u8"),
    "U32": ("uint32", 4, "<u4"),
    "U16": ("uint16", 2, "<u2"),
    "U8": ("uint8", 1, "u1"),
    "BOOL": ("bool", 1, "?"),
    "F8_E4M3": (None, 1, None),
    "F8_E5M2": (None, 1, None),
}
HEADER_LENGTH_BYTES = 8
_FIELDS = {"dtype", "shape", "data_offsets"}
_READ_PIECE = 1 << 20


def _corrupt(message: str) -> NoReturn:
    raise UploadRefused("corrupt_file", message)


def looks_like_safetensors(head: bytes) -> bool:
    """True when the first bytes are a header length followed by the start of a JSON object."""
    return len(head) >= HEADER_LENGTH_BYTES + 1 and head[HEADER_LENGTH_BYTES:][:1] == b"{"


def _strict_object(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            _corrupt(f"the header names {key!r} twice")
        out[key] = value
    return out


def _no_constants(token: str) -> NoReturn:
    _corrupt(f"the header contains {token}, which is not JSON")


def _read_header(fp: IO[bytes], size: int, limits: AuditLimits) -> tuple[dict[str, Any], int]:
    if size < HEADER_LENGTH_BYTES:
        raise UploadRefused(
            "truncated_file",
            f"the file has {size} bytes; a safetensors file starts with an 8-byte header length",
        )
    fp.seek(0)
    (length,) = struct.unpack("<Q", fp.read(HEADER_LENGTH_BYTES))
    if length > size - HEADER_LENGTH_BYTES:
        raise UploadRefused(
            "truncated_file",
            f"the header length is {length} bytes but only "
            f"{size - HEADER_LENGTH_BYTES} bytes follow it",
        )
    if length > limits.max_header_bytes:
        raise UploadRefused(
            "too_large", f"the header is {length} bytes; at most {limits.max_header_bytes} are read"
        )
    raw = fp.read(length)
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        _corrupt(f"the header is not UTF-8 (byte {exc.start})")
    try:
        header = json.loads(text, object_pairs_hook=_strict_object, parse_constant=_no_constants)
    except (json.JSONDecodeError, RecursionError, ValueError) as exc:
        _corrupt(f"the header is not valid JSON: {exc}")
    if not isinstance(header, dict):
        _corrupt("the header must be a JSON object mapping tensor names to their entries")
    return header, HEADER_LENGTH_BYTES + length


def _check_metadata(value: object) -> None:
    if not isinstance(value, dict) or not all(
        isinstance(k, str) and isinstance(v, str) for k, v in value.items()
    ):
        _corrupt("__metadata__ must be an object whose values are all strings")


def _is_count(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool) and value >= 0


def _entry(name: str, value: object) -> tuple[str, tuple[int, ...], int, int]:
    if not isinstance(value, dict):
        _corrupt(f"tensor {name!r}: the entry must be an object with dtype, shape, data_offsets")
    if set(value) != _FIELDS:
        extra = sorted(set(value) - _FIELDS)
        missing = sorted(_FIELDS - set(value))
        _corrupt(
            f"tensor {name!r}: entry fields must be exactly dtype, shape, data_offsets"
            + (f"; missing {missing}" if missing else "")
            + (f"; unknown {extra}" if extra else "")
        )
    dtype = value["dtype"]
    if not isinstance(dtype, str) or dtype not in DTYPES:
        _corrupt(
            f"tensor {name!r}: dtype {dtype!r} is not a safetensors dtype; allowed: "
            + ", ".join(DTYPES)
        )
    shape = value["shape"]
    if not isinstance(shape, list) or not all(_is_count(d) for d in shape):
        _corrupt(f"tensor {name!r}: shape must be a list of non-negative integers, got {shape!r}")
    offsets = value["data_offsets"]
    if (
        not isinstance(offsets, list)
        or len(offsets) != 2
        or not all(_is_count(o) for o in offsets)
        or offsets[0] > offsets[1]
    ):
        _corrupt(
            f"tensor {name!r}: data_offsets must be [begin, end] with 0 <= begin <= end, "
            f"got {offsets!r}"
        )
    return dtype, tuple(shape), offsets[0], offsets[1]


def _loader(
    fp: IO[bytes], start: int, nbytes: int, stored: str, shape: tuple[int, ...], bf16: bool
) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        out = bytearray(nbytes)
        view = memoryview(out)
        fp.seek(start)
        pos = 0
        while pos < nbytes:
            piece = fp.read(min(_READ_PIECE, nbytes - pos))
            if not piece:  # the size was checked against the file; only a shrinking file gets here
                raise UploadRefused("truncated_file", "the file ended while reading a tensor")
            view[pos : pos + len(piece)] = piece
            pos += len(piece)
        values = np.frombuffer(out, dtype=np.dtype(stored))
        native = values.dtype.newbyteorder("=")
        if values.dtype != native:
            values = values.astype(native)
        if bf16:
            import ml_dtypes  # only needed for this dtype

            values = values.view(ml_dtypes.bfloat16)
        return values.reshape(shape)

    return load


def read_safetensors(fp: IO[bytes], size: int, limits: AuditLimits) -> Upload:
    """Check a safetensors file's header against its size; refuse it before any value is read."""
    header, data_start = _read_header(fp, size, limits)
    data_len = size - data_start
    entries = [(k, v) for k, v in header.items() if k != "__metadata__"]
    if "__metadata__" in header:
        _check_metadata(header["__metadata__"])
    if len(entries) > limits.max_tensors:
        raise UploadRefused(
            "too_large",
            f"the header lists {len(entries)} tensors; at most "
            f"{limits.max_tensors} are audited per upload",
        )
    parsed: list[tuple[str, str, tuple[int, ...], int, int]] = []
    for name, value in entries:
        dtype, shape, begin, end = _entry(name, value)
        count = 1
        for d in shape:
            count *= d
        need = count * DTYPES[dtype][1]
        if end - begin != need:
            _corrupt(
                f"tensor {name!r}: shape {list(shape)} of {dtype} needs {need} bytes but "
                f"data_offsets [{begin}, {end}] span {end - begin}"
            )
        if end > data_len:
            raise UploadRefused(
                "truncated_file",
                f"tensor {name!r} ends at byte {end} of the data section, "
                f"which has only {data_len} bytes",
            )
        parsed.append((name, dtype, shape, begin, end))

    expected = 0
    for name, _, _, begin, end in sorted(parsed, key=lambda p: (p[3], p[4])):
        if begin != expected:
            what = "overlaps the tensor before it" if begin < expected else "leaves a gap"
            _corrupt(
                f"tensor {name!r} starts at byte {begin} of the data section where "
                f"{expected} was expected: it {what}; tensors must tile the data exactly"
            )
        expected = end
    if expected != data_len:
        _corrupt(f"the data section has {data_len - expected} bytes after the last tensor")

    tensors = []
    for name, dtype, shape, begin, end in parsed:
        label, _, stored = DTYPES[dtype]
        if label is None or stored is None:
            tensors.append(
                StoredTensor(
                    name, dtype, shape, end - begin, None, f"dtype {dtype} is not analysed"
                )
            )
            continue
        load = _loader(fp, data_start + begin, end - begin, stored, shape, label == "bfloat16")
        tensors.append(StoredTensor(name, label, shape, end - begin, load))
    return Upload("safetensors", tuple(tensors))
