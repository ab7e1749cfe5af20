"""POST /v1/audit in process: uploads, refusals, findings, and the comparison with a plan.

Outside references: files are written by numpy (np.savez) and the `safetensors` library, or
fetched from this service's own /v1/weights; recommended scales are checked against the
published formulas (He et al. 2015, eq. 10: std = sqrt(2 / fan_in); Glorot & Bengio 2010,
eq. 12: variance 2 / (fan_in + fan_out)); ratios are recomputed here with numpy; multipart
bodies are built by httpx. The streaming limit is checked by driving the ASGI app directly and
counting how much of the body it asked for.
"""

from __future__ import annotations

import io
import json
import math
import os
from collections.abc import Callable
from pathlib import Path
from types import ModuleType
from typing import Any

import anyio
import numpy as np
import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient

from conftest import require_oracle
from seedbed.core.audit import AuditLimits
from seedbed.web import Settings, create_app


def st() -> ModuleType:
    """The safetensors library's numpy API: the reference writer and reader."""
    return require_oracle("safetensors.numpy")


# An invented network: a kiln temperature regulator.
KILN: dict[str, Any] = {
    "seed": "kiln-7/audit",
    "dtype": "float32",
    "layout": "out_in",
    "layers": [
        {"name": "burner.0", "kind": "dense", "n_in": 96, "n_out": 64, "activation": "relu"},
        {"name": "burner.1", "kind": "dense", "n_in": 64, "n_out": 64, "activation": "relu"},
        {
            "name": "flue",
            "kind": "conv",
            "channels_in": 4,
            "channels_out": 8,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {
            "name": "setpoint",
            "kind": "dense",
            "n_in": 64,
            "n_out": 6,
            "activation": "linear",
            "role": "output",
        },
    ],
}


def audit_app(limits: AuditLimits | None = None) -> FastAPI:
    app = create_app(Settings())
    if limits is not None:
        app.state.audit_limits = limits
    return app


@pytest.fixture(scope="module")
def client() -> TestClient:
    return TestClient(audit_app())


def npz_bytes(**arrays: np.ndarray) -> bytes:
    buf = io.BytesIO()
    np.savez(buf, **arrays)
    return buf.getvalue()


def safetensors_bytes(**arrays: np.ndarray) -> bytes:
    return bytes(st().save(arrays))


WRITERS: dict[str, Callable[..., bytes]] = {"npz": npz_bytes, "safetensors": safetensors_bytes}


def send_raw(client: TestClient, data: bytes, media: str = "application/octet-stream") -> Any:
    return client.post("/v1/audit", content=data, headers={"content-type": media})


def send_form(client: TestClient, data: bytes, request: dict[str, Any] | None = None) -> Any:
    form = {"request": json.dumps(request)} if request is not None else None
    return client.post("/v1/audit", files={"file": ("weights.bin", data)}, data=form)


def findings(report: dict[str, Any], code: str | None = None) -> list[dict[str, Any]]:
    return [f for f in report["findings"] if code is None or f["code"] == code]


def entry(report: dict[str, Any], name: str) -> dict[str, Any]:
    return next(t for t in report["tensors"] if t["tensor"] == name)


class PlantedPayload:
    def __init__(self, target: Path) -> None:
        self.target = target

    def __reduce__(self) -> tuple[object, tuple[str]]:
        return (os.mkdir, (str(self.target),))


@pytest.mark.parametrize("how", ["raw", "form"])
def test_pickled_npz_is_refused_with_a_clear_error_and_never_unpickled(
    client: TestClient, tmp_path: Path, how: str
) -> None:
    marker = tmp_path / "unpickled"
    data = npz_bytes(
        **{
            "burner.0.weight": np.ones((4, 4), np.float32),
            "optimizer_state": np.array([PlantedPayload(marker)], dtype=object),
        }
    )
    got = send_raw(client, data, "application/zip") if how == "raw" else send_form(client, data)
    assert got.status_code == 422, got.text
    err = got.json()["error"]
    assert err["code"] == "pickled_data"
    assert err["field"] == ("(body)" if how == "raw" else "file")
    assert "'optimizer_state.npy'" in err["message"]
    assert "pickled data is never loaded" in err["message"]
    assert not marker.exists()
    np.load(io.BytesIO(data), allow_pickle=True)["optimizer_state"]  # the payload is live
    assert marker.exists()


@pytest.mark.parametrize("container", list(WRITERS))
def test_planted_twin_rows_are_found_in_exact_groups(client: TestClient, container: str) -> None:
    rng = np.random.default_rng(40)
    w = (rng.standard_normal((64, 32)) * 0.1).astype(np.float32)
    w[[3, 19, 50]] = w[7]
    w[11] = w[10]
    got = send_raw(client, WRITERS[container](**{"burner.1.weight": w}))
    assert got.status_code == 200, got.text
    report = got.json()
    assert report["container"] == container
    twins = entry(report, "burner.1.weight")["twins"]
    assert twins["group_count"] == 2 and twins["units_in_groups"] == 6
    assert [g["units"] for g in twins["groups"]] == [[3, 7, 19, 50], [10, 11]]
    (finding,) = findings(report, "twin_units")
    assert finding["severity"] == "error" and "units 3, 7, 19, 50" in finding["message"]
    assert report["summary"]["verdict"] == "errors"


@pytest.mark.parametrize("container", list(WRITERS))
def test_degenerate_tensors_are_found(client: TestClient, container: str) -> None:
    rng = np.random.default_rng(41)
    broken = (rng.standard_normal((16, 16)) * 0.2).astype(np.float32)
    broken[2, 5], broken[9, 9], broken[0, 0] = np.nan, np.inf, -np.inf
    low = (rng.standard_normal((48, 3)) @ rng.standard_normal((3, 40))).astype(np.float32)
    data = WRITERS[container](
        **{
            "zeros.weight": np.zeros((12, 8), np.float32),
            "constant.weight": np.full((12, 8), 0.05, np.float32),
            "broken.weight": broken,
            "low.weight": low,
            "fine.weight": (rng.standard_normal((20, 30)) * 0.1).astype(np.float32),
            "fine.bias": np.zeros(20, np.float32),
        }
    )
    report = send_raw(client, data).json()
    by_tensor: dict[str, set[tuple[str, str]]] = {}
    for f in report["findings"]:
        by_tensor.setdefault(f["tensor"], set()).add((f["code"], f["severity"]))
    assert by_tensor["zeros.weight"] == {("all_zero", "error")}
    assert by_tensor["constant.weight"] == {("all_constant", "error")}
    assert by_tensor["broken.weight"] == {("non_finite", "error")}
    assert by_tensor["low.weight"] == {("rank_deficient", "warning")}
    assert by_tensor["fine.bias"] == {("all_zero", "note")}
    assert "fine.weight" not in by_tensor
    nonfinite = entry(report, "broken.weight")["nonfinite"]
    assert nonfinite == {"nan": 1, "posinf": 1, "neginf": 1}
    finite = broken[np.isfinite(broken)].astype(np.float64)
    assert entry(report, "broken.weight")["std"] == pytest.approx(np.std(finite), rel=1e-9)
    rank = entry(report, "low.weight")["rank"]
    assert (rank["rank"], rank["full"], rank["sampled"]) == (3, 40, False)
    assert entry(report, "constant.weight")["all_constant"] is True
    assert report["summary"]["errors"] == 3 and report["summary"]["warnings"] == 1


def _weights(client: TestClient, request: dict[str, Any], fmt: str) -> bytes:
    got = client.post(f"/v1/weights?format={fmt}", json=request)
    assert got.status_code == 200, got.text
    return got.content


def _read_back(data: bytes, fmt: str) -> dict[str, np.ndarray]:
    if fmt == "safetensors":
        return dict(st().load(data))
    with np.load(io.BytesIO(data), allow_pickle=False) as npz:
        return {k: npz[k] for k in npz.files}


@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
def test_recommended_weights_match_their_plan(client: TestClient, fmt: str) -> None:
    data = _weights(client, KILN, fmt)
    report = send_form(client, data, KILN).json()
    assert report["summary"]["compared_with_request"] is True
    serious = [f for f in report["findings"] if f["severity"] != "note"]
    assert serious == [] and report["summary"]["verdict"] == "ok"
    arrays = _read_back(data, fmt)
    burner = entry(report, "burner.0.weight")["planned"]
    # He et al. 2015, eq. 10: std = sqrt(2 / fan_in) for a ReLU layer.
    assert burner["recommended_std"] == pytest.approx(math.sqrt(2 / 96), rel=1e-12)
    w = arrays["burner.0.weight"].astype(np.float64)
    rms = math.sqrt(np.mean(w**2))
    assert burner["observed_rms"] == pytest.approx(rms, rel=1e-9)
    assert burner["ratio"] == pytest.approx(rms / math.sqrt(2 / 96), rel=1e-9)
    # Glorot & Bengio 2010, eq. 12: variance 2 / (fan_in + fan_out) for the linear read-out.
    head = entry(report, "setpoint.weight")["planned"]
    assert head["recommended_std"] == pytest.approx(math.sqrt(2 / (64 + 6)), rel=1e-12)
    for t in report["tensors"]:
        if t["planned"]["ratio"] is not None and t["values"] >= 1000:
            assert 0.9 < t["planned"]["ratio"] < 1.1, t["tensor"]
        assert t["twins"] is None or t["twins"]["group_count"] == 0


def test_bfloat16_npz_from_the_service_is_read_through_its_manifest(client: TestClient) -> None:
    request = {**KILN, "dtype": "bfloat16"}
    data = _weights(client, request, "npz")
    report = send_raw(client, data, "application/zip").json()  # no request: the manifest says
    t = entry(report, "burner.1.weight")
    assert t["dtype"] == "bfloat16" and "bfloat16" in t["note"]
    assert t["std"] == pytest.approx(math.sqrt(2 / 64), rel=0.1)


def test_scaled_missing_extra_and_misshaped_tensors(client: TestClient) -> None:
    arrays = _read_back(_weights(client, KILN, "safetensors"), "safetensors")
    arrays["burner.1.weight"] = arrays["burner.1.weight"] * 4
    arrays["burner.0.weight"] = arrays["burner.0.weight"] * 0.6
    arrays["setpoint.weight"] = np.ascontiguousarray(arrays["setpoint.weight"].T)  # in_out
    del arrays["flue.bias"]
    arrays["kiln_door.weight"] = np.ones((3, 3), np.float32) * np.eye(3, dtype=np.float32)
    report = send_form(client, safetensors_bytes(**arrays), KILN).json()
    codes = {(f["tensor"], f["code"]): f for f in report["findings"]}
    big = codes[("burner.1.weight", "scale_too_large")]
    assert big["severity"] == "warning"
    assert entry(report, "burner.1.weight")["planned"]["ratio"] == pytest.approx(4, rel=0.1)
    assert codes[("burner.0.weight", "scale_off")]["severity"] == "note"
    shape = codes[("setpoint.weight", "shape_mismatch")]
    assert shape["severity"] == "error" and "in_out arrangement" in shape["message"]
    assert codes[("flue.bias", "missing_tensor")]["severity"] == "warning"
    assert codes[("kiln_door.weight", "not_in_request")]["severity"] == "note"


def test_units_follow_the_requests_layout(client: TestClient) -> None:
    request = {**KILN, "layout": "in_out"}
    arrays = _read_back(_weights(client, request, "npz"), "npz")
    w = arrays["burner.1.weight"]  # served (n_in, n_out): output units are columns
    w[:, 9] = w[:, 2]
    data = npz_bytes(**{"burner.1.weight": w})
    with_request = send_form(client, data, request).json()
    twins = entry(with_request, "burner.1.weight")["twins"]
    assert [g["units"] for g in twins["groups"]] == [[2, 9]]
    assert "from the request" in entry(with_request, "burner.1.weight")["units"]["axis"]
    alone = send_raw(client, data).json()  # rows along the first axis: input units, no twins
    assert entry(alone, "burner.1.weight")["twins"]["group_count"] == 0


def test_lstm_twins_are_looked_for_within_each_gate_block(client: TestClient) -> None:
    request = {
        "seed": 3,
        "layers": [{"name": "tide", "kind": "recurrent", "cell": "lstm", "n_in": 12, "hidden": 5}],
    }
    arrays = _read_back(_weights(client, request, "npz"), "npz")
    w = arrays["tide.input_weight"]  # (4 * 5, 12): four gate blocks of five units
    w[5] = w[0]  # same row in two different gates: not twins
    w[13] = w[11]  # two units of the same gate block: twins
    report = send_form(client, npz_bytes(**arrays), request).json()
    twins = entry(report, "tide.input_weight")["twins"]
    assert [g["units"] for g in twins["groups"]] == [[11, 13]]


# --- size limits --------------------------------------------------------------------------


def _asgi_post(
    app: FastAPI,
    headers: list[tuple[bytes, bytes]],
    piece: Callable[[int], bytes],
    last: int | None = None,
) -> tuple[int, Any, int]:
    """POST /v1/audit through the ASGI interface, the body arriving as piece(1), piece(2), ...
    (endless unless `last` is given); returns status, JSON body and how many pieces the app
    asked for."""
    pulled = 0
    messages: list[dict[str, Any]] = []

    async def receive() -> dict[str, Any]:
        nonlocal pulled
        pulled += 1
        return {
            "type": "http.request",
            "body": piece(pulled),
            "more_body": last is None or pulled < last,
        }

    async def send(message: dict[str, Any]) -> None:
        messages.append(message)

    scope = {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": "POST",
        "scheme": "http",
        "path": "/v1/audit",
        "raw_path": b"/v1/audit",
        "query_string": b"",
        "root_path": "",
        "headers": headers,
        "client": ("127.0.0.1", 5000),
        "server": ("testserver", 80),
    }
    anyio.run(app, scope, receive, send)
    body = b"".join(m.get("body", b"") for m in messages if m["type"] == "http.response.body")
    return messages[0]["status"], json.loads(body), pulled


def test_a_declared_oversize_upload_is_refused_before_reading_anything() -> None:
    app = audit_app(AuditLimits(max_upload_bytes=64 << 10))
    status, body, pulled = _asgi_post(
        app,
        [(b"content-type", b"application/octet-stream"), (b"content-length", b"1000000")],
        lambda i: b"\0" * 10000,
        last=100,
    )
    assert status == 413 and pulled == 0
    assert body["error"]["code"] == "body_too_large"
    assert "1000000 bytes" in body["error"]["message"] and "65536" in body["error"]["message"]


@pytest.mark.parametrize("how", ["raw", "form"])
def test_a_chunked_oversize_upload_is_refused_without_reading_it_all(how: str) -> None:
    limit, chunk = 64 << 10, b"\0" * 4096
    app = audit_app(AuditLimits(max_upload_bytes=limit))
    if how == "raw":
        headers = [(b"content-type", b"application/octet-stream")]
        first = chunk
    else:
        headers = [(b"content-type", b"multipart/form-data; boundary=kiln")]
        first = (
            b'--kiln\r\nContent-Disposition: form-data; name="file"; filename="w"\r\n\r\n' + chunk
        )
    # An endless upload without Content-Length (chunked transfer).
    status, body, pulled = _asgi_post(app, headers, lambda i: first if i == 1 else chunk)
    assert status == 413
    assert body["error"]["code"] == "body_too_large"
    assert f"at most {limit} bytes" in body["error"]["message"]
    assert pulled <= limit // len(chunk) + 2  # stopped right after the limit


def test_declared_unpacked_size_over_the_limit_is_413() -> None:
    app = audit_app(AuditLimits(max_upload_bytes=32 << 10))
    buf = io.BytesIO()
    np.savez_compressed(buf, w=np.zeros((256, 256), np.float32))  # 256 KiB that packs small
    got = send_raw(TestClient(app), buf.getvalue())
    assert got.status_code == 413, got.text
    err = got.json()["error"]
    assert err["code"] == "too_large" and "'w.npy'" in err["message"]


# --- damaged uploads and bad requests -------------------------------------------------------


def test_truncated_and_corrupt_files_are_422_naming_the_problem(client: TestClient) -> None:
    good_npz = npz_bytes(w=np.ones((32, 32), np.float32))
    got = send_raw(client, good_npz[: len(good_npz) - 40])
    assert got.status_code == 422
    assert got.json()["error"]["code"] == "corrupt_file"
    assert "end-of-central-directory" in got.json()["error"]["message"]

    good_st = safetensors_bytes(**{"flue.weight": np.ones((8, 4, 3, 3), np.float32)})
    got = send_form(client, good_st[:-16])
    err = got.json()["error"]
    assert got.status_code == 422 and err["field"] == "file"
    assert err["code"] == "truncated_file" and "'flue.weight'" in err["message"]

    damaged = bytearray(good_npz)
    at = damaged.find(b"\x00\x00\x80\x3f")
    damaged[at + 2] ^= 0x10
    got = send_raw(client, bytes(damaged))
    assert got.status_code == 422 and "CRC" in got.json()["error"]["message"]

    got = send_raw(client, b"")
    assert got.status_code == 422 and got.json()["error"]["code"] == "empty_file"
    got = send_raw(client, good_st, "application/zip")
    assert got.status_code == 422 and got.json()["error"]["code"] == "not_a_zip"


def test_media_types_and_form_parts(client: TestClient) -> None:
    data = npz_bytes(w=np.ones((2, 2), np.float32))
    got = client.post("/v1/audit", content=data, headers={"content-type": "text/plain"})
    assert got.status_code == 415 and got.json()["error"]["field"] == "content-type"
    got = client.post(
        "/v1/audit", data={"request": json.dumps(KILN)}, files={"weights": ("w.npz", data)}
    )
    assert got.status_code == 422 and got.json()["error"]["code"] == "unknown_part"
    got = client.post("/v1/audit", files={"request": (None, json.dumps(KILN))})
    assert got.status_code == 422 and got.json()["error"]["field"] == "file"
    bad = b'--b\r\nContent-Disposition: form-data; name="file"\r\n\r\nabc'  # never closed
    got = client.post(
        "/v1/audit", content=bad, headers={"content-type": "multipart/form-data; boundary=b"}
    )
    assert got.status_code == 400 and "closing boundary" in got.json()["error"]["message"]


def test_an_invalid_request_part_names_its_field(client: TestClient) -> None:
    data = npz_bytes(w=np.ones((2, 2), np.float32))
    broken = {**KILN, "layers": [{**KILN["layers"][0], "n_in": 0}]}
    got = send_form(client, data, broken)
    assert got.status_code == 422
    assert got.json()["error"]["field"] == "request.layers[0].n_in"
    got = client.post(
        "/v1/audit", files={"file": ("w.npz", data)}, data={"request": '{"seed": NaN}'}
    )
    assert got.status_code == 400 and got.json()["error"]["field"] == "request"


def test_the_openapi_document_describes_all_three_upload_forms() -> None:
    doc = audit_app().openapi()
    op = doc["paths"]["/v1/audit"]["post"]
    content = op["requestBody"]["content"]
    assert set(content) == {"application/octet-stream", "application/zip", "multipart/form-data"}
    ref = content["multipart/form-data"]["schema"]["properties"]["request"]["$ref"]
    assert ref.rsplit("/", 1)[-1] in doc["components"]["schemas"]
    assert content["multipart/form-data"]["examples"]
    assert {"200", "400", "413", "415", "422"} <= set(op["responses"])


def test_reports_are_deterministic(client: TestClient) -> None:
    rng = np.random.default_rng(9)
    data = npz_bytes(w=(rng.standard_normal((300, 200)) * 0.1).astype(np.float32))
    first = send_raw(client, data).content
    assert send_raw(client, data).content == first


def test_shifted_integer_and_unread_tensors(client: TestClient) -> None:
    rng = np.random.default_rng(12)
    header = {"f8": {"dtype": "F8_E4M3", "shape": [4], "data_offsets": [0, 4]}}
    text = json.dumps(header).encode()
    raw_f8 = len(text).to_bytes(8, "little") + text + bytes(4)
    # Nothing in that file is read, so there is no verdict to give.
    alone = send_raw(client, raw_f8)
    assert alone.status_code == 422 and alone.json()["error"]["code"] == "no_tensors_read"
    assert "'f8'" in alone.json()["error"]["message"]
    header["w"] = {"dtype": "F32", "shape": [2], "data_offsets": [4, 12]}
    text = json.dumps(header).encode()
    raw_f8 = len(text).to_bytes(8, "little") + text + bytes(4) + np.ones(2, "<f4").tobytes()
    report = send_raw(client, raw_f8).json()
    assert [(f["code"], f["severity"]) for f in report["findings"] if f["tensor"] == "f8"] == [
        ("not_analysed", "warning")
    ]
    data = npz_bytes(
        shifted=rng.uniform(0, 1, (32, 32)).astype(np.float32), steps=np.arange(5, dtype=np.int64)
    )
    report = send_raw(client, data).json()
    codes = {(f["tensor"], f["code"]): f["severity"] for f in report["findings"]}
    # U(0, 1): mean 0.5 against std 1/sqrt(12) = 0.289 (a uniform distribution's moments).
    assert codes == {("shifted", "mean_offset"): "warning", ("steps", "not_float"): "note"}
    assert entry(report, "steps")["mean"] == 2.0


def test_a_zero_output_layer_is_judged_as_one_with_the_request(client: TestClient) -> None:
    arrays = _read_back(_weights(client, KILN, "npz"), "npz")
    arrays["setpoint.weight"] = np.zeros_like(arrays["setpoint.weight"])
    data = npz_bytes(**arrays)
    described = send_form(client, data, KILN).json()
    (zero,) = findings(described, "all_zero")[:1]
    assert (zero["tensor"], zero["severity"]) == ("setpoint.weight", "warning")
    assert "Fixup" in zero["message"]
    alone = send_raw(client, data).json()  # without the request it cannot know the role
    zero = next(f for f in findings(alone, "all_zero") if f["tensor"] == "setpoint.weight")
    assert zero["severity"] == "error" and "send the request" in zero["message"]


def test_tensors_not_compared_still_carry_their_plan_entry(client: TestClient) -> None:
    arrays = _read_back(_weights(client, KILN, "npz"), "npz")
    arrays["flue.bias"] = np.zeros(8, np.int32)  # right shape, wrong kind
    report = send_form(client, npz_bytes(**arrays), KILN).json()
    t = entry(report, "flue.bias")
    assert t["planned"]["dtype"] == "float32" and t["planned"]["ratio"] is None
    codes = {f["code"] for f in findings(report) if f["tensor"] == "flue.bias"}
    assert codes == {"dtype_mismatch", "not_float"}
