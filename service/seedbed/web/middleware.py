"""The outer ASGI layer every request passes through.

One pure ASGI middleware (not Starlette's BaseHTTPMiddleware, which buffers and breaks streaming
back-pressure) does the per-request bookkeeping: request id, HEAD bodies, the access log line,
metrics, and the last-resort 500 in the common error shape.
"""

from __future__ import annotations

import json
import logging
import re
import time
import uuid
from typing import Any

from starlette.types import ASGIApp, Message, Receive, Scope, Send

from seedbed.web.errors import Fault, error_body
from seedbed.web.logs import ACCESS_LOGGER
from seedbed.web.metrics import ServiceMetrics

REQUEST_ID_HEADER = "x-request-id"
# A caller's id is echoed only when it is short and plain, so it is safe in logs and headers.
_GOOD_ID = re.compile(r"[A-Za-z0-9][A-Za-z0-9._:-]{0,127}")

access_log = logging.getLogger(ACCESS_LOGGER)
error_log = logging.getLogger("seedbed.errors")


def request_id_of(scope: Scope) -> str:
    state = scope.get("state") or {}
    return str(state.get("request_id", ""))


def _incoming_id(scope: Scope) -> str:
    for name, value in scope.get("headers", ()):
        if name == REQUEST_ID_HEADER.encode():
            text: str = value.decode("latin-1")
            if _GOOD_ID.fullmatch(text):
                return text
            break
    return uuid.uuid4().hex


class RequestBookkeeping:
    def __init__(self, app: ASGIApp, metrics: ServiceMetrics, access_log_on: bool = True) -> None:
        self.app = app
        self.metrics = metrics
        self.access_log_on = access_log_on

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        started = time.perf_counter()
        rid = _incoming_id(scope)
        scope.setdefault("state", {})["request_id"] = rid
        is_head = scope["method"] == "HEAD"
        status = 0
        sent = 0
        response_started = False

        async def send_wrapper(message: Message) -> None:
            nonlocal status, sent, response_started
            if message["type"] == "http.response.start":
                response_started = True
                status = message["status"]
                headers = [
                    h for h in message.get("headers", []) if h[0] != REQUEST_ID_HEADER.encode()
                ]
                headers.append((REQUEST_ID_HEADER.encode(), rid.encode()))
                message = {**message, "headers": headers}
            elif message["type"] == "http.response.body":
                if is_head:
                    # HEAD answers with the GET headers (Content-Length included) and no body.
                    message = {**message, "body": b""}
                sent += len(message.get("body", b""))
            await send(message)

        self.metrics.in_flight.inc()
        try:
            await self.app(scope, receive, send_wrapper)
        except Exception:
            error_log.exception(
                "unhandled error", extra={"fields": {"request_id": rid, "path": scope["path"]}}
            )
            if not response_started:
                await self._send_500(send_wrapper, rid)
            else:
                # Headers are gone: the connection ends short of Content-Length, which clients
                # detect; status stays as sent but the log line says what happened.
                status = status or 500
        finally:
            self.metrics.in_flight.dec()
            elapsed = time.perf_counter() - started
            route = _route_label(scope)
            self.metrics.observe(route, scope["method"], status, elapsed, sent)
            if self.access_log_on:
                access_log.info(
                    "request",
                    extra={
                        "fields": {
                            "method": scope["method"],
                            "path": scope["path"],
                            "route": route,
                            "status": status,
                            "duration_ms": round(elapsed * 1000, 3),
                            "bytes": sent,
                            "request_id": rid,
                        }
                    },
                )

    @staticmethod
    async def _send_500(send: Send, rid: str) -> None:
        body = json.dumps(
            error_body(
                500,
                [
                    Fault(
                        "(request)",
                        "internal_error",
                        f"the service failed unexpectedly; quote request id {rid} "
                        "when reporting it",
                    )
                ],
            )
        ).encode()
        await send(
            {
                "type": "http.response.start",
                "status": 500,
                "headers": [
                    (b"content-type", b"application/json"),
                    (b"content-length", str(len(body)).encode()),
                ],
            }
        )
        await send({"type": "http.response.body", "body": body})


def _route_label(scope: Scope) -> str:
    # The route template (not the raw path) keeps the label set small whatever callers send.
    route: Any = scope.get("route")
    path = getattr(route, "path", None)
    return str(path) if path else "unmatched"
