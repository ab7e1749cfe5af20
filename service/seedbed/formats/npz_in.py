"""Reading an uploaded NPZ without ever unpickling, and without trusting its sizes.

An NPZ is a zip archive of NPY members. Everything is checked from metadata before a single
tensor byte is decompressed:

1. The end-of-central-directory record is read by hand, so an archive declaring millions of
   entries is refused before `zipfile` builds an object per entry.
2. Per member (from the central directory): no encryption, compression stored or deflate only,
   declared uncompressed size within the limit, and the declared sizes of all members together
   within the limit. `zipfile` never yields more than a member's declared size, so these
   declarations bound the work even when the archive lies (a zip bomb fails its CRC instead).
3. Per `.npy` member: the NPY header is parsed by numpy's own header reader (a safe literal
   parser; no code runs). An object dtype means the data that follows is a pickle: the whole
   upload is refused and that data is never read. The header's shape and dtype must account
   for exactly the member's declared size.

Values are read later, one member at a time, when the analysis asks for them (`load`), and
the member must then end exactly where its header said and pass its CRC check.
"""

from __future__ import annotations

import json
import struct
import zipfile
import zlib
from collections.abc import Callable, Collection
from typing import IO, Any

import numpy as np
from numpy.lib import format as npy_format

from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.refusals import UploadRefused
from seedbed.core.audit.stored import StoredTensor, Upload
from seedbed.core.request.limits import raised_by
from seedbed.formats.npz_out import BF16_STORED_AS, MANIFEST_MEMBER, STORED_AS_KEY

_EOCD = b"PK\x05\x06"
_EOCD64_LOCATOR = b"PK\x06\x07"
_EOCD64 = b"PK\x06\x06"
_EOCD_SIZE = 22
_MAX_COMMENT = 0xFFFF
_READ_PIECE = 1 << 20
# Exceptions the zip and NPY readers raise for damaged input (never for our own mistakes).
_DAMAGE = (
    zipfile.BadZipFile,
    zipfile.LargeZipFile,
    zlib.error,
    EOFError,
    OSError,
    ValueError,
    struct.error,
    NotImplementedError,
)


def _declared_entries(fp: IO[bytes], size: int) -> int | None:
    """Entry count from the end-of-central-directory record (ZIP64 aware), or None if absent."""
    tail_len = min(size, _EOCD_SIZE + _MAX_COMMENT)
    fp.seek(size - tail_len)
    tail = fp.read(tail_len)
    at = tail.rfind(_EOCD)
    if at < 0 or len(tail) - at < _EOCD_SIZE:
        return None
    count = int(struct.unpack_from("<H", tail, at + 10)[0])
    if count != 0xFFFF:
        return count
    loc = at - 20
    if loc < 0 or tail[loc : loc + 4] != _EOCD64_LOCATOR:
        return count
    (offset,) = struct.unpack_from("<Q", tail, loc + 8)
    if offset + 56 > size:
        return None
    fp.seek(offset)
    record = fp.read(56)
    if record[:4] != _EOCD64:
        return None
    return int(struct.unpack_from("<Q", record, 32)[0])


def _dtype_label(dtype: np.dtype[Any], bf16: bool) -> str | None:
    """Our name for an NPY dtype we analyse, or None for one we only list."""
    if dtype.names is not None or dtype.subdtype is not None:
        return None
    if bf16 and dtype.itemsize == 2 and dtype.kind in "uV":
        return "bfloat16"
    if dtype.kind == "f" and dtype.itemsize in (2, 4, 8):
        return f"float{dtype.itemsize * 8}"
    if dtype.kind in "iu" and dtype.itemsize in (1, 2, 4, 8):
        return f"{'u' if dtype.kind == 'u' else ''}int{dtype.itemsize * 8}"
    if dtype.kind == "b":
        return "bool"
    return None


def _bf16_names_from_manifest(
    zf: zipfile.ZipFile, info: zipfile.ZipInfo, limits: AuditLimits
) -> tuple[set[str], str | None]:
    """Tensors that seedbed's own NPZ stored as uint16 bit patterns of bfloat16."""
    if info.file_size > limits.max_header_bytes:
        return set(), (
            f"member {info.filename!r} ({info.file_size} bytes) is larger than "
            f"{limits.max_header_bytes} bytes and was not read"
        )
    try:
        with zf.open(info) as f:
            manifest = json.loads(f.read(limits.max_header_bytes + 1).decode("utf-8"))
        entries = manifest.get("tensors", [])
        names = {
            str(e["tensor"])
            for e in entries
            if isinstance(e, dict) and e.get(STORED_AS_KEY) == BF16_STORED_AS
        }
    except (*_DAMAGE, UnicodeDecodeError, AttributeError, KeyError, TypeError):
        return set(), f"member {info.filename!r} is not a readable seedbed manifest; ignored"
    return names, None


class _MemberHeader:
    __slots__ = ("data_offset", "dtype", "fortran", "shape")

    def __init__(
        self, dtype: np.dtype[Any], shape: tuple[int, ...], fortran: bool, data_offset: int
    ) -> None:
        self.dtype = dtype
        self.shape = shape
        self.fortran = fortran
        self.data_offset = data_offset


def _read_member_header(
    zf: zipfile.ZipFile, info: zipfile.ZipInfo, limits: AuditLimits
) -> _MemberHeader:
    name = info.filename
    try:
        with zf.open(info) as f:
            version = npy_format.read_magic(f)
            if version == (1, 0):
                shape, fortran, dtype = npy_format.read_array_header_1_0(
                    f, max_header_size=limits.max_npy_header_bytes
                )
            elif version in ((2, 0), (3, 0)):
                # 3.0 differs from 2.0 only in allowing UTF-8 field names of structured dtypes,
                # which are listed but never analysed.
                shape, fortran, dtype = npy_format.read_array_header_2_0(
                    f, max_header_size=limits.max_npy_header_bytes
                )
            else:
                raise ValueError(f"NPY format version {version[0]}.{version[1]} is not known")
            offset = f.tell()
    except _DAMAGE as exc:
        raise UploadRefused(
            "corrupt_file", f"member {name!r} is not a readable NPY array: {exc}"
        ) from None
    if any(d < 0 for d in shape):
        # numpy's header reader checks only that the sizes are integers.
        raise UploadRefused(
            "corrupt_file",
            f"member {name!r} declares shape {list(shape)}; sizes must be non-negative",
        )
    return _MemberHeader(dtype, tuple(int(d) for d in shape), bool(fortran), offset)


def _loader(
    zf: zipfile.ZipFile,
    info: zipfile.ZipInfo,
    head: _MemberHeader,
    stored: np.dtype[Any],
    view_as: Any,
    expected: int,
) -> Callable[[], np.ndarray]:
    def load() -> np.ndarray:
        name = info.filename
        out = bytearray(expected)
        view = memoryview(out)
        try:
            with zf.open(info) as f:
                f.seek(head.data_offset)
                pos = 0
                while pos < expected:
                    piece = f.read(min(_READ_PIECE, expected - pos))
                    if not piece:
                        raise UploadRefused(
                            "truncated_file",
                            f"member {name!r} ends after {pos} of its {expected} data bytes",
                        )
                    view[pos : pos + len(piece)] = piece
                    pos += len(piece)
                # Reading to the end makes zipfile check the member's CRC-32.
                if f.read(1):
                    raise UploadRefused(
                        "corrupt_file", f"member {name!r} has bytes after its array data"
                    )
        except _DAMAGE as exc:
            raise UploadRefused(
                "corrupt_file", f"member {name!r} cannot be decompressed intact: {exc}"
            ) from None
        values = np.frombuffer(out, dtype=stored)
        native = stored.newbyteorder("=")
        if stored != native:
            values = values.astype(native)
        if view_as is not None:
            values = values.view(view_as)
        shaped = (
            values.reshape(head.shape, order="F") if head.fortran else values.reshape(head.shape)
        )
        return np.ascontiguousarray(shaped)

    return load


def _check_member_meta(info: zipfile.ZipInfo, size: int, limits: AuditLimits) -> None:
    name = info.filename
    if info.flag_bits & 0x1:
        raise UploadRefused(
            "unsupported_file", f"member {name!r} is encrypted; upload an unencrypted NPZ"
        )
    if info.compress_type not in (zipfile.ZIP_STORED, zipfile.ZIP_DEFLATED):
        raise UploadRefused(
            "unsupported_file",
            f"member {name!r} uses zip compression method {info.compress_type}; "
            "allowed: stored (np.savez) or deflate (np.savez_compressed)",
        )
    if info.file_size > limits.max_upload_bytes:
        raise UploadRefused(
            "too_large",
            f"member {name!r} declares {info.file_size} uncompressed bytes; at "
            f"most {limits.max_upload_bytes} are unpacked per upload"
            f"{raised_by('max_audit_bytes')}",
        )
    if info.header_offset + info.compress_size > size:
        raise UploadRefused(
            "truncated_file",
            f"member {name!r} needs {info.compress_size} bytes from offset "
            f"{info.header_offset}, past the end of the {size}-byte file",
        )


def read_npz(
    fp: IO[bytes], size: int, limits: AuditLimits, bfloat16_names: Collection[str] = ()
) -> Upload:
    """Check an NPZ's structure and every member's header; refuse it before any value is read.

    `bfloat16_names` are tensors whose 2-byte members hold bfloat16 bit patterns (from a
    request describing the file); seedbed's own manifest member adds its own.
    """
    declared = _declared_entries(fp, size)
    if declared is None:
        raise UploadRefused(
            "corrupt_file",
            "the zip archive has no end-of-central-directory record: the file is "
            "truncated, or not a complete NPZ",
        )
    if declared > limits.max_tensors + 1:
        raise UploadRefused(
            "too_large",
            f"the archive declares {declared} members; at most "
            f"{limits.max_tensors} tensors are audited per upload",
        )
    try:
        fp.seek(0)
        zf = zipfile.ZipFile(fp)
        infos = zf.infolist()
    except _DAMAGE as exc:
        raise UploadRefused("corrupt_file", f"not a readable zip archive: {exc}") from None

    seen: set[str] = set()
    total = 0
    for info in infos:
        if info.filename in seen:
            raise UploadRefused(
                "corrupt_file",
                f"member {info.filename!r} appears twice in the archive; which "
                "one is meant is ambiguous",
            )
        seen.add(info.filename)
        _check_member_meta(info, size, limits)
        total += info.file_size
    if total > limits.max_upload_bytes:
        raise UploadRefused(
            "too_large",
            f"the members declare {total} uncompressed bytes in total; at most "
            f"{limits.max_upload_bytes} are unpacked per upload"
            f"{raised_by('max_audit_bytes')}",
        )

    notes: list[str] = []
    hinted = set(bfloat16_names)
    for info in infos:
        if info.filename == MANIFEST_MEMBER:
            names, note = _bf16_names_from_manifest(zf, info, limits)
            hinted |= names
            if note:
                notes.append(note)

    tensors: list[StoredTensor] = []
    skipped: list[str] = []
    for info in infos:
        name = info.filename
        if name == MANIFEST_MEMBER or info.is_dir():
            continue
        if not name.endswith(".npy"):
            notes.append(f"member {name!r} is not an .npy array and was not read")
            skipped.append(name)
            continue
        tensors.append(_member_tensor(zf, info, limits, hinted))
    return Upload("npz", tuple(tensors), tuple(notes), tuple(skipped))


def _member_tensor(
    zf: zipfile.ZipFile, info: zipfile.ZipInfo, limits: AuditLimits, hinted: set[str]
) -> StoredTensor:
    name = info.filename
    tensor = name[: -len(".npy")]
    head = _read_member_header(zf, info, limits)
    if head.dtype.hasobject:
        raise UploadRefused(
            "pickled_data",
            f"member {name!r} holds Python objects (dtype {head.dtype.str!r}), "
            "stored as a pickle; pickled data is never loaded. Save plain "
            "numeric arrays (np.savez of float arrays) or use safetensors",
        )
    count = 1
    for d in head.shape:
        count *= d
    expected = count * head.dtype.itemsize
    held = info.file_size - head.data_offset
    if held < expected:
        raise UploadRefused(
            "truncated_file",
            f"member {name!r} declares shape {list(head.shape)} of "
            f"{head.dtype.str} ({expected} bytes) but holds {max(held, 0)} "
            "bytes of data",
        )
    if held > expected:
        raise UploadRefused(
            "corrupt_file",
            f"member {name!r} holds {held - expected} bytes after the "
            f"{expected} bytes its header declares",
        )
    label = _dtype_label(head.dtype, tensor in hinted)
    if label is None:
        hint = (
            " (2-byte opaque values: bfloat16 saved by ml_dtypes looks like this; send a "
            "request with dtype bfloat16 to have it read as such)"
            if head.dtype.kind == "V" and head.dtype.itemsize == 2
            else ""
        )
        return StoredTensor(
            tensor,
            head.dtype.str,
            head.shape,
            expected,
            None,
            f"dtype {head.dtype.str!r} is not analysed{hint}",
        )
    note = None
    view_as: Any = None
    stored = head.dtype
    if label == "bfloat16":
        import ml_dtypes  # only needed for this dtype

        # Bit patterns: read them as unsigned 16-bit integers in the file's byte order.
        stored = np.dtype(">u2" if head.dtype.byteorder == ">" else "<u2")
        view_as = ml_dtypes.bfloat16
        note = f"stored as {head.dtype.str} bit patterns, read as bfloat16"
    return StoredTensor(
        tensor,
        label,
        head.shape,
        expected,
        _loader(zf, info, head, stored, view_as, expected),
        note,
    )
