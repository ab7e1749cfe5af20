"""safetensors bodies read back by the safetensors library and by an independent parser."""

from __future__ import annotations

import json
from collections.abc import Iterator
from pathlib import Path

import ml_dtypes
import numpy as np
import pytest
import safetensors
import safetensors.numpy

from conftest import require_oracle
from seedbed.formats import (
    FormatInputError,
    OutgoingTensor,
    safetensors_body,
    safetensors_out,
    tensor_digests,
)
from seedbed.formats.safetensors_out import ALGORITHM_KEY, MANIFEST_KEY
from support.format_helpers import (
    DEMO_DOCUMENT,
    array_tensor,
    collect,
    parse_safetensors,
    raw_tensor,
    sha256_hex,
)


def _demo_arrays() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(2026)
    return {
        "encoder.0.weight": rng.standard_normal((6, 5)).astype(np.float32),
        "encoder.0.bias": rng.standard_normal(5).astype(np.float64),
        "head.weight": rng.standard_normal((3, 2, 2)).astype(np.float16),
        "empty.weight": np.zeros((0, 4), np.float32),
        "scalar.scale": np.array(1.5, np.float64),
    }


def test_reference_loader_reads_arrays_and_metadata(tmp_path: Path) -> None:
    arrays = _demo_arrays()
    tensors = [array_tensor(k, v, pieces=(7, 2, 5)) for k, v in arrays.items()]
    body = collect(safetensors_body(DEMO_DOCUMENT, tensors))

    loaded = safetensors.numpy.load(body)  # the format's reference implementation (Rust)
    assert set(loaded) == set(arrays)
    for name, arr in arrays.items():
        assert loaded[name].dtype == arr.dtype and loaded[name].shape == arr.shape
        assert loaded[name].tobytes() == arr.tobytes()

    path = tmp_path / "demo.safetensors"
    path.write_bytes(body)
    with safetensors.safe_open(str(path), framework="np") as f:
        metadata = f.metadata()
    assert metadata[ALGORITHM_KEY] == "demo-algorithm-7"
    manifest = json.loads(metadata[MANIFEST_KEY])
    assert {k: manifest[k] for k in DEMO_DOCUMENT} == DEMO_DOCUMENT
    for entry, (name, arr) in zip(manifest["tensors"], arrays.items(), strict=True):
        assert entry["layer"] == name.rsplit(".", 1)[0]
        assert entry["sha256"] == sha256_hex(arr.tobytes())  # hashlib as the oracle


def test_own_parser_sees_padding_order_and_canonical_manifest() -> None:
    arrays = _demo_arrays()
    tensors = [array_tensor(k, v) for k, v in arrays.items()]
    body = collect(safetensors_body(DEMO_DOCUMENT, tensors))
    header, raw = parse_safetensors(body)
    assert list(header) == ["__metadata__", *arrays]  # data in header order = caller's order
    assert {k: raw[k] for k in arrays} == {k: v.tobytes() for k, v in arrays.items()}
    text = header["__metadata__"][MANIFEST_KEY]
    assert text == json.dumps(json.loads(text), sort_keys=True, separators=(",", ":"))
    assert header["encoder.0.bias"]["dtype"] == "F64"
    assert header["head.weight"] == {
        "dtype": "F16",
        "shape": [3, 2, 2],
        "data_offsets": [160, 184],
    }  # 6*5*4 + 5*8


def _bf16_case() -> tuple[np.ndarray, OutgoingTensor]:
    rng = np.random.default_rng(11)
    values = rng.standard_normal((4, 3)).astype(ml_dtypes.bfloat16)
    return values, array_tensor("proj.weight", values, dtype="bfloat16", pieces=(3,))


def test_bfloat16_bits_via_reference_deserializer_and_ml_dtypes() -> None:
    values, t = _bf16_case()
    body = collect(safetensors_body(DEMO_DOCUMENT, [t]))
    # safetensors.numpy has no bfloat16; the Rust deserializer still validates and returns bytes.
    ((name, info),) = safetensors.deserialize(body)
    assert name == "proj.weight" and info["dtype"] == "BF16" and info["shape"] == [4, 3]
    back = np.frombuffer(bytes(info["data"]), dtype=ml_dtypes.bfloat16).reshape(4, 3)
    assert back.view(np.uint16).tolist() == values.view(np.uint16).tolist()


def test_bfloat16_bits_via_torch_loader() -> None:
    torch = require_oracle("torch")
    import safetensors.torch

    values, t = _bf16_case()
    body = collect(safetensors_body(DEMO_DOCUMENT, [t]))
    loaded = safetensors.torch.load(body)["proj.weight"]
    assert loaded.dtype == torch.bfloat16
    bits = loaded.view(torch.int16).numpy().view(np.uint16)
    assert bits.tolist() == values.view(np.uint16).tolist()
    # torch's own bfloat16 -> float32 widening agrees with ml_dtypes' (both exact).
    assert loaded.float().numpy().tolist() == values.astype(np.float32).tolist()


def test_empty_payload_is_a_valid_file() -> None:
    body = collect(safetensors_body(DEMO_DOCUMENT, []))
    assert safetensors.numpy.load(body) == {}
    header, raw = parse_safetensors(body)
    assert raw == {} and json.loads(header["__metadata__"][MANIFEST_KEY])["tensors"] == []


def test_bodies_are_byte_identical_and_given_digests_skip_the_hashing_pass() -> None:
    calls = [0]
    raw = bytes(range(256)) * 3

    def chunks() -> Iterator[bytes]:
        calls[0] += 1
        yield raw[:100]
        yield raw[100:]

    t = OutgoingTensor("w", "float16", (384,), 768, {"layer": "w"}, chunks)
    first = collect(safetensors_body(DEMO_DOCUMENT, [t]))
    assert calls[0] == 2  # hashing pass + streaming pass
    digests = tensor_digests([t])
    calls[0] = 0
    second = collect(safetensors_body(DEMO_DOCUMENT, [t], digests=digests))
    assert calls[0] == 1
    assert first == second


def test_header_over_the_reader_limit_is_refused_before_streaming(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    # The real limit is 100 MB; lowered here so the refusal path costs nothing to run.
    monkeypatch.setattr(safetensors_out, "HEADER_LIMIT", 4000)
    tensors = [
        raw_tensor(f"t{i}", b"", "float32", (0,), entry={"rationale": "x" * 500}) for i in range(8)
    ]
    with pytest.raises(FormatInputError, match=r"safetensors header would be .* readers refuse"):
        safetensors_body(DEMO_DOCUMENT, tensors)
    collect(safetensors_body(DEMO_DOCUMENT, tensors[:3]))  # about 1.7 kB fits
