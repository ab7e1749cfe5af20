"""A server killed with SIGKILL in the middle of a stream of publishes loses no acknowledged
recipe and leaves no half-written one, on SQLite and on PostgreSQL."""

from __future__ import annotations

import threading
import time
from pathlib import Path
from typing import Any

import httpx

from seedbed.registry import config_from_env, open_registry
from seedbed.registry.keys import create_key
from seedbed.registry.store import every_version, integrity_problems

from .servers import start_registry_server

NAMES = ("pump-a", "pump-b", "pump-c")
ACKS_BEFORE_KILL = 24
WRITERS = 6


def _request(i: int) -> dict[str, Any]:
    # Invented scenario: per-pump anomaly detectors, one small network per publish.
    return {
        "seed": i,
        "layers": [
            {"name": "flow", "kind": "dense", "n_in": 10, "n_out": 8 + i % 5, "activation": "relu"},
            {"name": "alarm", "kind": "dense", "n_in": 8 + i % 5, "n_out": 2, "role": "output"},
        ],
    }


def test_sigkill_mid_publish_loses_nothing_acknowledged(
    empty_env: dict[str, str], tmp_path: Path
) -> None:
    registry = open_registry(config_from_env(empty_env))
    token = create_key(registry.engine, "pump-fleet").token
    registry.close()
    server = start_registry_server(empty_env, tmp_path / "first")
    acked: dict[tuple[str, int], dict[str, Any]] = {}
    lock = threading.Lock()
    stop = threading.Event()
    counter = iter(range(10**6))
    interrupted: list[int] = []

    def writer() -> None:
        with httpx.Client(base_url=server.base_url, timeout=30) as client:
            while not stop.is_set():
                with lock:
                    i = next(counter)
                body = {"name": NAMES[i % len(NAMES)], "request": _request(i)}
                try:
                    r = client.post(
                        "/v1/recipes", json=body, headers={"Authorization": f"Bearer {token}"}
                    )
                except httpx.TransportError:
                    with lock:
                        interrupted.append(i)  # cut off in flight: never acknowledged
                    return
                assert r.status_code == 201, r.text
                doc = r.json()
                with lock:
                    acked[(doc["name"], doc["version"])] = {"sent": body, "doc": doc}

    threads = [threading.Thread(target=writer) for _ in range(WRITERS)]
    for t in threads:
        t.start()
    deadline = time.monotonic() + 120
    while len(acked) < ACKS_BEFORE_KILL and time.monotonic() < deadline:
        time.sleep(0.005)
    # Writers are still sending: the kill lands in the middle of publishes in flight.
    server.process.kill()
    server.process.wait(timeout=30)
    stop.set()
    for t in threads:
        t.join(timeout=60)
    assert len(acked) >= ACKS_BEFORE_KILL, server.log_tail()
    assert interrupted, "no publish was in flight when the server died"

    restarted = start_registry_server(empty_env, tmp_path / "second")
    try:
        with httpx.Client(base_url=restarted.base_url, timeout=30) as client:
            for (name, version), seen in sorted(acked.items()):
                r = client.get(f"/v1/recipes/{name}/{version}")
                assert r.status_code == 200, f"acknowledged {name} v{version} is missing"
                stored = r.json()
                assert stored["fingerprints"] == seen["doc"]["fingerprints"]
                assert stored["publisher"] == "pump-fleet"
                direct = client.post("/v1/plan", json=seen["sent"]["request"]).json()
                assert stored["plan"] == direct
        registry = open_registry(config_from_env(empty_env))
        try:
            records = list(every_version(registry.engine))
        finally:
            registry.close()
        # Every stored version is whole: digest, plan, fingerprints agree; versions have no
        # holes (a hole would mean a counter bump committed without its row).
        for record in records:
            assert integrity_problems(record) == [], record.summary
        for name in NAMES:
            versions = [r.summary.version for r in records if r.summary.name == name]
            assert versions == list(range(1, len(versions) + 1)), name
        assert {(r.summary.name, r.summary.version) for r in records} >= set(acked)
    finally:
        restarted.stop()
