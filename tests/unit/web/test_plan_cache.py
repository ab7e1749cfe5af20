"""The plan cache: a repeated request (however spelled) is answered from it with the same body
and ETag as a fresh plan, and the cache stays within its entry and byte budgets."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from seedbed.core.plan import build_plan
from seedbed.web import Settings, create_app
from seedbed.web.plan_cache import CachedPlan, PlanCache, request_key

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from e2e.networks import river_gauge_forecaster

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


def _respelled(request: dict) -> bytes:
    """Same JSON value, other spelling: keys reversed, spaces and newlines."""

    def reverse(value):
        if isinstance(value, dict):
            return {k: reverse(value[k]) for k in reversed(list(value))}
        if isinstance(value, list):
            return [reverse(v) for v in value]
        return value

    return json.dumps(reverse(request), indent=3).encode()


def test_repeated_and_respelled_requests_hit_with_identical_answers() -> None:
    network = river_gauge_forecaster()
    headers = {"content-type": "application/json"}
    with TestClient(create_app(Settings(plan_cache_entries=0))) as plain:
        fresh = plain.post("/v1/plan", json=network)
    with TestClient(create_app()) as client:
        cache: PlanCache = client.app.state.plan_cache
        first = client.post("/v1/plan", json=network)
        again = client.post("/v1/plan", content=_respelled(network), headers=headers)
        assert (cache.misses, cache.hits) == (1, 1)
        other = client.post("/v1/plan", json={**network, "seed": 99})
        assert (cache.misses, cache.hits) == (2, 1)
        cached_304 = client.post(
            "/v1/plan", json=network, headers={"if-none-match": first.headers["etag"]}
        )
    assert fresh.status_code == first.status_code == again.status_code == 200
    assert first.content == again.content == fresh.content
    assert first.headers["etag"] == again.headers["etag"] == fresh.headers["etag"]
    assert other.json()["seed"] == 99 and other.headers["etag"] != first.headers["etag"]
    assert cached_304.status_code == 304


def test_bad_requests_are_still_refused_and_not_cached() -> None:
    with TestClient(create_app()) as client:
        bad = {"seed": 1, "layers": [{"name": "x", "kind": "dense", "n_in": 0, "n_out": 3}]}
        for _ in range(2):
            got = client.post("/v1/plan", json=bad)
            assert got.status_code == 422
            assert got.json()["error"]["problems"]
        assert len(client.app.state.plan_cache) == 0


def _entry(seed: int) -> CachedPlan:
    return CachedPlan(
        build_plan(
            {
                "seed": seed,
                "layers": [
                    {"name": "a", "kind": "dense", "n_in": 4, "n_out": 3, "activation": "relu"}
                ],
            }
        )
    )


def test_least_recently_used_is_evicted_by_count_and_bytes() -> None:
    cache = PlanCache(max_entries=2, max_bytes=1000)
    keys = [request_key({"seed": s})[0] for s in range(4)]
    cache.put(keys[0], _entry(0), 100)
    cache.put(keys[1], _entry(1), 100)
    assert cache.get(keys[0]) is not None  # 0 is now the most recent
    cache.put(keys[2], _entry(2), 100)
    assert cache.get(keys[1]) is None and cache.get(keys[0]) is not None
    cache.put(keys[3], _entry(3), 950)  # the byte budget pushes everything else out
    assert len(cache) == 1 and cache.get(keys[3]) is not None
    cache.put(keys[0], _entry(0), 5000)  # larger than the whole budget: never kept
    assert cache.get(keys[0]) is None and len(cache) == 1
    off = PlanCache(max_entries=0, max_bytes=1000)
    off.put(keys[0], _entry(0), 1)
    assert len(off) == 0
