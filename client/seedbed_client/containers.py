"""Read the three weights containers (json, npz, safetensors) and check every tensor's sha256.

The layouts are the service's (docs/formats.md): each tensor's digest is over its raw
little-endian C-order bytes, the same in every container. Reading works on any buffer (bytes,
bytearray, mmap) and avoids copies where the container allows it: safetensors and stored NPZ
members are sliced in place.

Structural damage (unparseable header, missing manifest) raises IntegrityError at once. Per
tensor, every problem is recorded in its `TensorCheck` so a verifier can report all of them;
`require_intact` turns any into an IntegrityError.
"""

from __future__ import annotations

import ast
import base64
import binascii
import contextlib
import hashlib
import json
import mmap
import struct
import warnings
import zipfile
import zlib
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from math import prod
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from seedbed_client.errors import IntegrityError
from seedbed_client.wire import WeightFormat

__all__ = [
    "BFloat16AsBits",
    "Inspection",
    "TensorCheck",
    "inspect_body",
    "sniff_format",
]

NPZ_MANIFEST = "seedbed-manifest.json"
SAFETENSORS_MANIFEST = "seedbed.manifest"
# Loaders built on the safetensors reference implementation refuse larger headers too.
SAFETENSORS_HEADER_MAX = 100_000_000
ITEMSIZE: Mapping[str, int] = {"float64": 8, "float32": 4, "float16": 2, "bfloat16": 2}
SAFETENSORS_CODES: Mapping[str, str] = {
    "float64": "F64",
    "float32": "F32",
    "float16": "F16",
    "bfloat16": "BF16",
}
# NPY has no bfloat16 that loads without pickle: the service stores its uint16 bit patterns.
NPY_DESCR: Mapping[str, str] = {
    "float64": "<f8",
    "float32": "<f4",
    "float16": "<f2",
    "bfloat16": "<u2",
}


class BFloat16AsBits(UserWarning):
    """bfloat16 tensors were returned as uint16 bit patterns because ml_dtypes is missing."""


def numpy_dtype(name: str) -> np.dtype[Any]:
    """The numpy dtype for a seedbed dtype name; bfloat16 needs ml_dtypes, else uint16 bits."""
    if name == "bfloat16":
        try:
            import ml_dtypes
        except ImportError:
            warnings.warn(
                "bfloat16 tensors are returned as uint16 arrays of their bit patterns because "
                "ml_dtypes is not installed (pip install 'seedbed-client[bfloat16]'); "
                "these are not the values: reinterpret with arr.view(ml_dtypes.bfloat16), or "
                "torch.from_numpy(arr.view('int16')).view(torch.bfloat16)",
                BFloat16AsBits,
                stacklevel=3,
            )
            return np.dtype("<u2")
        return np.dtype(ml_dtypes.bfloat16)
    if name not in NPY_DESCR:
        raise IntegrityError(f"the manifest names an unknown dtype {name!r}")
    return np.dtype(NPY_DESCR[name])


@dataclass(frozen=True)
class TensorCheck:
    """One tensor as found in a container, and whether it matches its manifest entry."""

    name: str
    entry: Mapping[str, Any]
    raw: memoryview
    sha256: str
    problem: str | None  # None when shape, dtype, length and digest all agree
    offset: int | None = None  # where its bytes start in the body (None: decoded, not stored)

    @property
    def ok(self) -> bool:
        return self.problem is None

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(int(n) for n in self.entry["shape"])

    @property
    def dtype(self) -> str:
        return str(self.entry["dtype"])


@dataclass(frozen=True)
class Inspection:
    """A parsed container: its manifest and every tensor's check."""

    format: WeightFormat
    manifest: dict[str, Any]
    tensors: list[TensorCheck]

    @property
    def failed(self) -> list[TensorCheck]:
        return [t for t in self.tensors if not t.ok]


def sniff_format(buffer: Any) -> WeightFormat:
    """Which container a downloaded body is: zip magic, a JSON object, else safetensors."""
    head = bytes(memoryview(buffer)[:16])
    if head[:4] == b"PK\x03\x04":
        return "npz"
    if head.lstrip()[:1] == b"{":
        return "json"
    return "safetensors"


# Tensors are hashed this many bytes at a time, so a mapped body's pages can be let go behind.
HASH_PIECE = 8 << 20


def inspect_body(
    buffer: Any,
    fmt: WeightFormat,
    release: Callable[[int, int], None] | None = None,
    *,
    rehash: bool = True,
) -> Inspection:
    """Parse `buffer` as `fmt` and check each tensor; IntegrityError if it cannot be parsed.

    `release(offset, length)` is called after each piece of a stored tensor is hashed: for a
    memory-mapped body it drops the pages just read, so checking a 1 GiB file does not hold
    1 GiB resident (`page_releaser`).

    `rehash=False` is for a body whose whole SHA-256 the caller has just matched against that of
    a body that passed this check in full (the cache's content address): the bytes are those
    bytes, so each tensor's digest is its manifest's and only the structure is checked again."""
    view = memoryview(buffer).cast("B")
    if fmt == "safetensors":
        manifest, found = _read_safetensors(view)
    elif fmt == "npz":
        manifest, found = _read_npz(view, release)
    elif fmt == "json":
        manifest, found = _read_json(view)
    else:
        raise ValueError(f"unknown format {fmt!r}")
    return Inspection(fmt, manifest, _check_all(manifest, found, fmt, release, rehash))


def require_intact(inspection: Inspection, what: str = "the response") -> None:
    failed = inspection.failed
    if failed:
        detail = "; ".join(f"{t.name}: {t.problem}" for t in failed[:5])
        more = f" (and {len(failed) - 5} more)" if len(failed) > 5 else ""
        raise IntegrityError(
            f"{what} does not match its manifest: {detail}{more}; no data was returned",
            [t.name for t in failed],
        )


def page_releaser(mapped: Any) -> Callable[[int, int], None] | None:
    """A `release` for inspect_body over an mmap (Linux and macOS), else None."""
    advice = getattr(mmap, "MADV_DONTNEED", None)
    if not isinstance(mapped, mmap.mmap) or advice is None:
        return None
    page = mmap.PAGESIZE

    def release(offset: int, length: int) -> None:
        start = offset - offset % page
        end = min(len(mapped), offset + length)
        end -= end % page  # whole pages only; a shared edge page stays until its neighbour goes
        if end > start:
            # A read-only file mapping: the pages stay in the page cache, only our RSS shrinks.
            with contextlib.suppress(OSError, ValueError):
                mapped.madvise(advice, start, end - start)

    return release


def mapped_arrays(inspection: Inspection, path: Path | BinaryIO) -> dict[str, np.ndarray]:
    """Each verified tensor as a private, writable memory map of its bytes in `path` (a path or
    an open file).

    Nothing is read until used, and each array has its own mapping, released with the array:
    a caller that copies tensors one by one and drops them holds about one at a time. Writes
    go to private copies of the pages and never reach the file. Tensors the container does not
    store as plain bytes (compressed members, JSON) are copied instead."""
    require_intact(inspection)
    out: dict[str, np.ndarray] = {}
    for t in inspection.tensors:
        dtype = numpy_dtype(t.dtype)
        if t.offset is None or not t.shape or prod(t.shape) == 0:
            out[t.name] = np.frombuffer(t.raw, dtype=dtype).reshape(t.shape).copy()
            continue
        mapped = np.memmap(path, dtype=dtype, mode="c", offset=t.offset, shape=t.shape)
        out[t.name] = mapped.view(np.ndarray)
    return out


def to_arrays(inspection: Inspection) -> dict[str, np.ndarray]:
    """Each verified tensor as an array viewing the checked bytes (no copy when aligned)."""
    require_intact(inspection)
    out: dict[str, np.ndarray] = {}
    for t in inspection.tensors:
        array = np.frombuffer(t.raw, dtype=numpy_dtype(t.dtype)).reshape(t.shape)
        if not array.flags.aligned:
            array = array.copy()
        out[t.name] = array
    return out


# ---------------------------------------------------------------------------------------------


@dataclass(frozen=True)
class _Found:
    raw: memoryview
    dtype_tag: str  # the container's own spelling: F32, <f4, or the manifest dtype for json
    shape: tuple[int, ...] | None
    offset: int | None = None  # position of `raw` in the body, when stored there as is


def _manifest_of(value: Any, where: str) -> dict[str, Any]:
    if not isinstance(value, dict) or not isinstance(value.get("tensors"), list):
        raise IntegrityError(f"{where} is not a seedbed manifest (no 'tensors' list)")
    for entry in value["tensors"]:
        if not (
            isinstance(entry, dict)
            and isinstance(entry.get("tensor"), str)
            and isinstance(entry.get("shape"), list)
            and all(isinstance(n, int) and n >= 0 for n in entry["shape"])
            and entry.get("dtype") in ITEMSIZE
            and isinstance(entry.get("sha256"), str)
        ):
            raise IntegrityError(f"{where} has a malformed tensor entry: {str(entry)[:200]}")
    return value


def _json_at(view: memoryview, what: str) -> Any:
    try:
        return json.loads(bytes(view).decode("utf-8"))
    except (UnicodeDecodeError, ValueError) as exc:
        raise IntegrityError(f"{what} is not valid JSON ({exc})") from None


def _read_safetensors(view: memoryview) -> tuple[dict[str, Any], dict[str, _Found]]:
    if len(view) < 8:
        raise IntegrityError(f"the safetensors body is {len(view)} bytes, shorter than its header")
    (n,) = struct.unpack("<Q", view[:8])
    if n > SAFETENSORS_HEADER_MAX or 8 + n > len(view):
        raise IntegrityError(
            f"the safetensors header claims {n} bytes but the body has {len(view)}: not a "
            "safetensors file, or a truncated one"
        )
    header = _json_at(view[8 : 8 + n], "the safetensors header")
    if not isinstance(header, dict):
        raise IntegrityError("the safetensors header is not a JSON object")
    meta = header.get("__metadata__")
    if not isinstance(meta, dict) or not isinstance(meta.get(SAFETENSORS_MANIFEST), str):
        raise IntegrityError(
            f"the safetensors header has no __metadata__[{SAFETENSORS_MANIFEST!r}]: not a "
            "seedbed download"
        )
    manifest = _manifest_of(
        _json_at(memoryview(meta[SAFETENSORS_MANIFEST].encode("utf-8")), "the manifest"),
        "the safetensors manifest",
    )
    data = view[8 + n :]
    found: dict[str, _Found] = {}
    for name, item in header.items():
        if name == "__metadata__":
            continue
        try:
            start, end = (int(x) for x in item["data_offsets"])
            shape = tuple(int(s) for s in item["shape"])
            code = str(item["dtype"])
        except (KeyError, TypeError, ValueError):
            raise IntegrityError(f"the safetensors entry of {name!r} is malformed") from None
        if not 0 <= start <= end <= len(data):
            raise IntegrityError(
                f"tensor {name!r} lies at bytes {start}..{end} of a data section of "
                f"{len(data)} bytes: the body is truncated or damaged"
            )
        found[name] = _Found(data[start:end], code, shape, 8 + n + start)
    return manifest, found


def _local_data_start(view: memoryview, info: zipfile.ZipInfo) -> int:
    at = info.header_offset
    if bytes(view[at : at + 4]) != b"PK\x03\x04":
        raise IntegrityError(f"the zip member {info.filename!r} has no local header")
    name_len, extra_len = struct.unpack("<HH", view[at + 26 : at + 30])
    return at + 30 + name_len + extra_len


def _npy_payload(member: memoryview, name: str, base: int | None = None) -> _Found:
    """Split one .npy member into its header fields and its data bytes (NPY format 1.0-3.0)."""
    if bytes(member[:6]) != b"\x93NUMPY" or len(member) < 10:
        raise IntegrityError(f"zip member {name!r} is not an .npy array")
    major = member[6]
    if major == 1:
        (hlen,) = struct.unpack("<H", member[8:10])
        start = 10 + hlen
    elif major in (2, 3) and len(member) >= 12:
        (hlen,) = struct.unpack("<I", member[8:12])
        start = 12 + hlen
    else:
        raise IntegrityError(f"zip member {name!r} has an unknown .npy version {major}")
    try:
        header = ast.literal_eval(bytes(member[start - hlen : start]).decode("latin-1").strip())
        descr, fortran, shape = header["descr"], header["fortran_order"], header["shape"]
    except (ValueError, SyntaxError, KeyError, TypeError):
        raise IntegrityError(f"the .npy header of {name!r} cannot be read") from None
    if fortran:
        raise IntegrityError(f"{name!r} is stored in Fortran order; seedbed stores C order")
    offset = None if base is None else base + start
    return _Found(member[start:], str(descr), tuple(int(s) for s in shape), offset)


class _ViewFile:
    """A read-only, seekable file over a buffer, so zipfile reads without copying it whole."""

    def __init__(self, view: memoryview) -> None:
        self._view = view
        self._at = 0

    def seekable(self) -> bool:
        return True

    def tell(self) -> int:
        return self._at

    def seek(self, offset: int, whence: int = 0) -> int:
        base = {0: 0, 1: self._at, 2: len(self._view)}[whence]
        self._at = max(0, base + offset)
        return self._at

    def read(self, size: int = -1) -> bytes:
        end = len(self._view) if size is None or size < 0 else min(len(self._view), self._at + size)
        chunk = bytes(self._view[self._at : end])
        self._at = max(self._at, end)
        return chunk


def _read_npz(
    view: memoryview, release: Callable[[int, int], None] | None = None
) -> tuple[dict[str, Any], dict[str, _Found]]:
    try:
        archive = zipfile.ZipFile(_ViewFile(view))
    except (zipfile.BadZipFile, OSError, ValueError, struct.error) as exc:
        raise IntegrityError(f"the NPZ body is not a readable zip archive ({exc})") from None
    with archive:
        members = {info.filename: info for info in archive.infolist()}
        if NPZ_MANIFEST not in members:
            raise IntegrityError(f"the NPZ archive has no {NPZ_MANIFEST} member")
        blobs: dict[str, memoryview] = {}
        starts: dict[str, int] = {}
        for name, info in members.items():
            if info.compress_type == zipfile.ZIP_STORED:
                start = _local_data_start(view, info)
                blob = view[start : start + info.file_size]
                if len(blob) != info.file_size:
                    raise IntegrityError(f"zip member {name!r} is cut short")
                if _crc32(blob, start, release) != info.CRC:
                    raise IntegrityError(f"zip member {name!r} fails its CRC-32 check")
                starts[name] = start
            else:  # not how seedbed writes archives, but a re-packed download may be compressed
                try:
                    blob = memoryview(archive.read(name))
                except (zipfile.BadZipFile, zlib.error, OSError) as exc:
                    raise IntegrityError(f"zip member {name!r} cannot be read ({exc})") from None
            blobs[name] = blob
    manifest = _manifest_of(
        _json_at(blobs.pop(NPZ_MANIFEST), "the NPZ manifest"), "the NPZ manifest"
    )
    found: dict[str, _Found] = {}
    for name, blob in blobs.items():
        if not name.endswith(".npy"):
            raise IntegrityError(f"unexpected member {name!r} in the NPZ archive")
        found[name[: -len(".npy")]] = _npy_payload(blob, name, starts.get(name))
    return manifest, found


def _read_json(view: memoryview) -> tuple[dict[str, Any], dict[str, _Found]]:
    doc = _manifest_of(_json_at(view, "the JSON body"), "the JSON body")
    found: dict[str, _Found] = {}
    manifest = dict(doc)
    entries = []
    for entry in doc["tensors"]:
        entry = dict(entry)
        data = entry.pop("data", None)
        if not isinstance(data, str):
            raise IntegrityError(f"tensor {entry['tensor']!r} has no base64 'data'")
        try:
            raw = base64.b64decode(data, validate=True)
        except (binascii.Error, ValueError):
            raise IntegrityError(f"the base64 data of {entry['tensor']!r} is damaged") from None
        found[entry["tensor"]] = _Found(memoryview(bytearray(raw)), str(entry["dtype"]), None)
        entries.append(entry)
    manifest["tensors"] = entries
    return manifest, found


def _crc32(blob: memoryview, start: int, release: Callable[[int, int], None] | None) -> int:
    crc = 0
    for at in range(0, len(blob), HASH_PIECE):
        piece = blob[at : at + HASH_PIECE]
        crc = zlib.crc32(piece, crc)
        if release is not None:
            release(start + at, len(piece))
    return crc & 0xFFFFFFFF


def _digest(item: _Found, release: Callable[[int, int], None] | None) -> str:
    sha = hashlib.sha256()
    raw = item.raw
    for at in range(0, len(raw), HASH_PIECE):
        piece = raw[at : at + HASH_PIECE]
        sha.update(piece)
        if release is not None and item.offset is not None:
            release(item.offset + at, len(piece))
    return sha.hexdigest()


def _check_all(
    manifest: dict[str, Any],
    found: dict[str, _Found],
    fmt: WeightFormat,
    release: Callable[[int, int], None] | None = None,
    rehash: bool = True,
) -> list[TensorCheck]:
    listed = [e["tensor"] for e in manifest["tensors"]]
    extra = sorted(set(found) - set(listed))
    if extra:
        raise IntegrityError(f"the container holds tensors the manifest does not list: {extra}")
    if len(set(listed)) != len(listed):
        raise IntegrityError("the manifest lists a tensor twice")
    checks = []
    for entry in manifest["tensors"]:
        name = entry["tensor"]
        item = found.get(name)
        if item is None:
            checks.append(TensorCheck(name, entry, memoryview(b""), "", "missing from the body"))
            continue
        digest = _digest(item, release) if rehash else str(entry.get("sha256", ""))
        checks.append(
            TensorCheck(
                name, entry, item.raw, digest, _problem(entry, item, digest, fmt), item.offset
            )
        )
    return checks


def _problem(entry: Mapping[str, Any], item: _Found, digest: str, fmt: WeightFormat) -> str | None:
    dtype = str(entry["dtype"])
    shape = tuple(entry["shape"])
    expected_tag = {"safetensors": SAFETENSORS_CODES, "npz": NPY_DESCR}.get(fmt, {}).get(
        dtype, dtype
    )
    if item.dtype_tag != expected_tag:
        return f"stored as {item.dtype_tag}, the manifest says {dtype} ({expected_tag})"
    if item.shape is not None and item.shape != shape:
        return f"stored with shape {list(item.shape)}, the manifest says {list(shape)}"
    want = prod(shape) * ITEMSIZE[dtype]
    if len(item.raw) != want:
        return f"{len(item.raw)} bytes where shape {list(shape)} of {dtype} needs {want}"
    if digest != entry["sha256"]:
        return f"sha256 {digest} differs from the manifest's {entry['sha256']}"
    return None
