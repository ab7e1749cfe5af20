"""POST /v1/sample over the app: the document, its refusals in the common error shape, and its
place in the OpenAPI document."""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np
import pytest
from fastapi.testclient import TestClient

from seedbed.settings import Settings
from seedbed.web.app import create_app

REQUEST = {
    "seed": "greenhouse/moisture/v1",
    "dtype": "bfloat16",
    "layout": "in_out",
    "layers": [
        {"name": "sense", "kind": "dense", "n_in": 64, "n_out": 128, "activation": "relu"},
        {"name": "alarm", "kind": "dense", "n_in": 128, "n_out": 1, "role": "output"},
    ],
}


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def test_sample_equals_the_served_rows(client: TestClient) -> None:
    r = client.post("/v1/sample", params={"tensor": "sense.weight", "values": 640}, json=REQUEST)
    assert r.status_code == 200, r.text
    doc = r.json()
    assert doc["shape"] == [64, 128] and doc["dtype"] == "bfloat16"
    served = client.post(
        "/v1/weights", params={"format": "npz", "tensor": "sense.weight"}, json=REQUEST
    )
    import io

    with np.load(io.BytesIO(served.content)) as npz:
        full = npz["sense.weight"]
    # bfloat16 travels as uint16 bit patterns (docs/formats.md): widen them to float32.
    values = (full.astype(np.uint32) << 16).view(np.float32).astype(np.float64)
    per_row = doc["values_per_row"]
    expected = np.concatenate([values[a:b, :per_row].reshape(-1) for a, b in doc["blocks"]])
    assert np.array_equal(np.asarray(doc["values"]), expected)
    assert len(doc["values"]) <= 640


@pytest.mark.parametrize(
    ("params", "field"),
    [
        ({"tensor": "nope.weight"}, "tensor"),
        ({"tensor": "sense.weight", "values": 0}, "values"),
        ({"tensor": "sense.weight", "values": 65537}, "values"),
        ({"tensor": "sense.weight", "bins": 1}, "bins"),
        ({}, "tensor"),
    ],
)
def test_refusals_name_the_field(client: TestClient, params: dict[str, object], field: str) -> None:
    r = client.post("/v1/sample", params=params, json=REQUEST)
    assert r.status_code == 422
    assert field in r.json()["error"]["field"]


def test_bad_request_body_is_refused_like_the_plan(client: TestClient) -> None:
    r = client.post(
        "/v1/sample",
        params={"tensor": "a.weight"},
        json={"seed": 1, "layers": [{"name": "a", "kind": "dense", "n_in": 0, "n_out": 2}]},
    )
    assert r.status_code == 422
    assert r.json()["error"]["field"] == "layers[0].n_in"


def test_documented_in_openapi(client: TestClient) -> None:
    doc = client.get("/openapi.json").json()
    op = doc["paths"]["/v1/sample"]["post"]
    assert op["operationId"] == "sampleTensorValues"
    assert {p["name"] for p in op["parameters"]} == {"tensor", "values", "bins"}
    assert "SampleDocument" in doc["components"]["schemas"]


def test_pages_and_docs_use_only_local_assets(client: TestClient) -> None:
    r = client.get("/", follow_redirects=False)
    assert r.status_code == 307 and r.headers["location"] == "/workbench/compose"
    for view in ("compose", "plan", "signal", "recipes", "audit", "takeaway"):
        page = client.get(f"/workbench/{view}")
        assert page.status_code == 200
        assert "default-src 'self'" in page.headers["content-security-policy"]
        assert "http://" not in page.text and "https://" not in page.text
    docs = client.get("/docs")
    assert docs.status_code == 200
    for url in ("/docs/assets/swagger-ui-bundle.js", "/docs/assets/swagger-ui.css"):
        assert url in docs.text
        assert client.get(url).status_code == 200
    assert "cdn" not in docs.text.lower()
    missing = client.get("/workbench/assets/../app.py")
    assert missing.status_code == 404
    assert client.get("/workbench/assets/nothing.js").json()["error"]["code"] == "not_found"
