"""POST /v1/diagnose budgets come from SEEDBED_DIAGNOSE_* settings, like every other limit."""

from __future__ import annotations

import pytest
from fastapi.testclient import TestClient

from seedbed.settings import Settings, SettingsError
from seedbed.web import create_app

NETWORK = {
    "seed": 3,
    "layers": [
        {"name": "in", "kind": "dense", "n_in": 8, "n_out": 8, "activation": "relu"},
        {"name": "out", "kind": "dense", "n_in": 8, "n_out": 2, "role": "output"},
    ],
}


def test_batch_limit_from_the_environment() -> None:
    settings = Settings.from_env({"SEEDBED_DIAGNOSE_MAX_BATCH": "16"})
    assert settings.diagnostics.max_batch == 16
    with TestClient(create_app(settings)) as client:
        accepted = client.post("/v1/diagnose", json={"request": NETWORK, "batch": 16})
        assert accepted.status_code == 200
        refused = client.post("/v1/diagnose", json={"request": NETWORK, "batch": 17})
        assert refused.status_code == 413
        error = refused.json()["error"]
        assert error["field"] == "batch" and "16" in error["message"]


@pytest.mark.parametrize("text", ["0", "-3", "many", "1.5"])
def test_bad_budget_names_the_variable(text: str) -> None:
    with pytest.raises(SettingsError, match="SEEDBED_DIAGNOSE_MAX_MULTIPLY_ADDS"):
        Settings.from_env({"SEEDBED_DIAGNOSE_MAX_MULTIPLY_ADDS": text})
