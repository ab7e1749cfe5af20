"""Four invented networks sent as ONNX files: the seeded model runs on onnxruntime (CPU) with
finite outputs, and every initializer holds exactly the bytes POST /v1/weights gives for the
inferred request, after the conversion docs/onnx.md documents for its operator.

The conversions below are written out independently of seedbed.onnx_import.assembly, from the
ONNX operator specification's layouts (opset cited beside each).
"""

from __future__ import annotations

from typing import Any

import numpy as np
import onnx
import pytest
from fastapi.testclient import TestClient
from onnx import numpy_helper

from conftest import require_oracle

from .onnx_graphs import conv_net, gpt_block, mlp, recurrent
from .onnx_helpers import npz_of, post_model, seedbed_weights

# LSTM (opset 14): W, R, B stack gate blocks as [i, o, f, c]; GRU (opset 14): [z, r, h]
# = update, reset, candidate. seedbed's defaults: lstm input, forget, cell, output; gru reset,
# update, candidate. Index of each graph block in seedbed's order:
LSTM_BLOCKS = [0, 3, 1, 2]
GRU_BLOCKS = [1, 0, 2]


def _blocks(values: np.ndarray, order: list[int]) -> np.ndarray:
    parts = np.split(values, len(order), axis=0)
    return np.concatenate([parts[k] for k in order], axis=0)


def _expected(name: str, binding: dict[str, Any], ours: dict[str, np.ndarray]) -> np.ndarray:
    """The initializer from the seedbed tensors, by the conversion the review names."""
    conversion, sources = binding["conversion"], binding["sources"]
    shape = tuple(binding["shape"])
    if conversion == "same":
        return ours[sources[0]].reshape(shape)
    if conversion == "transposed":  # MatMul (opset 13) and Gemm transB=0: W is (n_in, n_out)
        return ours[sources[0]].T.reshape(shape)
    if conversion == "transposed_conv":  # ConvTranspose (opset 11): W is (C, M/group, *k)
        w = ours[sources[0]]
        g = binding["groups"]
        m, cg = w.shape[:2]
        out = np.empty(shape, dtype=w.dtype)
        for o in range(m):
            group, local = divmod(o, m // g)
            for c in range(cg):
                out[group * cg + c, local] = w[o, c]
        return out
    order = LSTM_BLOCKS if len(binding["gate_order"]) == 4 else GRU_BLOCKS
    if len(binding["gate_order"]) == 1:
        order = [0]
    per_dir = [_blocks(ours[s], order) for s in sources]
    if conversion == "recurrent_weights":
        return np.stack(per_dir)
    assert conversion == "recurrent_bias"  # B is [Wb, Rb] per direction
    return np.stack([np.concatenate([b, np.zeros_like(b)]) for b in per_dir])


def _check(http: TestClient, model: bytes, keep: tuple[str, ...] = ()) -> dict[str, Any]:
    review = post_model(http, "plan", model, keep=list(keep))
    assert review.status_code == 200, review.text
    doc = review.json()
    ours = seedbed_weights(http, doc["request"])
    served = post_model(http, "weights", model, keep=list(keep), format="npz")
    assert served.status_code == 200, served.text
    theirs = npz_of(served.content)
    seeded = post_model(http, "model", model, keep=list(keep))
    assert seeded.status_code == 200, seeded.text
    proto = onnx.load_from_string(seeded.content)
    stored = {t.name: numpy_helper.to_array(t) for t in proto.graph.initializer}
    filled = {b["initializer"] for b in doc["initializers"]}
    for binding in doc["initializers"]:
        name = binding["initializer"]
        if binding["conversion"] == "constant":
            want = np.full(binding["shape"], binding["value"], dtype=np.float32)
        else:
            want = _expected(name, binding, ours)
        assert theirs[name].tobytes() == want.tobytes(), name
        assert stored[name].tobytes() == want.tobytes(), name
    original = onnx.load_from_string(model)
    for t in original.graph.initializer:
        if t.name not in filled:  # kept, constants and integer tensors are left as they were
            assert numpy_helper.to_array(t).tobytes() == stored[t.name].tobytes(), t.name
    doc["seeded"] = seeded.content
    return doc


def _run(model: bytes, feeds: dict[str, np.ndarray]) -> list[np.ndarray]:
    ort = require_oracle("onnxruntime")
    session = ort.InferenceSession(model, providers=["CPUExecutionProvider"])
    return [np.asarray(o) for o in session.run(None, feeds)]


def _finite_and_alive(outputs: list[np.ndarray]) -> None:
    for out in outputs:
        assert np.isfinite(out).all()
        assert out.std() > 0  # zero weights everywhere would also be finite


def test_mlp(http: TestClient) -> None:
    doc = _check(http, mlp())
    x = np.linspace(-1, 1, 3 * 12, dtype=np.float32).reshape(3, 12)
    (y,) = _run(doc["seeded"], {"x": x})
    _finite_and_alive([y])
    np.testing.assert_allclose(y.sum(axis=1), 1.0, rtol=1e-5)  # Softmax (opset 13) rows
    kinds = [(row["layer"], row["activation"]) for row in doc["inference"]]
    assert kinds == [
        ("probe", "leaky_relu"),
        ("mix", "tanh"),
        ("blend", "elu"),
        ("verdict", "softmax"),
    ]
    assert doc["request"]["layers"][0]["activation_param"] == 0.2


def test_residual_conv_net(http: TestClient) -> None:
    doc = _check(http, conv_net())
    x = np.cos(np.arange(300, dtype=np.float32)).reshape(1, 3, 10, 10)
    _finite_and_alive(_run(doc["seeded"], {"x": x}))
    layers = {layer["name"]: layer for layer in doc["request"]["layers"]}
    assert layers["res1"]["branch"] == layers["res2"]["branch"] == "res_join"
    assert "branch" not in layers["stem"] and "branch" not in layers["wide"]
    assert layers["stem"]["activation"] == "relu"  # read through the BatchNormalization
    assert layers["up"] == {
        **layers["up"],
        "transposed": True,
        "groups": 2,
        "stride": [2, 2],
        "channels_in": 12,
        "channels_out": 6,
    }


def test_recurrent_net(http: TestClient) -> None:
    doc = _check(http, recurrent())
    x = np.sin(np.arange(42, dtype=np.float32)).reshape(7, 2, 3)
    _finite_and_alive(_run(doc["seeded"], {"x": x}))
    names = [layer["name"] for layer in doc["request"]["layers"]]
    assert names == ["tide.forward", "tide.reverse", "surge", "eddy", "level"]


def test_gpt_block(http: TestClient) -> None:
    # The causal mask is a float initializer read by Add: refused unless kept.
    refused = post_model(http, "plan", gpt_block())
    assert refused.status_code == 422
    assert refused.json()["error"]["code"] == "unsupported_weights"
    assert "causal" in refused.json()["error"]["message"]
    doc = _check(http, gpt_block(), keep=("causal",))
    tokens = np.array([[3, 1, 4, 1, 5, 9, 2, 6]], dtype=np.int64)
    _finite_and_alive(_run(doc["seeded"], {"tokens": tokens}))
    layers = {layer["name"]: layer for layer in doc["request"]["layers"]}
    assert layers["mlp.fc"]["activation"] == "gelu"  # the Erf pattern
    assert {layers[n]["branch"] for n in ("ln1", "attn.q", "attn.k", "attn.v", "attn.o")} == {
        "attn_join"
    }
    assert {layers[n]["branch"] for n in ("ln2", "mlp.fc", "mlp.proj")} == {"mlp_join"}
    assert "branch" not in layers["head"] and layers["head"]["role"] == "output"
    assert doc["kept"] == ["causal"]
    assert sorted(doc["constants"]) == ["half", "one", "sqrt2", "sqrt_hd"]


@pytest.mark.parametrize("fmt", ["json", "safetensors"])
def test_other_containers_hold_the_same_bytes(http: TestClient, fmt: str) -> None:
    safetensors_numpy = require_oracle("safetensors.numpy")
    npz = npz_of(post_model(http, "weights", mlp(), format="npz").content)
    r = post_model(http, "weights", mlp(), format=fmt)
    assert r.status_code == 200
    if fmt == "safetensors":
        got = safetensors_numpy.load(r.content)
    else:
        import base64

        got = {
            t["tensor"]: np.frombuffer(base64.b64decode(t["data"]), "<f4").reshape(t["shape"])
            for t in r.json()["tensors"]
        }
    assert sorted(got) == sorted(npz)
    for name, values in npz.items():
        assert got[name].tobytes() == values.tobytes()


def test_same_upload_same_bytes(http: TestClient) -> None:
    first = post_model(http, "model", conv_net())
    second = post_model(http, "model", conv_net())
    assert first.content == second.content and first.headers["etag"] == second.headers["etag"]
    meta = {p.key: p.value for p in onnx.load_from_string(first.content).metadata_props}
    assert meta["seedbed.seed"] == "20261204"


def test_json_weights_body_matches_its_documented_schema_and_etag(http: TestClient) -> None:
    from seedbed.web.routes.onnx_models import OnnxWeightsDoc

    r = post_model(http, "weights", recurrent(), format="json")
    assert r.status_code == 200
    doc = OnnxWeightsDoc.model_validate(r.json())
    assert [t.tensor for t in doc.tensors][:3] == ["tide.W", "tide.R", "tide.B"]
    again = http.post(
        "/v1/onnx/weights",
        content=recurrent(),
        params={"seed": "20261204", "format": "json"},
        headers={"content-type": "application/octet-stream", "if-none-match": r.headers["etag"]},
    )
    assert again.status_code == 304
    other = post_model(http, "weights", recurrent(), format="npz")
    assert other.headers["etag"] != r.headers["etag"]
