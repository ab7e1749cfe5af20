"""Properties over random payloads: exact Content-Length, read-back, determinism, digests."""

from __future__ import annotations

import base64
import io
import json
import math
import zipfile
from typing import Any

import numpy as np
import safetensors
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seedbed.formats import FORMAT_NAMES, OutgoingTensor, encode_body, json_size
from seedbed.formats.npz_out import MANIFEST_MEMBER, NPY_DESCR, npz_body
from seedbed.formats.safetensors_out import MANIFEST_KEY
from support.format_helpers import ITEMSIZE, collect, parse_safetensors, raw_tensor, sha256_hex

_ST_CODES = {"float64": "F64", "float32": "F32", "float16": "F16", "bfloat16": "BF16"}

_json_scalars = st.one_of(
    st.none(),
    st.booleans(),
    st.integers(-(2**63), 2**63),
    st.floats(allow_nan=False, allow_infinity=False),
    st.text(max_size=12),
)
_entries = st.dictionaries(
    st.sampled_from(["layer", "method", "std", "gain", "rationale", "references", "zeta", "a"]),
    st.one_of(_json_scalars, st.lists(_json_scalars, max_size=3)),
    max_size=5,
)
_names = st.text(alphabet="abcXYZ019._-é漢", min_size=1, max_size=10).filter(
    lambda s: ".." not in s.split("/")
)


@st.composite
def payloads(draw: st.DrawFn) -> tuple[dict[str, Any], list[OutgoingTensor]]:
    names = draw(st.lists(_names, max_size=4, unique=True))
    tensors = []
    for name in names:
        dtype = draw(st.sampled_from(sorted(ITEMSIZE)))
        shape = tuple(draw(st.lists(st.integers(0, 5), max_size=3)))
        n = math.prod(shape) * ITEMSIZE[dtype]
        raw = draw(st.binary(min_size=n, max_size=n))  # any bit pattern, NaNs included
        pieces = draw(st.lists(st.integers(1, 11), min_size=1, max_size=4))
        tensors.append(raw_tensor(name, raw, dtype, shape, pieces=pieces, entry=draw(_entries)))
    document = {
        "algorithm": draw(st.text(max_size=8)),
        "seed": draw(st.one_of(st.integers(0, 2**63 - 1), st.text(min_size=1, max_size=8))),
        "warnings": draw(st.lists(st.text(max_size=8), max_size=2)),
    }
    return document, tensors


def _raw(t: OutgoingTensor) -> bytes:
    return b"".join(bytes(p) for p in t.chunks())


def _check_manifest(
    manifest: dict[str, Any], document: dict[str, Any], tensors: list[OutgoingTensor]
) -> None:
    assert {k: manifest[k] for k in document} == document
    assert len(manifest["tensors"]) == len(tensors)
    for entry, t in zip(manifest["tensors"], tensors, strict=True):
        assert entry["sha256"] == sha256_hex(_raw(t))  # hashlib as the oracle
        assert {k: entry[k] for k in t.entry} == t.entry


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(payloads())
def test_every_format_sizes_exactly_and_reads_back(
    payload: tuple[dict[str, Any], list[OutgoingTensor]],
) -> None:
    document, tensors = payload
    bodies = {fmt: collect(encode_body(fmt, document, tensors)) for fmt in FORMAT_NAMES}
    for fmt in FORMAT_NAMES:  # byte-identical when produced again
        assert collect(encode_body(fmt, document, tensors)) == bodies[fmt]

    doc = json.loads(bodies["json"])
    assert json_size(document, tensors) == len(bodies["json"])
    _check_manifest({k: v for k, v in doc.items()}, document, tensors)
    for entry, t in zip(doc["tensors"], tensors, strict=True):
        assert base64.b64decode(entry["data"], validate=True) == _raw(t)

    with zipfile.ZipFile(io.BytesIO(bodies["npz"])) as zf:
        assert zf.testzip() is None
        _check_manifest(json.loads(zf.read(MANIFEST_MEMBER)), document, tensors)
    with np.load(io.BytesIO(bodies["npz"]), allow_pickle=False) as npz:
        for t in tensors:
            arr = npz[t.name]
            assert arr.dtype == np.dtype(NPY_DESCR[t.dtype]) and arr.shape == t.shape
            assert arr.tobytes() == _raw(t)

    loaded = dict(safetensors.deserialize(bodies["safetensors"]))  # reference validator
    header, raw = parse_safetensors(bodies["safetensors"])
    _check_manifest(json.loads(header["__metadata__"][MANIFEST_KEY]), document, tensors)
    for t in tensors:
        assert bytes(loaded[t.name]["data"]) == raw[t.name] == _raw(t)
        assert loaded[t.name]["shape"] == list(t.shape)
        assert loaded[t.name]["dtype"] == _ST_CODES[t.dtype]


@settings(max_examples=25, deadline=None)
@given(payloads(), st.integers(0, 400))
def test_zip64_threshold_anywhere_keeps_the_archive_readable(
    payload: tuple[dict[str, Any], list[OutgoingTensor]],
    limit: int,
) -> None:
    document, tensors = payload
    encoded = npz_body(document, tensors, _zip64_limit=limit)
    body = collect(encoded)
    with zipfile.ZipFile(io.BytesIO(body)) as zf:
        assert zf.testzip() is None
        _check_manifest(json.loads(zf.read(MANIFEST_MEMBER)), document, tensors)
    with np.load(io.BytesIO(body), allow_pickle=False) as npz:
        for t in tensors:
            assert npz[t.name].tobytes() == _raw(t)
