"""Streaming: a large response passes through with bounded memory, and the event loop stays
free for /healthz while it streams. Driven as raw ASGI calls (no test client, which would
buffer the whole body) with a `send` that only counts bytes."""

from __future__ import annotations

import hashlib
import json
import tracemalloc
from typing import Any

import anyio

from seedbed.core.plan import build_plan
from seedbed.web import Settings, create_app

# An invented 4096 x 4096 float64 layer (128 MiB of values): large enough that holding the
# body, or one whole tensor, would show at once against the bound below.
SIDE = 4096
WIDE: dict[str, Any] = {
    "seed": 99,
    "dtype": "float64",
    "layers": [
        {
            "name": "panorama",
            "kind": "dense",
            "n_in": SIDE,
            "n_out": SIDE,
            "bias": False,
            # uniform is the cheapest sampler: keeps this test quick.
            "init": {"method": "symmetric_uniform", "bound": 0.01},
        },
    ],
}
CHUNK = 1 << 20


def _scope(method: str, path: str, query: bytes, body_len: int) -> dict[str, Any]:
    return {
        "type": "http",
        "asgi": {"version": "3.0"},
        "http_version": "1.1",
        "method": method,
        "scheme": "http",
        "path": path,
        "raw_path": path.encode(),
        "root_path": "",
        "query_string": query,
        "headers": [
            (b"content-type", b"application/json"),
            (b"content-length", str(body_len).encode()),
        ],
        "client": ("127.0.0.1", 5000),
        "server": ("127.0.0.1", 8600),
    }


class Counter:
    def __init__(self) -> None:
        self.status = 0
        self.declared = -1
        self.received = 0
        self.done = False
        self.sha = hashlib.sha256()

    async def send(self, message: dict[str, Any]) -> None:
        if message["type"] == "http.response.start":
            self.status = message["status"]
            self.declared = int(dict(message["headers"]).get(b"content-length", b"-1"))
        elif message["type"] == "http.response.body":
            body = message.get("body", b"")
            self.received += len(body)
            self.sha.update(body)
            if not message.get("more_body", False):
                self.done = True


async def _call(
    app: Any, method: str, path: str, query: bytes, body: bytes, counter: Counter | None = None
) -> Counter:
    counter = Counter() if counter is None else counter
    sent = False

    async def receive() -> dict[str, Any]:
        nonlocal sent
        if not sent:
            sent = True
            return {"type": "http.request", "body": body, "more_body": False}
        await anyio.sleep_forever()
        raise AssertionError("unreachable")

    await app(_scope(method, path, query, len(body)), receive, counter.send)
    return counter


def test_large_response_streams_in_bounded_memory() -> None:
    app = create_app(Settings(chunk_bytes=CHUNK))
    body = json.dumps(WIDE).encode()
    expected = build_plan(WIDE).tensors[0].nbytes
    assert expected == SIDE * SIDE * 8

    tracemalloc.start()
    try:
        counter = anyio.run(_call, app, "POST", "/v1/weights", b"format=npz", body)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert counter.status == 200 and counter.done
    assert counter.received == counter.declared > expected
    # Bound: a handful of 1 MiB chunks of scratch (about 5 MiB measured), far below the
    # 128 MiB body or the tensor.
    assert peak < 16 * (1 << 20), f"peak traced memory {peak / (1 << 20):.1f} MiB"


def test_healthz_answers_while_weights_stream() -> None:
    app = create_app(Settings(chunk_bytes=CHUNK))
    body = json.dumps(WIDE).encode()
    answered_during_stream: list[bool] = []

    async def main() -> None:
        stream = Counter()
        async with anyio.create_task_group() as tg:
            tg.start_soon(_call, app, "POST", "/v1/weights", b"format=npz", body, stream)
            # Wait until the body is under way, then probe liveness while it runs.
            with anyio.fail_after(60):
                while stream.received == 0:
                    await anyio.sleep(0.001)
            for _ in range(3):
                health = await _call(app, "GET", "/healthz", b"", b"")
                assert health.status == 200
                answered_during_stream.append(not stream.done)
        assert stream.done and stream.status == 200

    anyio.run(main)
    assert answered_during_stream and all(answered_during_stream)
