"""Hypothesis fuzz of the upload readers audit uses: truncated, oversized, lying-header and
duplicate-member files are always refused with a code (a 4xx), never an unexpected exception
(a 5xx), and never make the reader hold more than the stated limit.

Files are built from real ones (numpy's np.savez, the `safetensors` library's save) and then
damaged; zip structures follow PKWARE's APPNOTE, safetensors its format description (8-byte
little-endian header length, JSON header, data). Memory is measured with tracemalloc, which
sees every numpy and Python allocation.
"""

from __future__ import annotations

import io
import json
import struct
import tracemalloc
import warnings
import zipfile

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from conftest import require_oracle
from seedbed.core.audit import AuditLimits, UploadRefused
from seedbed.core.audit.refusals import REFUSAL_CODES
from seedbed.formats.upload_in import audit_upload

LIMITS = AuditLimits(max_upload_bytes=64 * 1024, max_tensors=50, max_header_bytes=4096)
# What one audit may hold beyond the upload itself: the largest tensor, its float64 copy and
# bookkeeping. Four times the unpack limit is a generous ceiling that a reader trusting a
# lying header (gigabytes) would blow through.
MEMORY_CEILING = 4 * LIMITS.max_upload_bytes + (2 << 20)
FUZZ = settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def audited(data: bytes) -> None:
    """Audit `data`: either a report or a refusal with a known code, within the memory ceiling."""
    tracemalloc.start()
    try:
        report = audit_upload(io.BytesIO(data), len(data), LIMITS)
    except UploadRefused as refusal:
        assert refusal.code in REFUSAL_CODES and refusal.message
    else:
        assert report["summary"]["tensors"] >= 1
    finally:
        _, peak = tracemalloc.get_traced_memory()
        tracemalloc.stop()
    assert peak <= MEMORY_CEILING, peak


def npz(arrays: dict[str, np.ndarray]) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


_shapes = st.lists(st.integers(0, 6), min_size=0, max_size=3).map(tuple)
_dtypes = st.sampled_from([np.float32, np.float64, np.float16, np.int32, np.uint8])
_arrays = st.dictionaries(
    st.text("abcdefgh._", min_size=1, max_size=6),
    st.builds(lambda shape, dt: np.ones(shape, dt), _shapes, _dtypes),
    min_size=1,
    max_size=4,
)


@FUZZ
@given(_arrays, st.data())
def test_truncated_npz(arrays: dict[str, np.ndarray], data: st.DataObject) -> None:
    whole = npz(arrays)
    cut = data.draw(st.integers(0, len(whole) - 1))
    audited(whole[:cut])


@FUZZ
@given(_arrays, st.data())
def test_npz_with_flipped_bytes(arrays: dict[str, np.ndarray], data: st.DataObject) -> None:
    raw = bytearray(npz(arrays))
    for _ in range(data.draw(st.integers(1, 8))):
        at = data.draw(st.integers(0, len(raw) - 1))
        raw[at] = data.draw(st.integers(0, 255))
    audited(bytes(raw))


@FUZZ
@given(
    st.integers(0, 2**63 - 1),
    st.integers(0, 2**32 - 1),
    st.sampled_from(["<f4", "<f8", "|u1", "<c8", "|O"]),
)
def test_npz_whose_npy_header_lies(first: int, second: int, descr: str) -> None:
    header = f"{{'descr': '{descr}', 'fortran_order': False, 'shape': ({first}, {second}), }}"
    header += " " * (-(len(header) + 11) % 64) + "\n"
    npy = b"\x93NUMPY\x01\x00" + struct.pack("<H", len(header)) + header.encode() + bytes(16)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("w.npy", npy)
    audited(buf.getvalue())


@FUZZ
@given(st.integers(1, 2**40), st.integers(0, 3))
def test_npz_whose_zip_sizes_lie(declared: int, which: int) -> None:
    raw = bytearray(npz({"w": np.ones((8, 8), np.float32)}))
    # The central directory record's uncompressed size (offset 24) or compressed size (20),
    # or the local header's (22 / 18): a zip bomb declares small and holds large, or the reverse.
    at = raw.rfind(b"PK\x01\x02") + (24, 20)[which % 2] if which < 2 else (22, 18)[which % 2]
    raw[at : at + 4] = struct.pack("<I", declared % 2**32)
    audited(bytes(raw))


@FUZZ
@given(st.integers(2, 5))
def test_npz_with_duplicate_members(copies: int) -> None:
    member = io.BytesIO()
    np.save(member, np.eye(3, dtype=np.float32))
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf, warnings.catch_warnings():
        # zipfile warns about the duplicate name it is asked to write: that file is the point.
        warnings.simplefilter("ignore", UserWarning)
        for _ in range(copies):
            zf.writestr("w.npy", member.getvalue())
    data = buf.getvalue()
    try:
        audit_upload(io.BytesIO(data), len(data), LIMITS)
    except UploadRefused as refusal:
        assert refusal.code == "corrupt_file" and "twice" in refusal.message
    else:
        raise AssertionError("a member present twice must be refused")


def test_oversized_upload_is_refused_before_reading() -> None:
    data = npz({"w": np.ones(LIMITS.max_upload_bytes // 4 + 16, np.float32)})
    try:
        audit_upload(io.BytesIO(data), len(data), LIMITS)
    except UploadRefused as refusal:
        assert refusal.code == "too_large"
    else:
        raise AssertionError("an upload over the limit must be refused")


def safetensors_file(arrays: dict[str, np.ndarray]) -> bytes:
    st_np = require_oracle("safetensors.numpy")
    data: bytes = st_np.save(arrays)
    return data


@FUZZ
@given(_arrays, st.data())
def test_truncated_safetensors(arrays: dict[str, np.ndarray], data: st.DataObject) -> None:
    whole = safetensors_file({k: v.astype(np.float32) for k, v in arrays.items()})
    audited(whole[: data.draw(st.integers(0, len(whole) - 1))])


@FUZZ
@given(st.integers(0, 2**64 - 1))
def test_safetensors_whose_header_length_lies(length: int) -> None:
    whole = safetensors_file({"w": np.ones((4, 4), np.float32)})
    audited(struct.pack("<Q", length) + whole[8:])


_entry = st.fixed_dictionaries(
    {
        "dtype": st.sampled_from(["F32", "F64", "BF16", "I8", "F8_E4M3", "X9"]),
        "shape": st.lists(st.integers(-2, 2**40), max_size=3),
        "data_offsets": st.lists(st.integers(-1, 2**40), min_size=0, max_size=3),
    }
)


@FUZZ
@given(
    st.dictionaries(st.text(min_size=1, max_size=5), _entry, max_size=4),
    st.integers(0, 256),
    st.booleans(),
)
def test_safetensors_whose_entries_lie(
    header: dict[str, object], data_bytes: int, duplicate: bool
) -> None:
    text = json.dumps(header)
    if duplicate and header:
        key = json.dumps(next(iter(header)))
        text = text[:-1] + f", {key}: {json.dumps(next(iter(header.values())))}}}"
    raw = text.encode()
    audited(struct.pack("<Q", len(raw)) + raw + bytes(data_bytes))
