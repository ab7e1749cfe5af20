"""The policy table: one rule per policy the request format names, one module per policy."""

from __future__ import annotations

import importlib
import re

from seedbed.core.policies import RULES
from seedbed.core.request.policy_models import POLICY_MODELS, POLICY_NAMES


def test_every_named_policy_has_exactly_one_rule() -> None:
    assert list(RULES) == list(POLICY_NAMES)
    assert set(POLICY_MODELS) == set(POLICY_NAMES)


def test_each_rule_lives_in_the_module_named_for_its_policy() -> None:
    for name, rule in RULES.items():
        assert rule.checks.__module__ == f"seedbed.core.policies.{name}"
        assert rule.apply.__module__ == f"seedbed.core.policies.{name}"


def test_each_policy_module_cites_its_source() -> None:
    # A citation is an author and a year ("Zhang, Dauphin & Ma 2019", "Wang et al. 2022").
    for name in RULES:
        doc = importlib.import_module(f"seedbed.core.policies.{name}").__doc__ or ""
        assert re.search(r"[A-Z][a-z]+.* (19|20)\d\d", doc), name
