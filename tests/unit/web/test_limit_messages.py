"""Refusals over a limit name the setting that raises it; counts read in the right number."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

from seedbed.core.diagnostics import DiagnosticLimits
from seedbed.core.plan import build_plan
from seedbed.core.request.limits import Limits
from seedbed.web import Settings, create_app

LAYERS = [{"name": f"l{i}", "kind": "dense", "n_in": 8, "n_out": 8} for i in range(6)]


@pytest.mark.parametrize(
    ("limits", "setting"),
    [
        (Limits(max_layers=4), "SEEDBED_MAX_LAYERS"),
        (Limits(max_tensor_elements=32), "SEEDBED_MAX_TENSOR_ELEMENTS"),
        (Limits(max_request_elements=200), "SEEDBED_MAX_REQUEST_ELEMENTS"),
    ],
)
def test_413_names_the_setting(limits: Limits, setting: str) -> None:
    with TestClient(create_app(Settings(limits=limits))) as client:
        got = client.post("/v1/plan", json={"seed": 1, "layers": LAYERS})
    assert got.status_code == 413
    assert f"the service's setting {setting} raises it" in got.json()["error"]["message"]


def test_diagnose_budget_names_its_setting() -> None:
    app = create_app(Settings(diagnostics=DiagnosticLimits(max_batch=8)))
    with TestClient(app) as client:
        got = client.post(
            "/v1/diagnose", json={"request": {"seed": 1, "layers": LAYERS}, "batch": 9}
        )
    assert got.status_code == 413
    assert "SEEDBED_DIAGNOSE_MAX_BATCH" in got.json()["error"]["message"]


def test_one_output_is_singular() -> None:
    plan = build_plan(
        {
            "seed": 1,
            "layers": [{"name": "score", "kind": "dense", "n_in": 1, "n_out": 1, "role": "output"}],
        }
    )
    text = plan.tensor("score.weight").rationale
    assert "1 output " in text or "1 output (" in text, text
    assert "1 outputs" not in text and "1 inputs" not in text
