"""The service as an operator starts and stops it: settings from SEEDBED_* variables, a clear
refusal to start on a bad value, and a clean exit on SIGTERM."""

from __future__ import annotations

import signal
from pathlib import Path

import httpx
import pytest

from support.networks import greenhouse_controller
from support.server import ServerStartError, start_server


def test_bad_setting_stops_start_up_naming_the_variable(tmp_path: Path) -> None:
    with pytest.raises(ServerStartError) as caught:
        start_server({"SEEDBED_MAX_LAYERS": "plenty"}, log_dir=tmp_path, timeout=30)
    text = str(caught.value)
    assert "exited with status 2" in text, text
    assert "SEEDBED_MAX_LAYERS" in text and "plenty" in text


def test_limits_come_from_the_environment_and_sigterm_stops_cleanly(tmp_path: Path) -> None:
    server = start_server(
        {"SEEDBED_MAX_LAYERS": "3", "SEEDBED_MAX_BODY_BYTES": "2048"}, log_dir=tmp_path
    )
    try:
        with httpx.Client(base_url=server.base_url, timeout=30) as http:
            request = greenhouse_controller()  # 4 layers, about 600 bytes of JSON
            r = http.post("/v1/plan", json=request)
            assert r.status_code == 413, r.text
            err = r.json()["error"]
            assert err["field"] == "layers" and "3" in err["message"]
            r = http.post("/v1/plan", json=dict(request, layers=request["layers"][:3]))
            assert r.status_code == 200, r.text
            padded = dict(request, layers=request["layers"][:3], note="x" * 3000)
            r = http.post("/v1/plan", json=padded)
            assert r.status_code == 413
            assert r.json()["error"]["code"] == "body_too_large"
            assert "2048" in r.json()["error"]["message"]
    finally:
        server.stop()
    # Graceful: the lifespan's shutdown ran and the process ended by itself, not by the SIGKILL
    # fallback. (uvicorn re-raises the caught SIGTERM once it has shut down, so the status is
    # either 0 or "terminated by SIGTERM", depending on its version.)
    assert server.process.returncode in (0, -signal.SIGTERM), server.log_tail()
    log = server.log_tail()
    assert "Application shutdown complete" in log and "Finished server process" in log, log
