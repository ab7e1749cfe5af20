"""Every client operation against a real uvicorn server: recipes (publish, list, show, weights by
name@version and name@latest, offline fallback), audit, diagnose and its chart, for Client and
AsyncClient.

Outside references: numpy's own NPZ writer makes the audited files; hashlib's SHA-256 of the raw
little-endian bytes is what a fingerprint is; xml.etree parses the chart; a weight matrix whose
rows are all equal keeps its units symmetric (common practice: they receive identical gradients,
so they never differentiate), which the audit must call an error.
"""

from __future__ import annotations

import asyncio
import hashlib
import subprocess
import sys
import xml.etree.ElementTree as ET
from collections.abc import Callable, Iterator
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from seedbed_client import AsyncClient, Client, RetryPolicy
from seedbed_client.errors import ServiceUnavailable, SpecInvalid
from support.networks import greenhouse_controller, variant
from support.server import RunningServer

QUICK = RetryPolicy(attempts=1)


@pytest.fixture(scope="module")
def registry_server(server_factory: Callable[..., RunningServer]) -> Iterator[RunningServer]:
    # A server of its own: the offline test stops it.
    server = server_factory()
    yield server
    server.stop()


@pytest.fixture(scope="module")
def key(registry_server: RunningServer) -> str:
    done = subprocess.run(
        [sys.executable, "-m", "seedbed.cli", "keys", "create", "client-e2e"],
        env=registry_server.environment,
        cwd=Path(registry_server.environment["SEEDBED_DATA_DIR"]),
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout.strip().splitlines()[-1].strip()


def _digests(arrays: dict[str, np.ndarray]) -> dict[str, str]:
    return {
        n: hashlib.sha256(np.ascontiguousarray(a).tobytes()).hexdigest() for n, a in arrays.items()
    }


def test_recipes_publish_list_show_and_weights_by_version_and_latest(
    registry_server: RunningServer, key: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    first_request = greenhouse_controller()
    second_request = variant(first_request, seed="greenhouse/zone-7b")
    monkeypatch.setenv("SEEDBED_PUBLISH_KEY", key)
    cache_dir = tmp_path / "cache"
    with Client(registry_server.base_url, cache_dir=cache_dir, retry=QUICK) as client:
        one = client.publish("vent-control", first_request, "first season")
        assert one.created and one.version == 1 and one.ref == "vent-control@1"
        again = client.publish("vent-control", first_request, "ignored")
        assert not again.created and again.version == 1
        monkeypatch.delenv("SEEDBED_PUBLISH_KEY")
        key_file = tmp_path / "publish.key"
        key_file.write_text(key + "\n", encoding="utf-8")
        two = client.publish("vent-control", second_request, key_file=key_file)
        assert two.created and two.version == 2
        with pytest.raises(SpecInvalid) as missing:
            client.publish("vent-control", first_request)
        assert missing.value.problems[0].field == "key"

        names = {r.name: r for r in client.recipes()}
        assert names["vent-control"].latest_version == 2
        assert [v.version for v in client.recipe_versions("vent-control")] == [1, 2]
        stored = client.recipe("vent-control@latest")
        assert stored.summary.version == 2 and stored.request["seed"] == "greenhouse/zone-7b"

        direct = client.weights(second_request)
        latest = client.weights("vent-control@latest")
        assert latest.recipe == "vent-control@2" and latest.note is None
        assert latest.source == "service"
        assert _digests(latest) == _digests(direct) == dict(stored.fingerprints)
        v1 = client.weights("vent-control@1", format="safetensors")
        assert _digests(v1) == _digests(client.weights(first_request))
        # A numbered version never changes: the second read is the cache's, unasked.
        assert client.weights("vent-control@1", format="safetensors").source == "cache"
        saved = client.save("vent-control@latest", tmp_path / "v.npz")
        assert saved.recipe == "vent-control@2"
        with np.load(saved.path) as npz:
            assert _digests({n: npz[n] for n in direct}) == _digests(direct)
        block = client.tensor("vent-control@1", "sensors.0.weight", rows="3:9")
        np.testing.assert_array_equal(block, v1["sensors.0.weight"][3:9])

    # The service goes away: numbered versions come from the cache, latest falls back to the
    # newest cached version and says so.
    registry_server.stop()
    with Client(registry_server.base_url, cache_dir=cache_dir, retry=QUICK) as client:
        assert _digests(client.weights("vent-control@1", format="safetensors")) == _digests(v1)
        offline = client.weights("vent-control@latest")
        assert offline.recipe == "vent-control@2" and offline.source == "cache"
        assert offline.note is not None and "could not be reached" in offline.note
        assert _digests(offline) == _digests(direct)
    empty = tmp_path / "empty"
    with (
        Client(registry_server.base_url, cache_dir=empty, retry=QUICK) as client,
        pytest.raises(ServiceUnavailable),
    ):
        client.weights("vent-control@latest")


def _twin_rows_file(path: Path, request: dict[str, Any], client: Client) -> Path:
    arrays = dict(client.weights(request))
    weight = arrays["sensors.0.weight"].copy()
    weight[:] = weight[0]  # every unit has the same incoming weights
    arrays["sensors.0.weight"] = weight
    np.savez(path, **arrays)
    return path


def test_audit_of_good_and_symmetric_files(service: RunningServer, tmp_path: Path) -> None:
    request = greenhouse_controller()
    with Client(service.base_url, cache=False) as client:
        good = tmp_path / "good.npz"
        np.savez(good, **dict(client.weights(request)))
        report = client.audit(good, request)
        assert report.passed and report.verdict in ("ok", "warnings")
        assert {t["tensor"] for t in report.tensors} == set(client.weights(request))
        bad = client.audit(_twin_rows_file(tmp_path / "bad.npz", request, client))
        assert not bad.passed and bad.verdict == "errors"
        assert any(f.tensor == "sensors.0.weight" for f in bad.errors)
        assert "starting point" in bad.notice


def _deep_sigmoid() -> dict[str, Any]:
    # Invented: a deep sigmoid stack for a soil-moisture probe; the request as given is He
    # (linear head), while a tiny uniform start vanishes (Glorot & Bengio 2010, sec. 3).
    layers = [
        {"name": f"soil.{i}", "kind": "dense", "n_in": 64, "n_out": 64, "activation": "relu"}
        for i in range(10)
    ]
    layers.append({"name": "moisture", "kind": "dense", "n_in": 64, "n_out": 1, "role": "output"})
    return {"seed": 88, "layers": layers}


def test_diagnose_and_chart(service: RunningServer) -> None:
    alternatives = {"tiny": {"method": "symmetric_uniform", "bound": 1e-4}}
    with Client(service.base_url, cache=False) as client:
        report = client.diagnose(_deep_sigmoid(), alternatives, batch=64)
        assert report.recommended.label == "recommended"
        assert report.passed and report.recommended.verdict == "stable"
        assert report.run("tiny").verdict == "vanishing"
        assert "not a promise" in report.notice or "estimate" in report.notice.lower()
        svg = client.diagnosis_chart(_deep_sigmoid(), alternatives, batch=64)
        root = ET.fromstring(svg)
        assert root.tag.endswith("svg")


def test_async_client_does_the_same(
    registry_server_for_async: RunningServer, key: str, tmp_path: Path
) -> None:
    request = greenhouse_controller()

    async def go() -> None:
        async with AsyncClient(
            registry_server_for_async.base_url, cache_dir=tmp_path / "c"
        ) as client:
            published = await client.publish("vent-async", request, key=key)
            assert published.created
            assert [r.version for r in await client.recipe_versions("vent-async")] == [1]
            got = await client.weights("vent-async@latest")
            assert got.recipe == "vent-async@1"
            assert _digests(got) == _digests(await client.weights(request))
            local = await client.weights(request, origin="local")
            assert _digests(local) == _digests(got) and local.source == "local"
            good = tmp_path / "good.npz"
            np.savez(good, **dict(got))
            assert (await client.audit(good, request)).passed
            assert (await client.diagnose(_deep_sigmoid())).passed

    # A fresh thread has no event loop of its own, whatever an earlier test (the browser
    # driver's sync API) left running on this one.
    with ThreadPoolExecutor(1) as pool:
        pool.submit(asyncio.run, go()).result()


@pytest.fixture(scope="module")
def registry_server_for_async(
    server_factory: Callable[..., RunningServer], registry_server: RunningServer
) -> RunningServer:
    # Same database as registry_server (the key works), and still running after the offline
    # test stopped that one.
    return server_factory({"SEEDBED_DATA_DIR": registry_server.environment["SEEDBED_DATA_DIR"]})
