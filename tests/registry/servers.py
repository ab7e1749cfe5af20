"""Real service processes with the registry, for the replica and crash tests.

Each is the real `python -m seedbed.cli serve`. Process handling (environment, logs,
stopping) is the end-to-end suite's (tests/support/server.py).
"""

from __future__ import annotations

import subprocess
import sys
import time
from collections.abc import Mapping
from pathlib import Path

import httpx

from support.server import (
    HOST,
    ROOT,
    STARTUP_TIMEOUT_S,
    RunningServer,
    ServerStartError,
    child_environment,
    free_port,
)


def _command(port: int) -> list[str]:
    return [sys.executable, "-m", "seedbed.cli", "serve", "--host", HOST, "--port", str(port)]


def start_registry_server(env: Mapping[str, str], log_dir: Path) -> RunningServer:
    """Start a service process on the database `env` names; wait until /v1/recipes answers."""
    log_dir.mkdir(parents=True, exist_ok=True)
    port = free_port()
    command = _command(port)
    log_path = log_dir / f"server-{port}.log"
    with open(log_path, "wb") as log:
        process = subprocess.Popen(
            command,
            cwd=ROOT,
            env=child_environment(env, log_dir),
            stdin=subprocess.DEVNULL,
            stdout=log,
            stderr=subprocess.STDOUT,
        )
    server = RunningServer(port=port, process=process, log_path=log_path, command=command)
    deadline = time.monotonic() + STARTUP_TIMEOUT_S
    with httpx.Client(base_url=server.base_url, timeout=5.0) as client:
        while time.monotonic() < deadline:
            if not server.alive():
                raise ServerStartError(
                    f"server exited ({process.returncode}):\n{server.log_tail()}"
                )
            try:
                if client.get("/v1/recipes").status_code == 200:
                    return server
            except httpx.TransportError:
                pass
            time.sleep(0.05)
    server.stop()
    raise ServerStartError(f"no answer within {STARTUP_TIMEOUT_S} s:\n{server.log_tail()}")
