"""The plan cache: a repeated request (however spelled) is answered from it with the same body
and ETag as a fresh plan, and the cache stays within its entry and byte budgets."""

from __future__ import annotations

import json
import sys
from pathlib import Path

import pytest
from fastapi.testclient import TestClient

from seedbed.core.plan import build_plan, plan_document, reseeded
from seedbed.web import Settings, create_app
from seedbed.web.plan_cache import CachedPlan, PlanCache, request_keys

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from support.networks import river_gauge_forecaster


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
        # A new request misses twice: as sent, and without its seed.
        assert (cache.misses, cache.hits) == (2, 0)
        again = client.post("/v1/plan", content=_respelled(network), headers=headers)
        assert (cache.misses, cache.hits) == (2, 1)
        other = client.post("/v1/plan", json={**network, "seed": 99})
        # Another seed: a miss as sent, a hit without the seed (planned once for all seeds).
        assert (cache.misses, cache.hits) == (3, 2)
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
    keys = [request_keys({"seed": s}).whole for s in range(4)]
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


def test_keys_with_and_without_the_seed() -> None:
    a = request_keys({"seed": 5, "dtype": "float32", "layers": []})
    b = request_keys({"layers": [], "dtype": "float32", "seed": 6})
    text = request_keys({"seed": "5", "dtype": "float32", "layers": []})
    assert a.unseeded == b.unseeded == text.unseeded is not None
    assert len({a.whole, b.whole, text.whole}) == 3  # 5, 6 and "5" are three seeds
    assert request_keys({"seed": True, "layers": []}).unseeded is None  # not a seed: full parse
    assert request_keys({"layers": []}).unseeded is None
    assert request_keys([1, 2]).unseeded is None


SWEEP_NETWORKS = [
    river_gauge_forecaster(),
    {
        "seed": 0,
        "dtype": "bfloat16",
        "depth_policy": {"name": "scaled_residual"},
        "layers": [
            {"name": "tok", "kind": "embedding", "vocab": 50, "dim": 16},
            {
                "kind": "transformer_block",
                "name": "blk",
                "repeat": 2,
                "dim": 16,
                "heads": 2,
                "mlp_dim": 32,
                "norm": "pre",
            },
        ],
    },
]


@pytest.mark.parametrize("network", SWEEP_NETWORKS, ids=["forecaster", "blocks-and-policy"])
@pytest.mark.parametrize("seed", [7, "sweep/run-12", 2**63 - 1])
def test_a_reseeded_plan_equals_planning_anew(network: dict, seed: int | str) -> None:
    template = build_plan({**network, "seed": "template"})
    fresh = build_plan({**network, "seed": seed})
    assert reseeded(template, seed) == fresh
    assert json.dumps(plan_document(reseeded(template, seed))) == json.dumps(plan_document(fresh))


def test_a_seed_sweep_is_served_from_one_plan_with_fresh_answers() -> None:
    network = river_gauge_forecaster()
    with TestClient(create_app(Settings(plan_cache_entries=0))) as plain:
        fresh = [plain.post("/v1/plan", json={**network, "seed": s}) for s in (3, 4)]
        bad = plain.post("/v1/plan", json={**network, "seed": -1})
    with TestClient(create_app()) as client:
        cache: PlanCache = client.app.state.plan_cache
        swept = [client.post("/v1/plan", json={**network, "seed": s}) for s in (3, 4)]
        assert cache.hits == 1  # the second seed reused the first one's plan
        refused = client.post("/v1/plan", json={**network, "seed": -1})
    for a, b in zip(fresh, swept, strict=True):
        assert a.status_code == b.status_code == 200
        assert a.content == b.content and a.headers["etag"] == b.headers["etag"]
    assert refused.status_code == bad.status_code == 422 and refused.json() == bad.json()
