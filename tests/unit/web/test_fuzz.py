"""Property-based requests generated from our own OpenAPI document (schemathesis, in process):
whatever arrives, the service answers with a documented status and never a 500; every error
is in the common shape. Small limits keep accepted requests cheap to generate."""

from __future__ import annotations

import json
from typing import Any

import schemathesis
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, settings

from seedbed.core.request.limits import Limits
from seedbed.web import Settings, create_app

APP = create_app(
    Settings(
        limits=Limits(
            max_layers=16,
            max_tensor_elements=20_000,
            max_request_elements=50_000,
            max_orthogonal_dim=64,
        ),
        max_json_response_bytes=400_000,
        access_log=False,
    )
)
schema = schemathesis.openapi.from_asgi("/openapi.json", APP)
schema.config.phases.fuzzing.enabled = False


# The examples phase sends our documented examples; the coverage phase sends boundary values
# of every schema field (it found the case below). The random fuzzing phase is left to the
# end-to-end suite: it adds little here and costs seconds per operation.
@schema.parametrize()
@settings(
    max_examples=10,
    deadline=None,
    derandomize=True,
    database=None,
    suppress_health_check=list(HealthCheck),
)
def test_no_server_errors_and_one_error_shape(case: Any) -> None:
    response = case.call()
    assert response.status_code < 500, json.dumps(case.body)
    if response.status_code >= 400 and case.method.upper() != "HEAD":  # HEAD has no body
        error = response.json()["error"]
        assert error["status"] == response.status_code
        assert error["problems"] and error["field"] and error["message"]


def test_tiny_gain_is_refused_not_crashed() -> None:
    # Found by the test above: a gain so small that the std underflowed to 0.0 crashed the
    # planner (500). It must be a 422 naming the field.
    body = {
        "seed": 1,
        "layers": [
            {
                "name": "a",
                "kind": "dense",
                "n_in": 4,
                "n_out": 3,
                "init": {"method": "he", "gain": 5e-324},
            }
        ],
    }
    with TestClient(APP) as c:
        got = c.post("/v1/plan", json=body)
        assert got.status_code == 422, got.text
        assert got.json()["error"]["field"] == "layers[0].init.gain"
