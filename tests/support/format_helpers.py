"""Shared helpers for the format tests (no tests here).

The tensors are invented demo arrays: these tests check the container formats, not the numbers.
"""

from __future__ import annotations

import hashlib
import json
import math
import struct
from collections.abc import Iterator, Sequence
from itertools import cycle
from typing import Any

import numpy as np

from seedbed.formats import EncodedBody, OutgoingTensor

ITEMSIZE = {"float64": 8, "float32": 4, "float16": 2, "bfloat16": 2}

DEMO_DOCUMENT: dict[str, Any] = {
    "algorithm": "demo-algorithm-7",
    "seed": 424242,
    "dtype": "mixed",
    "layout": "out_in",
    "warnings": ["demo payload: values are arbitrary"],
}


def raw_tensor(
    name: str,
    raw: bytes,
    dtype: str,
    shape: tuple[int, ...],
    *,
    pieces: Sequence[int] = (4096,),
    entry: dict[str, Any] | None = None,
) -> OutgoingTensor:
    """A tensor over given raw bytes, cut into pieces of the given sizes (cycled), so that
    chunk boundaries fall wherever a test wants them."""

    def chunks() -> Iterator[bytes]:
        pos = 0
        for size in cycle(pieces):
            if pos >= len(raw):
                return
            yield raw[pos : pos + size]
            pos += size

    return OutgoingTensor(
        name=name,
        dtype=dtype,
        shape=shape,
        nbytes=len(raw),
        entry=dict(entry) if entry is not None else demo_entry(name),
        chunks=chunks,
    )


def demo_entry(name: str) -> dict[str, Any]:
    # Shaped like a manifest entry; the values are invented.
    return {
        "layer": name.rsplit(".", 1)[0],
        "method": "demo",
        "std": 0.0625,
        "bound": None,
        "rationale": 'Invented entry for a container-format test: "quotes", unicode é.',
        "references": ["none"],
    }


def array_tensor(
    name: str, array: np.ndarray, dtype: str | None = None, pieces: Sequence[int] = (4096,)
) -> OutgoingTensor:
    arr = np.asarray(array)  # not ascontiguousarray: it turns 0-d arrays into 1-d ones
    if arr.dtype.kind == "f":  # ml_dtypes' bfloat16 has kind "V"; test hosts are little-endian
        arr = arr.astype(arr.dtype.newbyteorder("<"))
    return raw_tensor(name, arr.tobytes(), dtype or str(arr.dtype), tuple(arr.shape), pieces=pieces)


def collect(encoded: EncodedBody) -> bytes:
    body = b"".join(encoded.body)
    assert len(body) == encoded.content_length
    return body


def full_bytes(t: OutgoingTensor) -> bytes:
    return b"".join(bytes(p) for p in t.chunks())


def sha256_hex(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def parse_safetensors(body: bytes) -> tuple[dict[str, Any], dict[str, bytes]]:
    """Independent reader following the safetensors format description: returns the header
    object and each tensor's raw bytes; asserts the layout rules on the way."""
    (n,) = struct.unpack("<Q", body[:8])
    assert (8 + n) % 8 == 0, "header must pad the data start to 8 bytes"
    text = body[8 : 8 + n]
    stripped = text.rstrip(b" ")
    assert stripped.startswith(b"{") and stripped.endswith(b"}")
    header = json.loads(text)
    data = body[8 + n :]
    out: dict[str, bytes] = {}
    cursor = 0
    for name, info in header.items():
        if name == "__metadata__":
            assert all(isinstance(k, str) and isinstance(v, str) for k, v in info.items())
            continue
        start, end = info["data_offsets"]
        assert start == cursor, "data must follow header order with no gaps"
        size = {"F64": 8, "F32": 4, "F16": 2, "BF16": 2}[info["dtype"]]
        assert end - start == math.prod(info["shape"]) * size
        out[name] = data[start:end]
        cursor = end
    assert cursor == len(data), "data section must be exactly covered"
    return header, out
