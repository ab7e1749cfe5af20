"""Fixtures for the client suite: real services (reusing the end-to-end server helpers), a
private cache per test, and small TCP stand-ins that misbehave on purpose."""

from __future__ import annotations

import socket
import sys
import threading
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

ROOT = Path(__file__).resolve().parents[2]
# Until the root package maps seedbed_client to client/seedbed_client, import it from there.
if str(ROOT / "client") not in sys.path:
    sys.path.insert(0, str(ROOT / "client"))

from seedbed_client import Client, RetryPolicy  # noqa: E402
from support.server import RunningServer, free_port, start_server  # noqa: E402


@pytest.fixture(scope="session")
def servers(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Callable[[], RunningServer]]:
    """Start extra service processes; all are stopped when the session ends."""
    started: list[RunningServer] = []

    def start() -> RunningServer:
        server = start_server(None, log_dir=tmp_path_factory.mktemp("client-server"))
        started.append(server)
        return server

    yield start
    for server in reversed(started):
        server.stop()


@pytest.fixture(scope="session")
def service(servers: Callable[[], RunningServer]) -> RunningServer:
    """One service shared by the client tests that do not stop it."""
    return servers()


@pytest.fixture
def cache_dir(tmp_path: Path) -> Path:
    return tmp_path / "cache"


# Quick retries so failure paths stay fast: 4 attempts, waits of at most 50 ms, 5 s in all.
FAST_RETRY = RetryPolicy(attempts=4, base_delay=0.01, max_delay=0.05, total_time=5.0)


@pytest.fixture
def make_client(cache_dir: Path) -> Iterator[Callable[..., Client]]:
    made: list[Client] = []

    def make(base_url: str, **options: Any) -> Client:
        options.setdefault("cache_dir", cache_dir)
        options.setdefault("retry", FAST_RETRY)
        client = Client(base_url, **options)
        made.append(client)
        return client

    yield make
    for client in made:
        client.close()


def dead_url() -> str:
    """A loopback URL where nothing listens (the port was free a moment ago)."""
    return f"http://127.0.0.1:{free_port()}"


# --- a misbehaving TCP stand-in in front of the real service ---------------------------------


def _read_head(sock: socket.socket) -> tuple[bytes, bytes]:
    """Read up to the end of an HTTP head; returns (head, whatever followed it)."""
    data = b""
    while b"\r\n\r\n" not in data:
        chunk = sock.recv(65536)
        if not chunk:
            break
        data += chunk
    head, _, rest = data.partition(b"\r\n\r\n")
    return head + b"\r\n\r\n", rest


def _content_length(head: bytes) -> int:
    for line in head.split(b"\r\n"):
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            return int(value.strip())
    return 0


def _read_message(sock: socket.socket) -> tuple[bytes, bytes]:
    """One whole HTTP message (head, body) with a Content-Length body."""
    head, body = _read_head(sock)
    want = _content_length(head)
    while len(body) < want:
        chunk = sock.recv(65536)
        if not chunk:
            break
        body += chunk
    return head, body


def _close_after(head: bytes) -> bytes:
    """The same head, with `connection: close` so the client opens a new connection next."""
    lines = [
        line for line in head.rstrip(b"\r\n").split(b"\r\n")
        if not line.lower().startswith(b"connection:")
    ]  # fmt: skip
    return b"\r\n".join([*lines, b"connection: close"]) + b"\r\n\r\n"


@dataclass
class FaultyProxy:
    """Answers each connection by a rule, for one request per connection.

    Rules (the Nth connection uses `rules[N]`, the last rule repeats):
      "forward"      pass the request to the service and its whole answer back
      "cut"          forward, but send the head and only half the body, then close
      "flip"         forward, with one bit of the body's last byte flipped (in safetensors
                     that byte belongs to the last tensor's values)
      "unavailable"  answer 503 with Retry-After: 0 without asking the service
    """

    upstream_port: int
    rules: list[str]
    port: int = 0
    connections: int = 0
    seen: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        self._listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        self._listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self._listener.bind(("127.0.0.1", 0))
        self._listener.listen(16)
        self.port = self._listener.getsockname()[1]
        self._thread = threading.Thread(target=self._serve, daemon=True)
        self._thread.start()

    @property
    def base_url(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def _serve(self) -> None:
        while True:
            try:
                conn, _ = self._listener.accept()
            except OSError:
                return
            rule = self.rules[min(self.connections, len(self.rules) - 1)]
            self.connections += 1
            self.seen.append(rule)
            threading.Thread(target=self._handle, args=(conn, rule), daemon=True).start()

    def _handle(self, conn: socket.socket, rule: str) -> None:
        with conn:
            head, body = _read_message(conn)
            if rule == "unavailable":
                message = b'{"error":{"status":503,"code":"overloaded","field":"(request)",'
                message += b'"message":"try again","problems":[]}}'
                conn.sendall(
                    b"HTTP/1.1 503 Service Unavailable\r\ncontent-type: application/json\r\n"
                    b"retry-after: 0\r\nconnection: close\r\n"
                    + f"content-length: {len(message)}\r\n\r\n".encode()
                    + message
                )
                return
            with socket.create_connection(("127.0.0.1", self.upstream_port)) as up:
                up.sendall(_close_after(head) + body)
                answer_head, answer_body = _read_message(up)
            if rule == "cut":
                conn.sendall(_close_after(answer_head) + answer_body[: len(answer_body) // 2])
                conn.shutdown(socket.SHUT_RDWR)
                return
            if rule == "flip":
                answer_body = answer_body[:-1] + bytes([answer_body[-1] ^ 0x01])
            conn.sendall(_close_after(answer_head) + answer_body)

    def close(self) -> None:
        self._listener.close()


@pytest.fixture
def proxy(service: RunningServer) -> Iterator[Callable[[list[str]], FaultyProxy]]:
    made: list[FaultyProxy] = []

    def make(rules: list[str]) -> FaultyProxy:
        p = FaultyProxy(service.port, rules)
        made.append(p)
        return p

    yield make
    for p in made:
        p.close()
