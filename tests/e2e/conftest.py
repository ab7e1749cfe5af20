"""Fixtures that run the real service (uvicorn, a separate process) for the end-to-end tests."""

from __future__ import annotations

from collections.abc import Callable, Iterator, Mapping
from pathlib import Path

import httpx
import pytest

from support.server import RunningServer, start_server

ServerFactory = Callable[..., RunningServer]

# Lines the service writes for a failure it did not expect (the last-resort 500 handler, an
# exception in a stream, a crash in the lifespan): JSON log records at level error or worse.
_TROUBLE_MARKERS = ('"level": "error"', '"level": "critical"', "Traceback (most recent call")


@pytest.fixture(scope="session")
def server_factory(tmp_path_factory: pytest.TempPathFactory) -> Iterator[ServerFactory]:
    """Start extra service processes: `server_factory({"SEEDBED_X": "1"})`. All are stopped
    (SIGTERM, then SIGKILL) when the session ends."""
    started: list[RunningServer] = []

    def start(env: Mapping[str, str] | None = None) -> RunningServer:
        server = start_server(env, log_dir=tmp_path_factory.mktemp("server"))
        started.append(server)
        return server

    yield start
    for server in reversed(started):
        server.stop()


@pytest.fixture(scope="session")
def service(server_factory: ServerFactory) -> RunningServer:
    """The shared service, on its embedded defaults."""
    return server_factory()


@pytest.fixture(scope="session")
def base_url(service: RunningServer) -> str:
    return service.base_url


@pytest.fixture
def client(service: RunningServer) -> Iterator[httpx.Client]:
    """An HTTP client for the shared service. After the test, the service must still be running
    and must not have logged an unexpected error while the test ran."""
    log_size = service.log_path.stat().st_size
    with httpx.Client(base_url=service.base_url, timeout=60.0) as http:
        yield http
    assert service.alive(), f"the service died during the test:\n{service.log_tail()}"
    with open(service.log_path, "rb") as fh:
        fh.seek(log_size)
        new_lines = fh.read().decode("utf-8", errors="replace").splitlines()
    trouble = [line for line in new_lines if any(m in line for m in _TROUBLE_MARKERS)]
    assert not trouble, "the service logged errors during the test:\n" + "\n".join(trouble[:20])


@pytest.fixture
def scratch(tmp_path: Path) -> Path:
    return tmp_path
