"""A plan entry's published recipe, fed to the client's generator, gives exactly the bytes the
service serves for that tensor (the service's own weights route, in process)."""

from __future__ import annotations

import hashlib
import json

import pytest
from fastapi.testclient import TestClient

from seedbed.web.app import create_app
from seedbed_client.generator.materialize import TensorRecipe, iter_tensor_bytes

REQUEST = {
    "seed": "orchard/frost/v3",
    "dtype": "bfloat16",
    "layout": "in_out",
    "layers": [
        {
            "name": "probe",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 8,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {"name": "memory", "kind": "recurrent", "cell": "lstm", "n_in": 8, "hidden": 16},
        {"name": "gaze", "kind": "attention", "dim": 16, "heads": 2},
        {
            "name": "warn",
            "kind": "dense",
            "n_in": 16,
            "n_out": 2,
            "activation": "sigmoid",
            "role": "output",
        },
        {
            "name": "relay",
            "kind": "dense",
            "n_in": 2,
            "n_out": 2,
            "activation": "linear",
            "init": {"method": "identity"},
        },
    ],
}


@pytest.fixture(scope="module")
def served() -> tuple[dict, dict]:
    with TestClient(create_app()) as http:
        plan = http.post("/v1/plan", json=REQUEST)
        weights = http.post("/v1/weights", json=REQUEST)
    assert plan.status_code == 200, plan.text
    assert weights.status_code == 200, weights.text
    return plan.json(), json.loads(weights.content)


def test_every_recipe_reproduces_the_served_sha256(served: tuple[dict, dict]) -> None:
    plan, weights = served
    digests = {t["tensor"]: t["sha256"] for t in weights["tensors"]}
    assert set(digests) == {e["tensor"] for e in plan["tensors"]}
    for entry in plan["tensors"]:
        recipe = TensorRecipe.from_plan_entry(plan["seed"], plan["dtype"], entry)
        local = hashlib.sha256(b"".join(iter_tensor_bytes(recipe, chunk_bytes=100))).hexdigest()
        assert local == digests[entry["tensor"]], entry["tensor"]


def test_a_recipe_without_generation_data_is_refused(served: tuple[dict, dict]) -> None:
    plan, _ = served
    entry = {k: v for k, v in plan["tensors"][0].items() if k != "generation"}
    with pytest.raises(ValueError, match="generation"):
        TensorRecipe.from_plan_entry(plan["seed"], plan["dtype"], entry)
