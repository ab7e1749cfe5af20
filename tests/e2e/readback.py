"""Read each weights container back with the library that owns its format, never with seedbed.

- json: the standard json module and base64 (RFC 4648) for each tensor's `data`;
- npz: numpy.load(allow_pickle=False), the manifest member read through the same NpzFile;
- safetensors: the safetensors package (deserialize for raw bytes of every dtype, numpy.load as
  a second reader where numpy has the dtype, safe_open for the header metadata).

Everything ends up as a `Payload`: the manifest plus each tensor's raw little-endian C-order
bytes, which is exactly what the manifest's sha256 is defined over (docs/formats.md).
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import ml_dtypes
import numpy as np
import safetensors
import safetensors.numpy

NPZ_MANIFEST = "seedbed-manifest.json"
SAFETENSORS_MANIFEST_KEY = "seedbed.manifest"

DTYPES: dict[str, np.dtype[Any]] = {
    "float64": np.dtype("<f8"),
    "float32": np.dtype("<f4"),
    "float16": np.dtype("<f2"),
    "bfloat16": np.dtype(ml_dtypes.bfloat16),
}
# What each dtype is called inside a safetensors header (the format's own dtype codes).
SAFETENSORS_CODES = {"float64": "F64", "float32": "F32", "float16": "F16", "bfloat16": "BF16"}


@dataclass(frozen=True)
class Payload:
    manifest: dict[str, Any]
    raw: dict[str, bytes]
    shapes: dict[str, tuple[int, ...]]

    def entry(self, name: str) -> dict[str, Any]:
        for item in self.manifest["tensors"]:
            if item["tensor"] == name:
                return dict(item)
        raise KeyError(name)

    def array(self, name: str) -> np.ndarray:
        dtype = DTYPES[self.entry(name)["dtype"]]
        return np.frombuffer(self.raw[name], dtype=dtype).reshape(self.shapes[name])


def read_json(body: bytes) -> Payload:
    doc = json.loads(body)
    raw: dict[str, bytes] = {}
    shapes: dict[str, tuple[int, ...]] = {}
    for item in doc["tensors"]:
        name = item["tensor"]
        raw[name] = base64.b64decode(item.pop("data"), validate=True)
        shapes[name] = tuple(item["shape"])
    return Payload(doc, raw, shapes)


def read_npz(body: bytes) -> Payload:
    with np.load(io.BytesIO(body), allow_pickle=False) as archive:
        members = list(archive.files)
        # A member that is not an .npy file comes back as its raw bytes.
        manifest = json.loads(archive[NPZ_MANIFEST])
        raw: dict[str, bytes] = {}
        shapes: dict[str, tuple[int, ...]] = {}
        for name in members:
            if name == NPZ_MANIFEST:
                continue
            arr = archive[name]
            entry = next(e for e in manifest["tensors"] if e["tensor"] == name)
            # NPY has no bfloat16 a pickle-free reader understands: those travel as uint16 bits.
            expected = np.dtype("<u2") if entry["dtype"] == "bfloat16" else DTYPES[entry["dtype"]]
            assert arr.dtype == expected, f"npz member {name}: dtype {arr.dtype}, want {expected}"
            assert arr.flags.c_contiguous or arr.ndim <= 1, f"npz member {name} is not C order"
            raw[name] = np.ascontiguousarray(arr).tobytes()
            shapes[name] = tuple(arr.shape)
    return Payload(manifest, raw, shapes)


def read_safetensors(body: bytes, scratch: Path) -> Payload:
    path = scratch / "weights.safetensors"
    path.write_bytes(body)
    with safetensors.safe_open(str(path), framework="numpy") as handle:
        metadata = handle.metadata() or {}
    manifest = json.loads(metadata[SAFETENSORS_MANIFEST_KEY])
    raw: dict[str, bytes] = {}
    shapes: dict[str, tuple[int, ...]] = {}
    dtypes = {e["tensor"]: e["dtype"] for e in manifest["tensors"]}
    for name, info in safetensors.deserialize(body):
        code = str(info["dtype"]).upper()
        assert code == SAFETENSORS_CODES[dtypes[name]], f"{name}: header dtype {code}"
        raw[name] = bytes(info["data"])
        shapes[name] = tuple(int(d) for d in info["shape"])
    if "bfloat16" not in dtypes.values():
        # A second, independent reader of the same bytes.
        for name, arr in safetensors.numpy.load(body).items():
            assert arr.tobytes() == raw[name], f"{name}: safetensors readers disagree"
    return Payload(manifest, raw, shapes)


def read_body(fmt: str, body: bytes, scratch: Path) -> Payload:
    if fmt == "json":
        return read_json(body)
    if fmt == "npz":
        return read_npz(body)
    if fmt == "safetensors":
        return read_safetensors(body, scratch)
    raise ValueError(f"unknown format {fmt!r}")


def check_digests(payload: Payload) -> None:
    """Every tensor present exactly once, of the stated shape and size, with its stated sha256."""
    entries = payload.manifest["tensors"]
    names = [e["tensor"] for e in entries]
    assert len(names) == len(set(names)), f"manifest lists a tensor twice: {names}"
    assert set(names) == set(payload.raw), f"manifest {names} vs body {sorted(payload.raw)}"
    for entry in entries:
        name = entry["tensor"]
        data = payload.raw[name]
        shape = tuple(entry["shape"])
        assert payload.shapes[name] == shape, f"{name}: shape {payload.shapes[name]} vs {shape}"
        size = math.prod(shape) * DTYPES[entry["dtype"]].itemsize
        assert len(data) == size, f"{name}: {len(data)} bytes, shape says {size}"
        digest = hashlib.sha256(data).hexdigest()
        assert digest == entry["sha256"], f"{name}: sha256 {digest} vs manifest {entry['sha256']}"
