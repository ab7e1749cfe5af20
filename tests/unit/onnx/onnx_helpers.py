"""Posting models and reading weights back, for the ONNX import tests."""

from __future__ import annotations

import io
from typing import Any

import numpy as np
from fastapi.testclient import TestClient

RAW = {"content-type": "application/octet-stream"}


def post_model(http: TestClient, route: str, model: bytes, **query: Any) -> Any:
    params = {"seed": "20261204", **query}
    return http.post(f"/v1/onnx/{route}", content=model, headers=RAW, params=params)


def npz_of(body: bytes) -> dict[str, np.ndarray]:
    with np.load(io.BytesIO(body)) as z:
        return {k: z[k] for k in z.files if not k.endswith(".json")}


def seedbed_weights(http: TestClient, request: dict[str, Any]) -> dict[str, np.ndarray]:
    """POST /v1/weights for the request, read back by numpy's NPZ reader."""
    r = http.post("/v1/weights", json=request, params={"format": "npz"})
    assert r.status_code == 200, r.text
    return npz_of(r.content)
