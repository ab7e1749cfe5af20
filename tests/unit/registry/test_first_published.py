"""A recipe's first publication time is its version 1's publication time, to the microsecond.

It used to be read from the clock once for the name and again for the version, so the name's
first_published_at came out earlier than version 1's published_at. Runs on a real SQLite file.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

from seedbed.registry import config_from_env, open_registry
from seedbed.registry.keys import create_key
from seedbed.registry.prepare import prepare_recipe
from seedbed.registry.store import list_recipes, list_versions, publish

# Invented scenario: a bakery's proofing-time predictor.
PROOFING: dict[str, Any] = {
    "seed": "proofing/1",
    "layers": [
        {"name": "dough", "kind": "dense", "n_in": 6, "n_out": 16, "activation": "relu"},
        {"name": "minutes", "kind": "dense", "n_in": 16, "n_out": 1, "role": "output"},
    ],
}


def test_first_published_at_is_version_one_published_at(tmp_path: Path) -> None:
    registry = open_registry(config_from_env({"SEEDBED_DATA_DIR": str(tmp_path)}))
    try:
        token = create_key(registry.engine, "bakery").token
        for seed in (1, 2, 3):
            publish(
                registry.engine,
                prepare_recipe({"name": "proofing", "request": {**PROOFING, "seed": seed}}),
                token,
            )
        (summary,) = list_recipes(registry.engine)
        versions = list_versions(registry.engine, "proofing")
        assert summary.first_published_at == versions[0].published_at
        assert all(summary.first_published_at <= v.published_at for v in versions)
    finally:
        registry.close()
