"""Three real server processes on one PostgreSQL database, as replicas behind a load balancer.

A recipe published through one is served byte-identically by the others; concurrent publishes
through all of them get distinct versions; a key revoked (with the `keys` command, on the shared
database) is refused by every replica at once.
"""

from __future__ import annotations

import os
import subprocess
import sys
import threading
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import httpx
import pytest

from seedbed.registry import config_from_env, open_registry
from seedbed.registry.keys import create_key
from support.server import RunningServer

from .servers import start_registry_server

ROOT = Path(__file__).resolve().parents[2]

# Invented scenario: a wind-turbine vibration model three training clusters pull by name.
TURBINE: dict[str, Any] = {
    "seed": 60061,
    "dtype": "bfloat16",
    "layout": "in_out",
    "layers": [
        {
            "name": "blade",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 6,
            "kernel": [5],
            "activation": "gelu",
        },
        {"name": "nacelle", "kind": "dense", "n_in": 30, "n_out": 20, "activation": "silu"},
        {"name": "fault", "kind": "dense", "n_in": 20, "n_out": 4, "role": "output"},
    ],
}


@pytest.fixture(scope="module")
def database(pg_admin_url: str) -> Iterator[dict[str, str]]:
    from .pgcluster import fresh_database

    with fresh_database(pg_admin_url) as url:
        yield {"SEEDBED_DATABASE_URL": url}


@pytest.fixture(scope="module")
def replicas(
    database: dict[str, str], tmp_path_factory: pytest.TempPathFactory
) -> Iterator[list[RunningServer]]:
    logs = tmp_path_factory.mktemp("replicas")
    started: list[RunningServer] = []
    errors: list[BaseException] = []

    def start() -> None:
        try:
            started.append(start_registry_server(database, logs))
        except BaseException as exc:
            errors.append(exc)

    # Started together: they race to migrate the new database, which must be harmless.
    threads = [threading.Thread(target=start) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    try:
        assert not errors, errors
        yield started
    finally:
        for server in started:
            server.stop()


@pytest.fixture(scope="module")
def token(database: dict[str, str], replicas: list[RunningServer]) -> str:
    registry = open_registry(config_from_env(database))
    try:
        return create_key(registry.engine, "turbine-lab").token
    finally:
        registry.close()


def _auth(token: str) -> dict[str, str]:
    return {"Authorization": f"Bearer {token}"}


def test_published_through_one_is_served_identically_by_all(
    replicas: list[RunningServer], token: str
) -> None:
    a, b, c = (httpx.Client(base_url=s.base_url, timeout=60) for s in replicas)
    try:
        r = a.post(
            "/v1/recipes",
            headers=_auth(token),
            json={"name": "turbine", "request": TURBINE, "description": "v1 of the rig"},
        )
        assert r.status_code == 201, r.text
        version = r.json()["version"]
        for fmt in ("json", "npz", "safetensors"):
            reference = a.post("/v1/weights", params={"format": fmt}, json=TURBINE)
            for client in (b, c):
                got = client.get(f"/v1/recipes/turbine/{version}/weights", params={"format": fmt})
                assert got.status_code == 200
                assert got.content == reference.content, fmt
                assert got.headers["etag"] == reference.headers["etag"]
        docs = [x.get(f"/v1/recipes/turbine/{version}") for x in (a, b, c)]
        assert docs[0].content == docs[1].content == docs[2].content
        assert len({d.headers["etag"] for d in docs}) == 1
    finally:
        for client in (a, b, c):
            client.close()


def test_concurrent_publishes_through_all_replicas_get_distinct_versions(
    replicas: list[RunningServer], token: str
) -> None:
    got: list[int] = []
    failures: list[str] = []
    lock = threading.Lock()
    start = threading.Barrier(6)

    def worker(server: RunningServer, lane: int) -> None:
        with httpx.Client(base_url=server.base_url, timeout=60) as client:
            start.wait()
            for i in range(5):
                # Distinct requests: one identical to the newest version would reuse it.
                seed = 100 * lane + i
                r = client.post(
                    "/v1/recipes",
                    headers=_auth(token),
                    json={"name": "gearbox", "request": {**TURBINE, "seed": seed}},
                )
                with lock:
                    if r.status_code == 201:
                        got.append(r.json()["version"])
                    else:
                        failures.append(r.text)

    threads = [
        threading.Thread(target=worker, args=(s, 2 * k + j))
        for k, s in enumerate(replicas)
        for j in range(2)
    ]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert failures == []
    assert sorted(got) == list(range(1, 31))
    listed = httpx.get(replicas[2].base_url + "/v1/recipes/gearbox").json()["versions"]
    assert [v["version"] for v in listed] == list(range(1, 31))


def test_a_key_revoked_once_is_refused_by_every_replica(
    replicas: list[RunningServer], database: dict[str, str]
) -> None:
    registry = open_registry(config_from_env(database))
    try:
        doomed = create_key(registry.engine, "temp-contractor").token
    finally:
        registry.close()
    body = {"name": "nacelle", "request": TURBINE}
    for i, server in enumerate(replicas):
        # Distinct requests: the newest version's own request would be answered 200, unchanged.
        fresh = {"name": "nacelle", "request": {**TURBINE, "seed": 60061 + i}}
        assert (
            httpx.post(
                server.base_url + "/v1/recipes", headers=_auth(doomed), json=fresh, timeout=60
            ).status_code
            == 201
        )
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    env.update(database)
    env["PYTHONPATH"] = str(ROOT / "service")
    done = subprocess.run(
        [sys.executable, "-m", "seedbed.keys_cli", "keys", "revoke", "temp-contractor"],
        env=env,
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    for server in replicas:  # no waiting: the very next request is refused everywhere
        r = httpx.post(
            server.base_url + "/v1/recipes", headers=_auth(doomed), json=body, timeout=60
        )
        assert r.status_code == 401 and "revoked" in r.json()["error"]["message"]
    for server in replicas:
        assert server.alive(), server.log_tail()
