"""Start and stop the real service as a child process, the way an operator would run it.

Shared by the end-to-end fixtures (tests/e2e/conftest.py) and tests/bench/bench_service.py, so
both measure the same thing: `python -m seedbed.cli serve` under uvicorn, on a loopback port.

The child gets the repository's service/ directory on PYTHONPATH, so it runs from a plain
checkout as well as after `pip install -e .`. Inherited SEEDBED_* variables are dropped (a
developer's own settings must not change what the tests see); callers pass the ones they want.
Each server keeps its data (the recipe registry's SQLite file) in its own temporary directory.
Output goes to a log file, never to a pipe: a pipe nobody reads fills up and stalls the server.
"""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

import httpx

ROOT = Path(__file__).resolve().parents[2]
SERVICE_DIR = ROOT / "service"
HOST = "127.0.0.1"
# Start-up runs the /readyz self-check (a few probe tensors) before uvicorn listens; on a busy
# 2-core CI machine that can take several seconds.
STARTUP_TIMEOUT_S = 60.0
STOP_GRACE_S = 10.0
_PORT_RACE_ATTEMPTS = 3


class ServerStartError(RuntimeError):
    """The service did not answer /healthz in time; the message carries its log."""


def free_port() -> int:
    """A port the kernel just handed out for port 0; free again once the probe socket closes."""
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as probe:
        probe.bind((HOST, 0))
        return int(probe.getsockname()[1])


def child_environment(overrides: Mapping[str, str] | None, data_dir: Path) -> dict[str, str]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    paths = [str(SERVICE_DIR), *filter(None, env.get("PYTHONPATH", "").split(os.pathsep))]
    env["PYTHONPATH"] = os.pathsep.join(paths)
    env["PYTHONUNBUFFERED"] = "1"
    # The recipe registry's embedded SQLite file would otherwise live in the user's home
    # directory, shared with their real data and between test runs.
    env["SEEDBED_DATA_DIR"] = str(data_dir)
    env.update(overrides or {})
    return env


@dataclass
class RunningServer:
    """One service process on 127.0.0.1:`port`."""

    port: int
    process: subprocess.Popen[bytes]
    log_path: Path
    command: list[str] = field(default_factory=list)
    # The child's full environment: run the `seedbed` CLI with it to act on the same data
    # (e.g. `seedbed keys create` against the server's registry).
    environment: dict[str, str] = field(default_factory=dict)

    @property
    def base_url(self) -> str:
        return f"http://{HOST}:{self.port}"

    @property
    def pid(self) -> int:
        return self.process.pid

    def rss_bytes(self) -> int:
        """Resident memory of the server process now (Linux /proc)."""
        with open(f"/proc/{self.pid}/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("VmRSS:"):
                    return int(line.split()[1]) * 1024  # the kernel reports kB
        raise RuntimeError(f"no VmRSS line for pid {self.pid}")

    def log_tail(self, limit: int = 6000) -> str:
        try:
            text = self.log_path.read_text(encoding="utf-8", errors="replace")
        except OSError as exc:
            return f"(log unreadable: {exc})"
        return text[-limit:]

    def alive(self) -> bool:
        return self.process.poll() is None

    def stop(self) -> None:
        """SIGTERM (uvicorn's graceful shutdown), then SIGKILL if it lingers."""
        if self.process.poll() is not None:
            return
        self.process.send_signal(signal.SIGTERM)
        try:
            self.process.wait(timeout=STOP_GRACE_S)
        except subprocess.TimeoutExpired:
            self.process.kill()
            self.process.wait(timeout=STOP_GRACE_S)


def _wait_until_healthy(server: RunningServer, timeout: float) -> None:
    deadline = time.monotonic() + timeout
    with httpx.Client(base_url=server.base_url, timeout=2.0) as client:
        while time.monotonic() < deadline:
            if not server.alive():
                raise ServerStartError(
                    f"the service exited with status {server.process.returncode} before "
                    f"answering /healthz; command: {' '.join(server.command)}\n"
                    f"--- its log ---\n{server.log_tail()}"
                )
            try:
                if client.get("/healthz").status_code == 200:
                    return
            except httpx.TransportError:
                pass
            time.sleep(0.05)
    server.stop()
    raise ServerStartError(
        f"the service did not answer /healthz within {timeout:.0f} s; "
        f"command: {' '.join(server.command)}\n--- its log ---\n{server.log_tail()}"
    )


def start_server(
    env: Mapping[str, str] | None = None,
    *,
    log_dir: Path | None = None,
    timeout: float = STARTUP_TIMEOUT_S,
) -> RunningServer:
    """Start `python -m seedbed.cli serve` on a free loopback port and wait for /healthz.

    `env` adds SEEDBED_* (or other) variables for the child. Another process can grab the port
    between our probe and the server's bind; then the start is retried on a new port.
    """
    directory = Path(tempfile.mkdtemp(prefix="seedbed-e2e-")) if log_dir is None else log_dir
    directory.mkdir(parents=True, exist_ok=True)
    last_error: ServerStartError | None = None
    for _ in range(_PORT_RACE_ATTEMPTS):
        port = free_port()
        command = [
            sys.executable,
            "-m",
            "seedbed.cli",
            "serve",
            "--host",
            HOST,
            "--port",
            str(port),
        ]
        log_path = directory / f"server-{port}.log"
        environment = child_environment(env, directory)
        with open(log_path, "wb") as log:
            process = subprocess.Popen(
                command,
                cwd=directory,  # anything the service writes by default lands in the temp dir
                env=environment,
                stdin=subprocess.DEVNULL,
                stdout=log,
                stderr=subprocess.STDOUT,
            )
        server = RunningServer(
            port=port, process=process, log_path=log_path, command=command, environment=environment
        )
        try:
            _wait_until_healthy(server, timeout)
            return server
        except ServerStartError as exc:
            server.stop()
            if "address already in use" not in server.log_tail().lower():
                raise
            last_error = exc
    assert last_error is not None
    raise last_error
