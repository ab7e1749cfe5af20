"""The command line's recipe, audit, diagnose and `verify --against` commands, as separate
processes against a real uvicorn server, with their documented exit codes (5 = a check found an
error, usable as a CI gate).

Outside references: numpy's NPZ writer makes the audited files; xml.etree parses the saved
chart; equal incoming weights keep units symmetric (common practice), an audit error; a stack
started at U(-1e-4, 1e-4) loses its signal within a few layers (Glorot & Bengio 2010, sec. 3:
activations shrink layer by layer when the weights' variance is far below 1/fan-in).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
import xml.etree.ElementTree as ET
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from support.networks import greenhouse_controller, harbor_crane_monitor, variant
from support.server import ROOT, RunningServer


def run_cli(
    *args: str, env: dict[str, str] | None = None, cwd: Path | None = None
) -> subprocess.CompletedProcess[str]:
    environ = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    environ["PYTHONPATH"] = os.pathsep.join([str(ROOT / "client"), environ.get("PYTHONPATH", "")])
    environ.update(env or {})
    return subprocess.run(
        [sys.executable, "-m", "seedbed_client", *args],
        capture_output=True,
        text=True,
        env=environ,
        cwd=cwd,
        timeout=180,
        check=False,
    )


@pytest.fixture(scope="module")
def server(server_factory: Callable[..., RunningServer]) -> RunningServer:
    return server_factory()


@pytest.fixture(scope="module")
def key(server: RunningServer) -> str:
    done = subprocess.run(
        [sys.executable, "-m", "seedbed.cli", "keys", "create", "cli-e2e"],
        env=server.environment,
        cwd=Path(server.environment["SEEDBED_DATA_DIR"]),
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout.strip().splitlines()[-1].strip()


def _write(path: Path, doc: Any) -> Path:
    path.write_text(json.dumps(doc), encoding="utf-8")
    return path


def test_recipes_and_verify_against(server: RunningServer, key: str, tmp_path: Path) -> None:
    url = ["--server", server.base_url]
    request = _write(tmp_path / "crane.json", harbor_crane_monitor())
    env = {"SEEDBED_PUBLISH_KEY": key, "SEEDBED_CACHE_DIR": str(tmp_path / "cache")}
    done = run_cli(
        "recipes", "publish", "crane-watch", str(request), "--description", "first", *url, env=env
    )
    assert done.returncode == 0, done.stderr
    assert "published crane-watch@1" in done.stdout
    again = run_cli("recipes", "publish", "crane-watch", str(request), *url, env=env)
    assert again.returncode == 0 and "already stores this request" in again.stdout
    no_key = run_cli("recipes", "publish", "crane-watch", str(request), *url)
    assert no_key.returncode == 2 and "SEEDBED_PUBLISH_KEY" in no_key.stderr

    listed = run_cli("recipes", "list", *url, env=env)
    assert listed.returncode == 0 and "crane-watch" in listed.stdout
    shown = run_cli("recipes", "show", "crane-watch@latest", *url, env=env)
    assert shown.returncode == 0 and shown.stdout.startswith("crane-watch@1")
    assert "timeline.recurrent_weight" in shown.stdout

    out = tmp_path / "crane.safetensors"
    fetched = run_cli("fetch", "--recipe", "crane-watch@latest", "-o", str(out), *url, env=env)
    assert fetched.returncode == 0, fetched.stderr
    assert "of crane-watch@1" in fetched.stdout

    # The recurrent weight is orthogonal (platform-dependent): its expected digest is asked of
    # the service, every other tensor's is computed here from the plan's recipes.
    for against in ("crane-watch@1", str(request)):
        checked = run_cli("verify", str(out), "--against", against, *url, env=env)
        assert checked.returncode == 0, checked.stdout + checked.stderr
        assert "every tensor in the file matches" in checked.stdout
        assert "ok  timeline.recurrent_weight" in checked.stdout
    other = _write(tmp_path / "other.json", variant(harbor_crane_monitor(), seed=4022))
    differs = run_cli("verify", str(out), "--against", str(other), *url, env=env)
    assert differs.returncode == 1
    assert "BAD operator.weight" in differs.stdout


def test_audit_gate(server: RunningServer, tmp_path: Path) -> None:
    from seedbed_client import Client

    request = greenhouse_controller()
    with Client(server.base_url, cache=False) as client:
        arrays = dict(client.weights(request))
    good = tmp_path / "good.npz"
    np.savez(good, **arrays)
    twins = dict(arrays)
    twins["sensors.1.weight"] = np.repeat(arrays["sensors.1.weight"][:1], 40, axis=0)
    bad = tmp_path / "bad.npz"
    np.savez(bad, **twins)
    req = _write(tmp_path / "req.json", request)
    url = ["--server", server.base_url]
    ok = run_cli("audit", str(good), "--request", str(req), *url)
    assert ok.returncode == 0, ok.stdout + ok.stderr
    assert "verdict:" in ok.stdout
    failed = run_cli("audit", str(bad), *url)
    assert failed.returncode == 5, failed.stdout + failed.stderr
    assert "error" in failed.stdout and "sensors.1.weight" in failed.stdout
    as_json = run_cli("audit", str(bad), "--json", *url)
    assert as_json.returncode == 5 and json.loads(as_json.stdout)["summary"]["verdict"] == "errors"


def _stack(init: dict[str, Any] | None) -> dict[str, Any]:
    layers = []
    for i in range(10):
        layer: dict[str, Any] = {
            "name": f"kiln.{i}",
            "kind": "dense",
            "n_in": 64,
            "n_out": 64,
            "activation": "relu",
        }
        if init is not None:
            layer["init"] = init
        layers.append(layer)
    layers.append({"name": "temp", "kind": "dense", "n_in": 64, "n_out": 1, "role": "output"})
    return {"seed": 5150, "layers": layers}


def test_diagnose_gate_and_chart(server: RunningServer, tmp_path: Path) -> None:
    url = ["--server", server.base_url]
    stable = _write(tmp_path / "stable.json", _stack(None))
    alternatives = _write(
        tmp_path / "alt.json", {"tiny": {"method": "symmetric_uniform", "bound": 1e-4}}
    )
    chart = tmp_path / "depth.svg"
    done = run_cli(
        "diagnose",
        str(stable),
        "--alternatives",
        str(alternatives),
        "--chart",
        str(chart),
        "--batch",
        "64",
        *url,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    assert "recommended" in done.stdout and "tiny" in done.stdout and "vanishing" in done.stdout
    assert ET.parse(chart).getroot().tag.endswith("svg")
    tiny = _write(tmp_path / "tiny.json", _stack({"method": "symmetric_uniform", "bound": 1e-4}))
    gated = run_cli("diagnose", str(tiny), "--batch", "64", *url)
    assert gated.returncode == 5, gated.stdout + gated.stderr
    assert "vanishing" in gated.stdout


@pytest.mark.parametrize("fmt", ["npz", "safetensors"])
def test_fetch_origin_local_writes_the_services_tensors(
    server: RunningServer, tmp_path: Path, fmt: str
) -> None:
    # Read back by the containers' own libraries (numpy, safetensors), compared with a download.
    from safetensors.numpy import load_file

    url = ["--server", server.base_url]
    request = _write(tmp_path / "crane.json", harbor_crane_monitor())
    local, served = tmp_path / f"local.{fmt}", tmp_path / f"served.{fmt}"
    made = run_cli("fetch", str(request), "-o", str(local), "--origin", "local", "--no-cache", *url)
    assert made.returncode == 0, made.stdout + made.stderr
    assert "generated on this machine" in made.stdout
    got = run_cli("fetch", str(request), "-o", str(served), "--no-cache", *url)
    assert got.returncode == 0, got.stderr
    if fmt == "npz":
        with np.load(local) as a, np.load(served) as b:
            tensors = [n for n in b.files if n != "seedbed-manifest.json"]
            assert sorted(a.files) == sorted(b.files)
            for n in tensors:
                assert a[n].tobytes() == b[n].tobytes(), n
    else:
        a, b = load_file(str(local)), load_file(str(served))
        assert sorted(a) == sorted(b)
        for n in b:
            assert a[n].tobytes() == b[n].tobytes(), n
    checked = run_cli("verify", str(local), "--against", str(request), *url)
    assert checked.returncode == 0, checked.stdout + checked.stderr
