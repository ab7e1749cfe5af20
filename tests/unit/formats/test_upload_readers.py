"""Reading uploads safely: NPZ (never unpickled, sizes checked before decompression) and
safetensors (strict header), without the web layer.

Outside references: files are written by numpy (np.savez, np.savez_compressed) and by the
`safetensors` library, and read back by those libraries' own loaders to compare values; zip
structures are made with Python's zipfile; layouts per the safetensors format description
(8-byte little-endian header length, JSON header, data section) and PKWARE's APPNOTE
(end-of-central-directory record).
"""

from __future__ import annotations

import io
import json
import os
import pickle
import struct
import zipfile
from pathlib import Path
from types import ModuleType

import ml_dtypes
import numpy as np
import pytest

from conftest import require_oracle
from seedbed.core.audit import AuditLimits, UploadRefused
from seedbed.formats.upload_in import audit_upload, open_upload


def st() -> ModuleType:
    """The safetensors library's numpy API: the reference writer and reader."""
    return require_oracle("safetensors.numpy")


def npz_bytes(compressed: bool = False, **arrays: np.ndarray) -> bytes:
    buf = io.BytesIO()
    (np.savez_compressed if compressed else np.savez)(buf, **arrays)
    return buf.getvalue()


def refused(data: bytes, limits: AuditLimits | None = None) -> UploadRefused:
    with pytest.raises(UploadRefused) as info:
        audit_upload(io.BytesIO(data), len(data), limits)
    return info.value


class PlantedPayload:
    """Unpickling this creates a directory: proof that code ran."""

    def __init__(self, target: Path) -> None:
        self.target = target

    def __reduce__(self) -> tuple[object, tuple[str]]:
        return (os.mkdir, (str(self.target),))


def test_pickled_member_is_refused_and_never_unpickled(tmp_path: Path) -> None:
    marker = tmp_path / "code-ran"
    data = npz_bytes(
        **{
            "layer.weight": np.ones((2, 2), np.float32),
            "payload": np.array([PlantedPayload(marker)], dtype=object),
        }
    )
    err = refused(data)
    assert err.code == "pickled_data"
    assert "'payload.npy'" in err.message and "pickled data is never loaded" in err.message
    assert not marker.exists()
    # The payload is live: numpy's loader with pickles allowed does run it.
    np.load(io.BytesIO(data), allow_pickle=True)["payload"]
    assert marker.exists()


@pytest.mark.parametrize("compressed", [False, True])
def test_npz_values_equal_numpys_own_reading(compressed: bool) -> None:
    rng = np.random.default_rng(1)
    arrays = {
        "a.weight": rng.standard_normal((5, 3)).astype(np.float32),
        "b.weight": np.asfortranarray(rng.standard_normal((4, 6))),
        "big_endian": rng.standard_normal(7).astype(">f4"),
        "half": rng.standard_normal((3, 3)).astype(np.float16),
        "steps": np.arange(4, dtype=np.int64),
    }
    data = npz_bytes(compressed, **arrays)
    upload = open_upload(io.BytesIO(data), len(data), AuditLimits())
    assert upload.container == "npz"
    reference = np.load(io.BytesIO(data))
    for t in upload.tensors:
        assert t.load is not None
        got = t.load()
        np.testing.assert_array_equal(got, reference[t.name])
        assert got.dtype.isnative
    assert {t.name: t.dtype for t in upload.tensors}["steps"] == "int64"


def test_bfloat16_saved_by_ml_dtypes_is_read_when_the_request_says_so() -> None:
    values = np.linspace(-1, 1, 12).astype(ml_dtypes.bfloat16).reshape(3, 4)
    data = npz_bytes(w=values)
    plain = open_upload(io.BytesIO(data), len(data), AuditLimits())
    assert plain.tensors[0].load is None and "bfloat16" in (plain.tensors[0].note or "")
    hinted = open_upload(io.BytesIO(data), len(data), AuditLimits(), bfloat16_names={"w"})
    loader = hinted.tensors[0].load
    assert loader is not None
    np.testing.assert_array_equal(loader(), values)


def test_safetensors_values_equal_the_librarys_own_reading() -> None:
    rng = np.random.default_rng(2)
    arrays = {
        "enc.weight": rng.standard_normal((6, 4)).astype(np.float32),
        "enc.bias": np.zeros(6, np.float64),
        "half": rng.standard_normal((2, 5)).astype(np.float16),
        "ids": np.arange(3, dtype=np.int32),
        "flags": np.array([True, False]),
        "empty": np.zeros((0, 3), np.float32),
    }
    data = st().save(arrays, metadata={"note": "invented"})
    upload = open_upload(io.BytesIO(data), len(data), AuditLimits())
    reference = st().load(data)
    assert upload.container == "safetensors"
    assert {t.name for t in upload.tensors} == set(arrays)
    for t in upload.tensors:
        assert t.load is not None
        np.testing.assert_array_equal(t.load(), reference[t.name])


def test_safetensors_bf16_is_read_as_bfloat16() -> None:
    torch = require_oracle("torch")
    from safetensors.torch import save as torch_save

    values = torch.linspace(-2, 2, 10, dtype=torch.bfloat16).reshape(2, 5)
    data = torch_save({"w": values})
    upload = open_upload(io.BytesIO(data), len(data), AuditLimits())
    t = upload.tensors[0]
    assert t.dtype == "bfloat16" and t.load is not None
    np.testing.assert_array_equal(t.load().astype(np.float32), values.float().numpy())


def _safetensors(header: dict, data: bytes, length: int | None = None) -> bytes:
    text = json.dumps(header).encode()
    return struct.pack("<Q", len(text) if length is None else length) + text + data


@pytest.mark.parametrize(
    ("header", "data", "code", "words"),
    [
        (
            {"w": {"dtype": "F32", "shape": [2], "data_offsets": [0, 8]}},
            b"\0" * 4,
            "truncated_file",
            "'w' ends at byte 8",
        ),
        (
            {"w": {"dtype": "F32", "shape": [3], "data_offsets": [0, 8]}},
            b"\0" * 8,
            "corrupt_file",
            "needs 12 bytes",
        ),
        (
            {"w": {"dtype": "Q9", "shape": [2], "data_offsets": [0, 8]}},
            b"\0" * 8,
            "corrupt_file",
            "allowed: F64, F32",
        ),
        (
            {"w": {"dtype": "F32", "shape": [-1], "data_offsets": [0, 8]}},
            b"\0" * 8,
            "corrupt_file",
            "non-negative",
        ),
        (
            {"w": {"dtype": "F32", "shape": [2], "data_offsets": [0, 8], "x": 1}},
            b"\0" * 8,
            "corrupt_file",
            "unknown ['x']",
        ),
        (
            {
                "a": {"dtype": "F32", "shape": [2], "data_offsets": [0, 8]},
                "b": {"dtype": "F32", "shape": [1], "data_offsets": [4, 8]},
            },
            b"\0" * 8,
            "corrupt_file",
            "overlaps",
        ),
        (
            {"a": {"dtype": "F32", "shape": [1], "data_offsets": [4, 8]}},
            b"\0" * 8,
            "corrupt_file",
            "leaves a gap",
        ),
        (
            {"a": {"dtype": "F32", "shape": [1], "data_offsets": [0, 4]}},
            b"\0" * 8,
            "corrupt_file",
            "4 bytes after the last tensor",
        ),
        ({"__metadata__": {"k": 1}}, b"", "corrupt_file", "__metadata__"),
    ],
)
def test_bad_safetensors_headers_are_refused_naming_the_problem(
    header: dict, data: bytes, code: str, words: str
) -> None:
    err = refused(_safetensors(header, data))
    assert err.code == code
    assert words in err.message


def test_safetensors_header_length_past_the_end_and_bad_json() -> None:
    good = st().save({"w": np.ones(4, np.float32)})
    err = refused(struct.pack("<Q", 10**6) + good[8:])
    assert err.code == "truncated_file" and "header length is 1000000" in err.message
    err = refused(struct.pack("<Q", 5) + b'{"w":' + b"\0" * 8)
    assert err.code == "corrupt_file" and "not valid JSON" in err.message
    dup = b'{"w":{"dtype":"F32","shape":[1],"data_offsets":[0,4]},"w":{}}'
    err = refused(struct.pack("<Q", len(dup)) + dup + b"\0" * 4)
    assert "twice" in err.message


def test_truncated_npz_is_refused_naming_the_problem() -> None:
    data = npz_bytes(w=np.ones((64, 64), np.float32))
    err = refused(data[: len(data) // 2])
    assert err.code == "corrupt_file" and "end-of-central-directory" in err.message


def test_damaged_member_data_fails_its_crc_check() -> None:
    data = bytearray(npz_bytes(w=np.ones((16, 16), np.float32)))
    at = data.find(b"\x00\x00\x80\x3f")  # a float32 1.0 in the stored member
    data[at + 3] ^= 0x01
    err = refused(bytes(data))
    assert err.code == "corrupt_file" and "'w.npy'" in err.message and "CRC" in err.message


def test_npy_header_that_disagrees_with_the_member_size() -> None:
    member = io.BytesIO()
    np.save(member, np.ones(10, np.float32))
    raw = member.getvalue()[:-8]  # two values short
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("w.npy", raw)
    err = refused(buf.getvalue())
    assert err.code == "truncated_file" and "'w.npy'" in err.message and "40 bytes" in err.message


def _bomb_like(declared: int) -> bytes:
    """A zip whose one deflate member declares `declared` uncompressed bytes, with garbage as
    its compressed data: decompressing it would fail, so a size refusal proves none was tried."""
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_DEFLATED) as zf:
        zf.writestr("w.npy", bytes(range(256)))  # incompressible: 256+ bytes of deflate data
    data = bytearray(buf.getvalue())
    central = data.find(b"PK\x01\x02")
    struct.pack_into("<I", data, central + 24, declared)  # uncompressed size in the directory
    local_data = 30 + len("w.npy")
    for i in range(local_data, local_data + 8):
        data[i] = 0xFF
    return bytes(data)


def test_declared_sizes_over_the_limit_are_refused_before_decompression() -> None:
    limits = AuditLimits(max_upload_bytes=1 << 20)
    err = refused(_bomb_like(5 << 20), limits)
    assert err.code == "too_large" and "'w.npy'" in err.message and str(5 << 20) in err.message
    # Under the limit, the same garbage is found only when decompressing: a different refusal.
    err = refused(_bomb_like(200), limits)
    assert err.code == "corrupt_file"


def test_many_small_members_adding_up_past_the_limit() -> None:
    limits = AuditLimits(max_upload_bytes=64 << 10)
    zeros = {f"t{i}": np.zeros(4096, np.float32) for i in range(8)}  # 8 x 16 KiB, compresses
    data = npz_bytes(True, **zeros)
    assert len(data) < limits.max_upload_bytes
    err = refused(data, limits)
    assert err.code == "too_large" and "in total" in err.message


def test_member_count_is_checked_from_the_end_record_first() -> None:
    limits = AuditLimits(max_tensors=5)
    data = npz_bytes(**{f"t{i}": np.zeros(1, np.float32) for i in range(7)})
    err = refused(data, limits)
    assert err.code == "too_large" and "7 members" in err.message


def test_encrypted_flag_and_other_compression_are_refused() -> None:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w", zipfile.ZIP_BZIP2) as zf:
        zf.writestr("w.npy", b"x")
    err = refused(buf.getvalue())
    assert err.code == "unsupported_file" and "compression method 12" in err.message


def test_not_a_weights_file() -> None:
    assert refused(b"").code == "empty_file"
    err = refused(b"hello, this is text")
    assert err.code == "unsupported_file" and "68 65 6c 6c" in err.message
    single = io.BytesIO()
    np.save(single, np.ones(3))
    assert "single .npy" in refused(single.getvalue()).message


def test_other_members_are_listed_as_notes_not_read() -> None:
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        arr = io.BytesIO()
        np.save(arr, np.ones((2, 2), np.float32))
        zf.writestr("w.npy", arr.getvalue())
        zf.writestr("README.txt", pickle.dumps("not read"))
    data = buf.getvalue()
    report = audit_upload(io.BytesIO(data), len(data))
    notes = [f for f in report["findings"] if f["code"] == "ignored_member"]
    assert len(notes) == 1 and "'README.txt'" in notes[0]["message"]


def test_negative_npy_sizes_are_refused() -> None:
    # numpy's header reader accepts any integers as sizes; (-1, -1) with 4 bytes of data would
    # otherwise pass the size check (count 1) and fail later.
    text = "{'descr': '<f4', 'fortran_order': False, 'shape': (-1, -1), }"
    text += " " * (117 - len(text)) + "\n"
    npy = b"\x93NUMPY\x01\x00" + len(text).to_bytes(2, "little") + text.encode() + bytes(4)
    buf = io.BytesIO()
    with zipfile.ZipFile(buf, "w") as zf:
        zf.writestr("w.npy", npy)
    err = refused(buf.getvalue())
    assert err.code == "corrupt_file" and "non-negative" in err.message


@pytest.mark.parametrize("container", ["npz", "safetensors"])
def test_damaged_files_are_refused_or_reported_never_crash(container: str) -> None:
    # Random byte changes and truncations of valid files: every outcome is a report or an
    # UploadRefused, never another exception (which the service would turn into a 500).
    import random

    rng = np.random.default_rng(0)
    arrays = {
        "a.weight": rng.standard_normal((6, 5)).astype(np.float32),
        "b": np.arange(4, dtype=np.int16),
        "c": np.zeros((2, 3), np.float16),
    }
    base = npz_bytes(True, **arrays) if container == "npz" else st().save(arrays)
    pick = random.Random(7)
    outcomes = {"report": 0, "refused": 0}
    for _ in range(400):
        data = bytearray(base)
        for _ in range(pick.randint(1, 4)):
            data[pick.randrange(len(data))] = pick.randrange(256)
        if pick.random() < 0.2:
            data = data[: pick.randrange(len(data))]
        try:
            audit_upload(io.BytesIO(bytes(data)), len(data))
            outcomes["report"] += 1
        except UploadRefused:
            outcomes["refused"] += 1
    assert outcomes["refused"] > 0 and sum(outcomes.values()) == 400
