"""Which generator runs is visible: /readyz `generator` and `seedbed settings` name the compiled
kernel or the numpy reference (with the reason), and the service is ready either way because the
bytes are the same."""

from __future__ import annotations

import os
import subprocess
import sys
from pathlib import Path

from fastapi.testclient import TestClient

from seedbed.web import Settings, create_app
from seedbed_client.generator import kernel

ROOT = Path(__file__).resolve().parents[3]


def _readyz(settings: Settings) -> dict[str, object]:
    try:
        with TestClient(create_app(settings)) as client:
            got = client.get("/readyz")
    finally:
        kernel.set_enabled(True)
    assert got.status_code == 200, got.text
    return got.json()


def test_readyz_names_the_generator_and_is_ready_with_either() -> None:
    on = _readyz(Settings())
    off = _readyz(Settings(generator_kernel=False))
    assert off["generator"] == "reference (compiled kernel switched off; numpy reference in use)"
    if kernel.loaded() is None:
        assert str(on["generator"]).startswith("reference (compiled kernel unavailable")
    else:
        assert str(on["generator"]).startswith("compiled (C kernel, ")
    # Ready in both cases: the probe tensors matched the baked bytes with each implementation.
    assert on["tensors_checked"] == off["tensors_checked"] > 0


def _settings_output(prelude: str, env: dict[str, str]) -> str:
    code = prelude + "from seedbed.cli import main\nraise SystemExit(main(['settings']))\n"
    full_env = {**os.environ, **env, "PYTHONPATH": str(ROOT / "service")}
    done = subprocess.run(
        [sys.executable, "-c", code],
        env=full_env,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout


def test_settings_command_says_which_generator_runs(tmp_path: Path) -> None:
    env = {"SEEDBED_DATA_DIR": str(tmp_path), "SEEDBED_GENERATION_THREADS": "3"}
    # A fresh install without a compiler has no extension module: block its import.
    missing = _settings_output(
        "import sys; sys.modules['seedbed_client.generator._kernel'] = None\n", env
    )
    assert "generator: reference (compiled kernel unavailable" in missing
    assert "3 thread(s) per request" in missing
    switched_off = _settings_output("", {**env, "SEEDBED_GENERATOR_KERNEL": "off"})
    assert "generator: reference (compiled kernel switched off" in switched_off
    assert "SEEDBED_GENERATOR_KERNEL=off  (environment; default on)" in switched_off


def test_auto_threads_divide_the_cores_between_workers() -> None:
    cores = os.cpu_count() or 1
    assert Settings().threads_per_request() == cores
    assert Settings(workers=cores * 2).threads_per_request() == 1
    assert Settings(generation_threads=5, workers=64).threads_per_request() == 5
