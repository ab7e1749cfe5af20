"""/readyz: ready when this machine reproduces the baked reference bytes, 503 with the reason
when it does not. The mismatch is provoked through the app factory's reference arguments, never
by patching the core."""

from __future__ import annotations

import json
from pathlib import Path

from fastapi.testclient import TestClient

from seedbed.core.version import ALGORITHM
from seedbed.web import Settings, create_app
from seedbed.web.readiness import (
    BAKED_ALGORITHM,
    BAKED_SHA256,
    PROBE_REQUESTS,
    tensor_digests,
)
from support.golden_cases import CASES


def test_baked_values_agree_with_the_golden_tests() -> None:
    # The probes are the golden cases and the baked digests a subset of the committed golden
    # values (tests/unit/core/test_golden.py), so the two checks can never disagree silently.
    assert BAKED_ALGORITHM == ALGORITHM
    assert PROBE_REQUESTS == CASES
    digests_file = Path(__file__).resolve().parents[2] / "golden" / "core_digests.json"
    golden = json.loads(digests_file.read_text())
    assert {k: golden.get(k) for k in BAKED_SHA256} == BAKED_SHA256
    # Every dtype and layout takes part.
    assert {k.split("/")[0] for k in BAKED_SHA256} == set(CASES)


def test_baked_values_match_the_core_today() -> None:
    assert tensor_digests(BAKED_SHA256) == BAKED_SHA256


def test_ready_normally() -> None:
    with TestClient(create_app(Settings())) as c:
        got = c.get("/readyz")
        assert got.status_code == 200, got.text
        assert got.json()["status"] == "ready"
        assert got.json()["tensors_checked"] == len(BAKED_SHA256)
        assert c.head("/readyz").status_code == 200


def test_not_ready_when_a_reference_value_is_wrong() -> None:
    wrong = dict(BAKED_SHA256)
    name = sorted(wrong)[0]
    wrong[name] = "0" * 64
    with TestClient(create_app(Settings(), reference_digests=wrong)) as c:
        got = c.get("/readyz")
        assert got.status_code == 503
        body = got.json()
        assert body["status"] == "not_ready" and body["mismatches"] == [name]
        assert name in body["reason"] and "0" * 64 in body["reason"]
        assert BAKED_SHA256[name] in body["reason"]  # what this machine actually produced
        # Liveness is unaffected: the process is fine, it just must not take traffic.
        assert c.get("/healthz").status_code == 200


def test_not_ready_when_the_reference_is_for_another_algorithm() -> None:
    app = create_app(Settings(), reference_algorithm="seedbed-some-older-algorithm")
    with TestClient(app) as c:
        got = c.get("/readyz")
        assert got.status_code == 503
        assert "seedbed-some-older-algorithm" in got.json()["reason"]


def test_not_ready_before_the_self_check_ran() -> None:
    # Without the lifespan (no `with`), the check has not run: the answer must not be "ready".
    c = TestClient(create_app(Settings()))
    got = c.get("/readyz")
    assert got.status_code == 503 and "not finished" in got.json()["reason"]
