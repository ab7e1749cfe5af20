"""`latest` as a recipe version, and publishing a request the newest version already stores.

Run in process over the ASGI app, on SQLite and on a throwaway PostgreSQL (the registry suite's
fixtures). Outside references: RFC 9110 sec. 8.8.1 (a weak validator for a representation that
may change under one URL), sec. 8.7 (Content-Location names the specific resource served),
RFC 9111 sec. 5.2.2.1 (max-age) and RFC 8246 (immutable is for URLs whose body never changes);
POST /v1/weights of the same request is what the weights must equal byte for byte.
"""

from __future__ import annotations

import threading
from collections.abc import Callable, Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from registry.conftest import (  # noqa: F401 - fixtures shared with the registry suite
    backend,
    make_token,
    pg_admin_url,
    pg_shared_url,
    registry,
    registry_config,
    registry_env,
)
from seedbed.registry import Registry
from seedbed.registry.prepare import prepare_recipe
from seedbed.registry.store import publish_unless_same
from seedbed.web import Settings, create_app

# Invented scenario: a beehive-acoustics classifier a field team republishes as it grows.
HIVE: dict[str, Any] = {
    "seed": "hive-hum-2026",
    "dtype": "float32",
    "layers": [
        {"name": "hum", "kind": "dense", "n_in": 24, "n_out": 16, "activation": "relu"},
        {"name": "state", "kind": "dense", "n_in": 16, "n_out": 3, "role": "output"},
    ],
}
HIVE_V2 = {**HIVE, "seed": "hive-hum-2026-b"}


@pytest.fixture(scope="module")
def shared_client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


@pytest.fixture
def client(shared_client: TestClient, registry: Registry) -> Iterator[TestClient]:  # noqa: F811
    shared_client.app.state.registry = registry  # type: ignore[attr-defined]
    yield shared_client
    shared_client.app.state.registry = None  # type: ignore[attr-defined]


@pytest.fixture
def auth(make_token: Callable[[str], str]) -> dict[str, str]:  # noqa: F811
    return {"Authorization": "Bearer " + make_token("hive-team")}


def _publish(
    client: TestClient, auth: dict[str, str], request: dict[str, Any], description: str = ""
) -> Any:
    return client.post(
        "/v1/recipes",
        headers=auth,
        json={"name": "hive", "request": request, "description": description},
    )


def test_latest_describes_the_newest_version_with_revalidating_cache_headers(
    client: TestClient, auth: dict[str, str]
) -> None:
    assert _publish(client, auth, HIVE).status_code == 201
    first = client.get("/v1/recipes/hive/latest")
    assert first.status_code == 200 and first.json()["version"] == 1
    assert _publish(client, auth, HIVE_V2).status_code == 201
    latest = client.get("/v1/recipes/hive/latest")
    numbered = client.get("/v1/recipes/hive/2")
    assert latest.json()["version"] == 2
    # Same body as the concrete version: only the caching differs.
    assert latest.content == numbered.content
    assert latest.headers["x-seedbed-recipe"] == "hive/2"
    assert latest.headers["content-location"] == "/v1/recipes/hive/2"
    assert latest.headers["etag"].startswith("W/")
    assert latest.headers["etag"].removeprefix("W/") == numbered.headers["etag"]
    assert "immutable" not in latest.headers["cache-control"]
    assert latest.headers["cache-control"] == "public, max-age=30"
    assert "immutable" in numbered.headers["cache-control"]
    # A validator from before the publish no longer matches; the current one does.
    assert (
        client.get(
            "/v1/recipes/hive/latest", headers={"If-None-Match": first.headers["etag"]}
        ).status_code
        == 200
    )
    again = client.get("/v1/recipes/hive/latest", headers={"If-None-Match": latest.headers["etag"]})
    assert again.status_code == 304 and again.headers["x-seedbed-recipe"] == "hive/2"


@pytest.mark.parametrize("fmt", ["json", "npz", "safetensors"])
def test_latest_weights_equal_the_newest_versions_and_post_weights(
    client: TestClient, auth: dict[str, str], fmt: str
) -> None:
    _publish(client, auth, HIVE)
    _publish(client, auth, HIVE_V2)
    latest = client.get("/v1/recipes/hive/latest/weights", params={"format": fmt})
    numbered = client.get("/v1/recipes/hive/2/weights", params={"format": fmt})
    direct = client.post("/v1/weights", params={"format": fmt}, json=HIVE_V2)
    assert latest.status_code == 200, latest.text
    assert latest.content == numbered.content == direct.content
    assert latest.headers["x-seedbed-recipe"] == "hive/2"
    assert latest.headers["content-location"] == f"/v1/recipes/hive/2/weights?format={fmt}"
    assert latest.headers["etag"] == "W/" + numbered.headers["etag"]
    assert latest.headers["cache-control"] == "public, max-age=30"
    assert 'filename="hive-v2.' in latest.headers["content-disposition"]
    head = client.head("/v1/recipes/hive/latest/weights", params={"format": fmt})
    assert head.status_code == 200 and head.headers["x-seedbed-recipe"] == "hive/2"
    assert (
        client.get(
            "/v1/recipes/hive/latest/weights",
            params={"format": fmt},
            headers={"If-None-Match": latest.headers["etag"]},
        ).status_code
        == 304
    )


def test_publishing_the_newest_request_again_returns_that_version(
    client: TestClient, auth: dict[str, str]
) -> None:
    first = _publish(client, auth, HIVE, "spring baseline")
    assert first.status_code == 201 and first.json()["version"] == 1
    # Another spelling of the same request (a default written out, keys reordered) is the
    # same canonical request.
    spelled = {"layout": "out_in", **{k: HIVE[k] for k in reversed(list(HIVE))}}
    again = _publish(client, auth, spelled, "a different description")
    assert again.status_code == 200, again.text
    assert again.json()["version"] == 1
    assert again.json()["description"] == "spring baseline"  # the stored version, unchanged
    assert again.headers["location"] == "/v1/recipes/hive/1"
    assert again.json()["fingerprints"] == first.json()["fingerprints"]
    changed = _publish(client, auth, HIVE_V2)
    assert changed.status_code == 201 and changed.json()["version"] == 2
    # Only the newest version counts: going back to v1's request is a new version.
    back = _publish(client, auth, HIVE)
    assert back.status_code == 201 and back.json()["version"] == 3
    versions = client.get("/v1/recipes/hive").json()["versions"]
    assert [v["version"] for v in versions] == [1, 2, 3]


def test_identical_concurrent_publishes_share_one_version(
    registry: Registry,  # noqa: F811
    make_token: Callable[[str], str],  # noqa: F811
) -> None:
    token = make_token("hive-team")
    prepared = prepare_recipe({"name": "hive", "request": HIVE})
    results: list[tuple[int, bool]] = []
    errors: list[BaseException] = []
    lock = threading.Lock()
    start = threading.Barrier(6)

    def worker() -> None:
        try:
            start.wait()
            for _ in range(3):
                summary, created = publish_unless_same(registry.engine, prepared, token)
                with lock:
                    results.append((summary.version, created))
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=worker) for _ in range(6)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    assert {v for v, _ in results} == {1}
    assert sum(created for _, created in results) == 1


@pytest.mark.parametrize(
    ("path", "status", "field"),
    [
        ("/v1/recipes/nothing/latest", 404, "name"),
        ("/v1/recipes/nothing/latest/weights", 404, "name"),
        ("/v1/recipes/hive/Latest", 422, "version"),
        ("/v1/recipes/hive/01", 422, "version"),
        ("/v1/recipes/hive/99999999999", 422, "version"),
    ],
)
def test_bad_version_names(
    client: TestClient, auth: dict[str, str], path: str, status: int, field: str
) -> None:
    _publish(client, auth, HIVE)
    r = client.get(path)
    assert r.status_code == status, r.text
    err = r.json()["error"]
    assert err["field"] == field
    if status == 422:
        assert "latest" in err["message"]
