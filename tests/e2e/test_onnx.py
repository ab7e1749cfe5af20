"""ONNX import over the wire: a real server seeds an uploaded model; the files it returns are
read back by their own libraries (onnx, onnxruntime, safetensors) and agree with /v1/weights."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import onnx
import pytest
from onnx import numpy_helper

from conftest import require_oracle
from unit.onnx.onnx_graphs import gpt_block, recurrent

from .conftest import ServerFactory

RAW = {"Content-Type": "application/octet-stream"}


def test_seeded_gpt_block_runs_and_matches_the_weights_routes(
    client: httpx.Client, scratch: Path
) -> None:
    ort = require_oracle("onnxruntime")
    st = require_oracle("safetensors.numpy")
    params = {"seed": "orchard-2026", "keep": "causal"}
    model = gpt_block()
    seeded = client.post("/v1/onnx/model", content=model, headers=RAW, params=params)
    assert seeded.status_code == 200, seeded.text
    path = scratch / "seeded.onnx"
    path.write_bytes(seeded.content)
    proto = onnx.load(str(path))
    onnx.checker.check_model(proto)
    session = ort.InferenceSession(str(path), providers=["CPUExecutionProvider"])
    (logits,) = session.run(None, {"tokens": np.array([[5, 4, 3, 2, 1, 0, 9, 8]], np.int64)})
    assert np.isfinite(logits).all() and logits.std() > 0

    weights = client.post(
        "/v1/onnx/weights", content=model, headers=RAW, params={**params, "format": "safetensors"}
    )
    assert weights.status_code == 200
    st_path = scratch / "weights.safetensors"
    st_path.write_bytes(weights.content)
    served = st.load_file(str(st_path))
    stored = {t.name: numpy_helper.to_array(t) for t in proto.graph.initializer}
    for name, values in served.items():
        assert values.tobytes() == stored[name].tobytes(), name

    review = client.post("/v1/onnx/plan", content=model, headers=RAW, params=params).json()
    ours = client.post("/v1/weights", json=review["request"], params={"format": "npz"})
    npz_path = scratch / "ours.npz"
    npz_path.write_bytes(ours.content)
    with np.load(npz_path) as z:
        # MatMul (opset 13) stores x @ W weights as (n_in, n_out): seedbed's out_in transposed.
        assert served["fc.w"].tobytes() == np.ascontiguousarray(z["mlp.fc.weight"].T).tobytes()
        assert served["wte"].tobytes() == z["wte.weight"].tobytes()


def test_recurrent_weights_over_the_wire_in_npz(client: httpx.Client, scratch: Path) -> None:
    r = client.post(
        "/v1/onnx/weights",
        files={"model": ("gauge.onnx", recurrent())},
        params={"seed": "77", "format": "npz"},
    )
    assert r.status_code == 200, r.text
    path = scratch / "gauge.npz"
    path.write_bytes(r.content)
    with np.load(path) as z:
        b = z["tide.B"]
    # LSTM (opset 14): B = [Wb, Rb] with Wb's gate blocks [i, o, f, c]: the forget block is 1.
    np.testing.assert_array_equal(b[:, 12:18], 1.0)
    np.testing.assert_array_equal(np.delete(b, np.s_[12:18], axis=1), 0.0)


@pytest.fixture(scope="module")
def small_server(server_factory: ServerFactory) -> Iterator[str]:
    yield server_factory({"SEEDBED_MAX_ONNX_BYTES": "4096"}).base_url


def test_limit_refuses_before_and_while_reading(small_server: str) -> None:
    with httpx.Client(base_url=small_server, timeout=60.0) as http:
        declared = http.post(
            "/v1/onnx/plan", content=b"\x08" * 5000, headers=RAW, params={"seed": "1"}
        )
        assert declared.status_code == 413
        assert declared.json()["error"]["code"] == "body_too_large"

        def pieces() -> Iterator[bytes]:
            for _ in range(64):
                yield b"\x00" * 1024

        streamed = http.post("/v1/onnx/plan", content=pieces(), headers=RAW, params={"seed": "1"})
        assert streamed.status_code == 413
        bad = http.post("/v1/onnx/model", content=b"not a model", headers=RAW, params={"seed": "1"})
        assert bad.status_code == 422 and bad.json()["error"]["code"] == "not_onnx"
