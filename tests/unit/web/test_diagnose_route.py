"""POST /v1/diagnose in process (fastapi TestClient): happy path, alternatives, bad inputs,
limits, and the chart's content types.

Outside reference: He et al. (2015), eq. 10 for what the recommended ReLU run must show (a
steady scale); the chart is parsed with the standard library's XML parser.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET
from typing import Any

import pytest
from fastapi import FastAPI
from fastapi.testclient import TestClient

from seedbed.core.diagnostics import DiagnosticLimits
from seedbed.web import Settings, create_app

# An invented network: a classifier of beehive sounds from spectrogram frames.
HIVE: dict[str, Any] = {
    "seed": "hive-acoustics/3",
    "layers": [
        *(
            {"name": f"buzz.{i}", "kind": "dense", "n_in": 96, "n_out": 96, "activation": "relu"}
            for i in range(6)
        ),
        {
            "name": "queen_present",
            "kind": "dense",
            "n_in": 96,
            "n_out": 2,
            "activation": "softmax",
            "role": "output",
        },
    ],
}


def diagnose_app(limits: DiagnosticLimits | None = None) -> FastAPI:
    app = create_app(Settings())
    if limits is not None:
        app.state.diagnostic_limits = limits
    return app


@pytest.fixture(scope="module")
def client() -> TestClient:
    with TestClient(diagnose_app()) as c:
        yield c


def _error(response: Any, status: int) -> dict[str, Any]:
    assert response.status_code == status, response.text
    error: dict[str, Any] = response.json()["error"]
    assert error["status"] == status and error["problems"]
    return error


def test_happy_path_has_the_fixed_names(client: TestClient) -> None:
    response = client.post("/v1/diagnose", json={"request": HIVE})
    assert response.status_code == 200
    assert response.headers["content-type"] == "application/json"
    body = response.json()
    (run,) = body["runs"]
    assert run["label"] == "recommended" and run["verdict"] == "stable"
    assert body["simulation"]["batch"] == 64  # the default
    assert "not that training will succeed" in body["notice"]
    assert [layer["layer"] for layer in run["layers"]] == [x["name"] for x in HIVE["layers"]]
    for layer in run["layers"]:
        assert {
            "layer",
            "activation_std",
            "gradient_std",
            "dead_fraction",
            "saturated_fraction",
            "twin_units",
            "activation_mean",
        } <= set(layer)
    first = run["layers"][0]["activation_std"]
    assert all(0.5 < layer["activation_std"] / first < 2 for layer in run["layers"][:6])
    (mf,) = run["mean_field"]
    assert mf["activation"] == "relu" and mf["sigma_w2"] == pytest.approx(2.0)
    assert mf["phase"] == "critical" and mf["layer_count"] == 6


def test_alternatives_run_in_order(client: TestClient) -> None:
    body = {
        "request": HIVE,
        "batch": 32,
        "alternatives": [
            {"label": "tiny uniform", "init": {"method": "symmetric_uniform", "bound": 0.001}},
            {"label": "same value", "init": {"method": "constant", "value": 0.1}},
            {"label": "glorot", "init": {"method": "glorot", "distribution": "normal"}},
        ],
    }
    response = client.post("/v1/diagnose", json=body)
    assert response.status_code == 200
    runs = response.json()["runs"]
    assert [r["label"] for r in runs] == ["recommended", "tiny uniform", "same value", "glorot"]
    assert [r["verdict"] for r in runs] == ["stable", "vanishing", "symmetric", "stable"]
    assert runs[2]["failed_at"] == "buzz.0"


@pytest.mark.parametrize(
    ("body", "field", "code"),
    [
        (
            {"request": {"seed": 1, "layers": [{"name": "a", "kind": "dense", "n_in": 4}]}},
            "request.layers[0].n_out",
            "missing_field",
        ),
        (
            {
                "request": {
                    "seed": 1,
                    "layers": [
                        {"name": "a", "kind": "dense", "n_in": 4, "n_out": 4},
                        {"name": "b", "kind": "dense", "n_in": 3, "n_out": 4},
                    ],
                }
            },
            "request.layers[1].n_in",
            "invalid_value",
        ),
        ({"request": HIVE, "batch": "64"}, "batch", "invalid_type"),
        ({"request": HIVE, "batch": 0}, "batch", "invalid_value"),
        (
            {
                "request": HIVE,
                "alternatives": [{"label": "x", "init": {"method": "he", "bound": 1}}],
            },
            "alternatives[0].init.bound",
            "not_allowed",
        ),
        (
            {"request": HIVE, "alternatives": [{"init": {"method": "he"}}]},
            "alternatives[0].label",
            "missing_field",
        ),
        ({"request": HIVE, "alternatives": {"label": "x"}}, "alternatives", "invalid_type"),
        ({"request": HIVE, "colour": "red"}, "colour", "unknown_field"),
    ],
)
def test_bad_inputs_name_the_field(
    client: TestClient, body: dict[str, Any], field: str, code: str
) -> None:
    error = _error(client.post("/v1/diagnose", json=body), 422)
    assert error["field"] == field and error["code"] == code


def test_body_level_refusals(client: TestClient) -> None:
    assert (
        _error(
            client.post("/v1/diagnose", content=b"{", headers={"content-type": "application/json"}),
            400,
        )["code"]
        == "invalid_json"
    )
    assert (
        _error(
            client.post("/v1/diagnose", content=b"{}", headers={"content-type": "text/plain"}), 415
        )["field"]
        == "content-type"
    )
    assert (
        _error(client.post("/v1/diagnose?chart=png", json={"request": HIVE}), 422)["field"]
        == "chart"
    )


def test_too_large_is_refused_with_the_numbers(client: TestClient) -> None:
    error = _error(client.post("/v1/diagnose", json={"request": HIVE, "batch": 5000}), 413)
    assert error["field"] == "batch" and "1024" in error["message"]
    wide = {
        "seed": 1,
        "layers": [
            {"name": f"w{i}", "kind": "dense", "n_in": 4096, "n_out": 4096} for i in range(4)
        ],
    }
    error = _error(client.post("/v1/diagnose", json={"request": wide, "batch": 1024}), 413)
    assert error["code"] == "too_large" and str(1 << 36) in error["message"]


def test_limits_set_on_the_app_apply() -> None:
    with TestClient(diagnose_app(DiagnosticLimits(max_alternatives=1))) as small:
        body = {
            "request": HIVE,
            "alternatives": [
                {"label": "a", "init": {"method": "he"}},
                {"label": "b", "init": {"method": "he"}},
            ],
        }
        error = _error(small.post("/v1/diagnose", json=body), 413)
        assert error["field"] == "alternatives" and "limit is 1" in error["message"]


def test_chart_content_types(client: TestClient) -> None:
    body = {
        "request": HIVE,
        "batch": 16,
        "alternatives": [
            {"label": "tiny uniform", "init": {"method": "symmetric_uniform", "bound": 0.001}}
        ],
    }
    svg = client.post("/v1/diagnose?chart=svg", json=body)
    assert svg.status_code == 200 and svg.headers["content-type"] == "image/svg+xml"
    root = ET.fromstring(svg.text)
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    assert "tiny uniform" in "".join(root.itertext())
    assert svg.text == client.post("/v1/diagnose?chart=svg", json=body).text  # deterministic
    html = client.post("/v1/diagnose?chart=html", json=body)
    assert html.status_code == 200
    assert html.headers["content-type"] == "text/html; charset=utf-8"
    assert html.text.startswith("<!DOCTYPE html>") and "<svg" in html.text
    assert "<script" not in html.text.lower()


def test_openapi_documents_the_operation(client: TestClient) -> None:
    doc = diagnose_app().openapi()
    op = doc["paths"]["/v1/diagnose"]["post"]
    assert op["operationId"] == "diagnoseSignal"
    assert {"200", "413", "422"} <= set(op["responses"])
    examples = op["requestBody"]["content"]["application/json"]["examples"]
    assert examples and "WeightOverride" in doc["components"]["schemas"]
    for example in examples.values():  # every documented example is accepted as it is
        assert client.post("/v1/diagnose", json=example["value"]).status_code == 200
