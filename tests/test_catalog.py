"""The catalog is built from the planner's own registries, so it lists exactly what plans use."""

from __future__ import annotations

import math

from seedbed.core.activations import activation_names
from seedbed.core.catalog import catalog
from seedbed.core.request.policy_models import POLICY_NAMES
from seedbed.core.request.vocabulary import RANDOM_METHODS


def test_catalog_lists_every_activation_policy_and_method() -> None:
    doc = catalog()
    assert [a["name"] for a in doc["activations"]] == activation_names()
    assert [p["name"] for p in doc["depth_policies"]] == list(POLICY_NAMES)
    methods = {m["name"] for m in doc["methods"]}
    assert methods >= RANDOM_METHODS and {"orthogonal", "identity", "constant"} <= methods


def test_catalog_gains_match_published_closed_forms() -> None:
    gains = {a["name"]: a["gain"] for a in catalog()["activations"]}
    assert gains["relu"] == math.sqrt(2.0)  # He et al. 2015, eq. 10
    assert gains["linear"] == 1.0
    assert all(a["references"] for a in catalog()["methods"] if a["name"] != "constant")
