"""Carry out a flow's effects with httpx: the only place the client touches the network.

`drive_sync` and `drive_async` differ only in how they wait and read; what a response means is
decided by the flow (flows.py). Both read bodies raw (we ask for `identity` encoding) so the
byte count can be checked against Content-Length: a body cut short never passes as complete.
"""

from __future__ import annotations

import asyncio
import time
from collections.abc import Mapping
from typing import Any

import httpx

from seedbed_client.flows import Failure, Flow, Outcome, Reply, Send, Wait, run_flow_step

# Error bodies and small JSON documents are read into memory up to this size; the rest of an
# oversized error body is dropped (the JSON error shape is a few hundred bytes).
SMALL_BODY_LIMIT = 64 * 1024 * 1024


def _lower(headers: httpx.Headers) -> dict[str, str]:
    return {k.lower(): v for k, v in headers.items()}


def _expected_length(headers: Mapping[str, str]) -> int | None:
    value = headers.get("content-length")
    if value is None or not value.strip().isdigit():
        return None
    return int(value)


def _is_encoded(headers: Mapping[str, str]) -> bool:
    return headers.get("content-encoding", "identity").strip().lower() not in ("", "identity")


def _failure(exc: httpx.HTTPError, received: int, expected: int | None, started: bool) -> Failure:
    detail = f"{type(exc).__name__}: {exc}" if str(exc) else type(exc).__name__
    if started:
        return Failure("dropped", detail, received, expected)
    if isinstance(exc, httpx.TimeoutException):
        return Failure("timeout", detail)
    return Failure("connect", detail)


def _request_kwargs(send: Send) -> dict[str, Any]:
    return {
        "method": send.method,
        "url": send.path,
        "params": dict(send.params),
        "headers": dict(send.headers),
        "content": send.body,
    }


def _finished(
    send: Send,
    headers: dict[str, str],
    status: int,
    received: int,
    expected: int | None,
    content: bytes,
) -> Reply:
    complete = expected is None or received == expected
    return Reply(status, headers, content, complete, received, expected)


def perform_sync(http: httpx.Client, send: Send) -> Reply | Failure:
    received, expected, started = 0, None, False
    try:
        with http.stream(**_request_kwargs(send)) as response:
            headers = _lower(response.headers)
            encoded = _is_encoded(headers)
            expected = None if encoded else _expected_length(headers)
            chunks = response.iter_bytes() if encoded else response.iter_raw()
            started = True
            if response.status_code == 200 and send.sink is not None:
                send.sink.begin(expected)
                for chunk in chunks:
                    send.sink.write(chunk)
                received = send.sink.received
                return _finished(send, headers, 200, received, expected, b"")
            parts = []
            for chunk in chunks:
                if received < SMALL_BODY_LIMIT:
                    parts.append(chunk)
                received += len(chunk)
            return _finished(
                send, headers, response.status_code, received, expected, b"".join(parts)
            )
    except httpx.HTTPError as exc:
        if send.sink is not None and started:
            received = send.sink.received or received
        return _failure(exc, received, expected, started)


async def perform_async(http: httpx.AsyncClient, send: Send) -> Reply | Failure:
    received, expected, started = 0, None, False
    try:
        async with http.stream(**_request_kwargs(send)) as response:
            headers = _lower(response.headers)
            encoded = _is_encoded(headers)
            expected = None if encoded else _expected_length(headers)
            chunks = response.aiter_bytes() if encoded else response.aiter_raw()
            started = True
            if response.status_code == 200 and send.sink is not None:
                send.sink.begin(expected)
                async for chunk in chunks:
                    send.sink.write(chunk)
                received = send.sink.received
                return _finished(send, headers, 200, received, expected, b"")
            parts = []
            async for chunk in chunks:
                if received < SMALL_BODY_LIMIT:
                    parts.append(chunk)
                received += len(chunk)
            return _finished(
                send, headers, response.status_code, received, expected, b"".join(parts)
            )
    except httpx.HTTPError as exc:
        if send.sink is not None and started:
            received = send.sink.received or received
        return _failure(exc, received, expected, started)


def drive_sync(flow: Flow, http: httpx.Client) -> Any:
    outcome: Outcome = None
    while True:
        done, value = run_flow_step(flow, outcome)
        if done:
            return value
        if isinstance(value, Wait):
            time.sleep(value.seconds)
            outcome = None
        else:
            outcome = perform_sync(http, value)


async def drive_async(flow: Flow, http: httpx.AsyncClient) -> Any:
    outcome: Outcome = None
    while True:
        # The flow's own work (hashing, parsing, cache files) runs off the event loop.
        done, value = await asyncio.to_thread(run_flow_step, flow, outcome)
        if done:
            return value
        if isinstance(value, Wait):
            await asyncio.sleep(value.seconds)
            outcome = None
        else:
            outcome = await perform_async(http, value)
