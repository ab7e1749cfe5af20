"""A depth policy's multipliers travel with the weights: without them the start is incomplete."""

from __future__ import annotations

import json
from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient

from seedbed.settings import Settings
from seedbed.web import create_app


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def test_weights_manifest_carries_policy_and_multipliers(client: TestClient) -> None:
    # An invented two-block encoder with DeepNorm (Wang et al. 2022): N = 2 feed-forward
    # branches give the residual multiplier alpha = (2N)^(1/4) = 4^(1/4) = sqrt(2).
    request = {
        "seed": 41,
        "depth_policy": {"name": "deepnorm", "architecture": "encoder"},
        "layers": [
            {
                "name": "enc",
                "kind": "transformer_block",
                "dim": 16,
                "heads": 2,
                "mlp_dim": 32,
                "norm": "post",
                "repeat": 2,
            }
        ],
    }
    plan = client.post("/v1/plan", json=request).json()
    weights = client.post("/v1/weights?format=json", json=request).json()
    assert weights["depth_policy"] == plan["depth_policy"]
    assert weights["multipliers"] == plan["multipliers"]
    alphas = [m for m in weights["multipliers"] if "alpha" in json.dumps(m)]
    assert alphas, weights["multipliers"]
    assert any(abs(v - 2**0.5) < 1e-12 for m in alphas for v in m.values() if isinstance(v, float))


def test_plain_request_has_no_policy_keys(client: TestClient) -> None:
    request = {"seed": 1, "layers": [{"name": "a", "kind": "dense", "n_in": 3, "n_out": 2}]}
    assert "depth_policy" not in client.post("/v1/weights?format=json", json=request).json()
