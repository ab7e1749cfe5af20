"""The NPZ response: a stored (uncompressed) zip of NPY members, streamed in one pass.

Layout, in order (PKWARE APPNOTE.TXT record layouts):
  for each tensor, in the caller's order:
      local file header   name "<tensor>.npy", general-purpose bit 3 set (CRC and sizes follow
                          the data), ZIP64 extra field when the member reaches 4 GiB
      NPY v1.0 header     descr '<f8' | '<f4' | '<f2' | '<u2' (bfloat16 bits), C order, shape
      raw tensor bytes
      data descriptor     signature, CRC-32, sizes (8-byte sizes for ZIP64 members)
  manifest member         "seedbed-manifest.json", written last with its CRC and size in its
                          local header (everything in it is known by then)
  central directory       one record per member; ZIP64 extra for sizes/offsets >= 4 GiB
  ZIP64 end record and locator, only when a count, size or offset overflows the classic fields
  end of central directory record

Every member is dated 1980-01-01 00:00:00 and carries fixed attributes, so the same input gives
the same bytes. CRC-32 values and SHA-256 digests are computed while the data streams, so the
tensors are generated once: sizes are known up front, and the manifest's length does not depend
on the digests (64 hex characters each).
"""

from __future__ import annotations

import struct
import zlib
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
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
    json_snapshot,
)

MEDIA_TYPE = "application/zip"
MANIFEST_MEMBER = "seedbed-manifest.json"
# Added to a bfloat16 tensor's manifest entry: NPY has no bfloat16 type that loads without pickle.
STORED_AS_KEY = "stored_as"
BF16_STORED_AS = "uint16 bit patterns of bfloat16"

NPY_DESCR: Mapping[str, str] = {
    "float64": "<f8",
    "float32": "<f4",
    "float16": "<f2",
    "bfloat16": "<u2",
}

# Classic zip fields hold values below these; reaching them needs ZIP64 records.
ZIP64_LIMIT = 0xFFFFFFFF
_COUNT_LIMIT = 0xFFFF

_SIG_LOCAL = 0x04034B50
_SIG_DESCRIPTOR = 0x08074B50
_SIG_CENTRAL = 0x02014B50
_SIG_END64 = 0x06064B50
_SIG_LOCATOR64 = 0x07064B50
_SIG_END = 0x06054B50

_FLAG_DESCRIPTOR = 1 << 3
_FLAG_UTF8 = 1 << 11
_STORED = 0
_DOS_TIME = 0  # 00:00:00
_DOS_DATE = (0 << 9) | (1 << 5) | 1  # 1980-01-01, the zip epoch
_MADE_BY = (3 << 8) | 45  # Unix host (so external attributes are a mode), spec 4.5
_NEEDS_PLAIN = 20
_NEEDS_ZIP64 = 45
_EXTERNAL_ATTR = 0o100644 << 16  # regular file, rw-r--r--
_NPY_ALIGN = 64  # NPY header padded so the data starts on a 64-byte boundary of the member


def npy_header(dtype: str, shape: tuple[int, ...]) -> bytes:
    """NPY format version 1.0 header for a little-endian C-order array."""
    text = f"{{'descr': '{NPY_DESCR[dtype]}', 'fortran_order': False, 'shape': {shape!r}}}"
    body = text.encode("ascii")
    fixed = 6 + 2 + 2  # magic, version, header length
    pad = -(fixed + len(body) + 1) % _NPY_ALIGN
    body += b" " * pad + b"\n"
    if len(body) > 0xFFFF:
        raise FormatInputError(
            f"shape {list(shape)} has too many dimensions for an NPY version 1.0 header"
        )
    return b"\x93NUMPY\x01\x00" + struct.pack("<H", len(body)) + body


@dataclass(frozen=True)
class _Member:
    name: bytes
    flags: int
    size: int  # stored, so compressed size == uncompressed size
    offset: int  # of the local header
    zip64_local: bool  # local header carries a ZIP64 extra (and descriptor has 8-byte sizes)
    with_descriptor: bool

    def needs(self, limit: int) -> int:
        big = self.zip64_local or self.size >= limit or self.offset >= limit
        return _NEEDS_ZIP64 if big else _NEEDS_PLAIN

    def local_header(self, crc: int, limit: int) -> bytes:
        if self.with_descriptor:
            crc, size = 0, 0
        else:
            size = self.size
        extra = b""
        size32 = size
        if self.zip64_local:
            extra = struct.pack("<HHQQ", 0x0001, 16, size, size)
            size32 = 0xFFFFFFFF
        return (
            struct.pack(
                "<IHHHHHIIIHH",
                _SIG_LOCAL,
                self.needs(limit),
                self.flags,
                _STORED,
                _DOS_TIME,
                _DOS_DATE,
                crc,
                size32,
                size32,
                len(self.name),
                len(extra),
            )
            + self.name
            + extra
        )

    def local_header_length(self) -> int:
        return 30 + len(self.name) + (20 if self.zip64_local else 0)

    def descriptor(self, crc: int) -> bytes:
        if not self.with_descriptor:
            return b""
        if self.zip64_local:
            return struct.pack("<IIQQ", _SIG_DESCRIPTOR, crc, self.size, self.size)
        return struct.pack("<IIII", _SIG_DESCRIPTOR, crc, self.size, self.size)

    def descriptor_length(self) -> int:
        if not self.with_descriptor:
            return 0
        return 24 if self.zip64_local else 16

    def end(self) -> int:
        return self.offset + self.local_header_length() + self.size + self.descriptor_length()

    def central_record(self, crc: int, limit: int) -> bytes:
        # APPNOTE 4.5.3: the ZIP64 extra holds, in this order, only the fields whose classic
        # slot is 0xFFFFFFFF.
        fields: list[int] = []
        size32 = self.size
        offset32 = self.offset
        if self.size >= limit:
            fields += [self.size, self.size]
            size32 = 0xFFFFFFFF
        if self.offset >= limit:
            fields.append(self.offset)
            offset32 = 0xFFFFFFFF
        extra = b""
        if fields:
            extra = struct.pack(f"<HH{len(fields)}Q", 0x0001, 8 * len(fields), *fields)
        return (
            struct.pack(
                "<IHHHHHHIIIHHHHHII",
                _SIG_CENTRAL,
                _MADE_BY,
                self.needs(limit),
                self.flags,
                _STORED,
                _DOS_TIME,
                _DOS_DATE,
                crc,
                size32,
                size32,
                len(self.name),
                len(extra),
                0,
                0,
                0,
                _EXTERNAL_ATTR,
                offset32,
            )
            + self.name
            + extra
        )

    def central_record_length(self, limit: int) -> int:
        n = (2 if self.size >= limit else 0) + (1 if self.offset >= limit else 0)
        return 46 + len(self.name) + (4 + 8 * n if n else 0)


def _member_name(text: str) -> tuple[bytes, int]:
    raw = text.encode("utf-8")
    return raw, (0 if raw.isascii() else _FLAG_UTF8)


def _end_records(count: int, cd_offset: int, cd_size: int, limit: int) -> bytes:
    """ZIP64 end record + locator when any classic field overflows, then the classic end."""
    out = b""
    count_limit = min(_COUNT_LIMIT, limit)  # a lowered test limit lowers this one too
    if count >= count_limit or cd_offset >= limit or cd_size >= limit:
        end64_offset = cd_offset + cd_size
        out += struct.pack(
            "<IQHHIIQQQQ",
            _SIG_END64,
            44,
            _MADE_BY,
            _NEEDS_ZIP64,
            0,
            0,
            count,
            count,
            cd_size,
            cd_offset,
        )
        out += struct.pack("<IIQI", _SIG_LOCATOR64, 0, end64_offset, 1)
    count16 = count if count < count_limit else 0xFFFF
    size32 = cd_size if cd_size < limit else 0xFFFFFFFF
    offset32 = cd_offset if cd_offset < limit else 0xFFFFFFFF
    out += struct.pack("<IHHHHIIH", _SIG_END, 0, 0, count16, count16, size32, offset32, 0)
    return out


def _bf16_note(t: OutgoingTensor) -> dict[str, Any]:
    return {STORED_AS_KEY: BF16_STORED_AS} if t.dtype == "bfloat16" else {}


def npz_body(
    document: Mapping[str, Any],
    tensors: Sequence[OutgoingTensor],
    *,
    digests: Mapping[str, str] | None = None,
    _zip64_limit: int = ZIP64_LIMIT,
) -> EncodedBody:
    """Build the NPZ response; one generation pass. With `digests`, each tensor is checked
    against its digest while streaming (the stream aborts before a mismatching tensor ends).

    `_zip64_limit` exists for tests: lowering it (sizes, offsets and, below 0xFFFF, the member
    count) exercises the ZIP64 records on small archives.
    """
    tensors = tuple(tensors)
    check_inputs(document, tensors)
    check_digests(digests, tensors)
    limit = _zip64_limit
    manifest = json_snapshot(build_manifest(document, tensors, None, _bf16_note), what="manifest")
    manifest_length = len(canonical_json(manifest))

    npy_headers = [npy_header(t.dtype, t.shape) for t in tensors]
    members: list[_Member] = []
    position = 0
    for t, head in zip(tensors, npy_headers, strict=True):
        name, flags = _member_name(t.name + ".npy")
        size = len(head) + t.nbytes
        member = _Member(name, flags | _FLAG_DESCRIPTOR, size, position, size >= limit, True)
        members.append(member)
        position = member.end()
    name, flags = _member_name(MANIFEST_MEMBER)
    manifest_member = _Member(
        name, flags, manifest_length, position, manifest_length >= limit, False
    )
    members.append(manifest_member)
    cd_offset = manifest_member.end()
    cd_size = sum(m.central_record_length(limit) for m in members)
    content_length = (
        cd_offset + cd_size + len(_end_records(len(members), cd_offset, cd_size, limit))
    )
    given = dict(digests) if digests is not None else None

    def produce() -> Iterator[bytes]:
        crcs: list[int] = []
        for t, head, member, entry in zip(
            tensors, npy_headers, members, manifest[TENSORS_KEY], strict=False
        ):
            yield member.local_header(0, limit)
            crc = zlib.crc32(head)
            yield head

            def running_crc(piece: bytes) -> None:
                nonlocal crc
                crc = zlib.crc32(piece, crc)

            expected = given[t.name] if given is not None else None
            entry["sha256"] = yield from checked_chunks(t, expected, running_crc)
            yield member.descriptor(crc)
            crcs.append(crc)
        body = canonical_json(manifest)
        if len(body) != manifest_length:
            raise ProducerContractError("NPZ manifest length changed after sizing")
        crc = zlib.crc32(body)
        crcs.append(crc)
        yield manifest_member.local_header(crc, limit)
        yield body
        for member, c in zip(members, crcs, strict=True):
            yield member.central_record(c, limit)
        yield _end_records(len(members), cd_offset, cd_size, limit)

    return EncodedBody(content_length, MEDIA_TYPE, coalesced(produce()))
