"""POST /v1/audit over the wire, fed with the service's own weights (and a damaged copy)."""

from __future__ import annotations

import io
import json
from pathlib import Path

import httpx
import numpy as np
import pytest

from support.networks import greenhouse_controller
from support.readback import read_body


@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
def test_served_weights_audit_clean_against_their_request(
    client: httpx.Client, scratch: Path, fmt: str
) -> None:
    request = greenhouse_controller()
    weights = client.post("/v1/weights", params={"format": fmt}, json=request)
    assert weights.status_code == 200
    alone = client.post(
        "/v1/audit",
        content=weights.content,
        headers={"Content-Type": "application/octet-stream"},
    )
    assert alone.status_code == 200, alone.text
    assert alone.json()["container"] == fmt
    with_request = client.post(
        "/v1/audit",
        files={
            "file": (f"start.{fmt}", weights.content, "application/octet-stream"),
            "request": ("request.json", json.dumps(request).encode(), "application/json"),
        },
    )
    assert with_request.status_code == 200, with_request.text
    report = with_request.json()
    assert report["summary"]["compared_with_request"] is True
    payload = read_body(fmt, weights.content, scratch)
    assert sorted(t["tensor"] for t in report["tensors"]) == sorted(payload.raw)
    errors = [f for f in report["findings"] if f["severity"] == "error"]
    assert not errors, errors
    codes = {f["code"] for f in report["findings"]}
    assert not codes & {"missing_tensor", "not_in_request", "shape_mismatch", "twin_units"}
    # The statistics describe the uploaded values (checked here with numpy).
    for entry in report["tensors"]:
        values = payload.array(entry["tensor"]).astype(np.float64)
        assert entry["values"] == values.size
        assert entry["mean"] == pytest.approx(values.mean(), rel=1e-6, abs=1e-9)
        assert entry["std"] == pytest.approx(values.std(), rel=1e-6, abs=1e-9)


def test_twin_units_in_a_damaged_file_are_reported(client: httpx.Client, scratch: Path) -> None:
    request = greenhouse_controller()
    weights = client.post("/v1/weights", params={"format": "npz"}, json=request)
    payload = read_body("npz", weights.content, scratch)
    arrays = {name: payload.array(name).copy() for name in payload.raw}
    damaged = arrays["sensors.1.weight"]
    damaged[7] = damaged[3]  # two output units with the same incoming weights: symmetric
    buffer = io.BytesIO()
    np.savez(buffer, **arrays)  # type: ignore[arg-type]  # numpy stubs type the keywords as bool
    report = client.post(
        "/v1/audit", content=buffer.getvalue(), headers={"Content-Type": "application/zip"}
    )
    assert report.status_code == 200, report.text
    twins = [
        f
        for f in report.json()["findings"]
        if f["code"] == "twin_units" and f["tensor"] == "sensors.1.weight"
    ]
    assert twins, report.json()["findings"]


def test_an_upload_that_is_no_weights_file_is_refused(client: httpx.Client) -> None:
    r = client.post(
        "/v1/audit",
        content=b"these bytes are neither a zip archive nor a safetensors header",
        headers={"Content-Type": "application/octet-stream"},
    )
    assert 400 <= r.status_code < 500, r.text
    err = r.json()["error"]
    assert err["status"] == r.status_code and err["field"] and err["message"]
