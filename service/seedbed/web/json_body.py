"""Reading a JSON request body safely: bounded size, strict JSON, one clear error per failure."""

from __future__ import annotations

import json
from typing import Any, NoReturn

from starlette.requests import Request

from seedbed.web.errors import ApiError

JSON_MEDIA_TYPES = ("application/json",)


def _refuse_constant(token: str) -> NoReturn:
    # Python's json module accepts NaN, Infinity and -Infinity by default; JSON does not.
    raise ApiError.one(
        400,
        "(body)",
        "non_finite_number",
        f"the body contains {token}, which is not JSON; numbers must be finite",
    )


def _no_duplicate_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            # A repeated key is silently "last one wins" in most parsers: ambiguous, so refused.
            raise ApiError.one(
                400, "(body)", "duplicate_key", f"the key {key!r} appears twice in one JSON object"
            )
        out[key] = value
    return out


def _check_content_type(request: Request) -> None:
    raw = request.headers.get("content-type")
    media = (raw or "").split(";", 1)[0].strip().lower()
    if media not in JSON_MEDIA_TYPES:
        shown = repr(raw) if raw is not None else "missing"
        raise ApiError.one(
            415,
            "content-type",
            "unsupported_media_type",
            f"Content-Type is {shown}; send the request as application/json",
        )


def _too_large(limit: int, seen: str) -> ApiError:
    return ApiError.one(
        413,
        "(body)",
        "body_too_large",
        f"the request body is {seen} bytes; at most {limit} bytes are accepted "
        "(SEEDBED_MAX_BODY_BYTES)",
    )


def declared_length(request: Request) -> int | None:
    """The body's declared Content-Length (None when chunked); 400 when it is not a number.
    Every upload route checks it against its limit before reading a byte."""
    declared = request.headers.get("content-length")
    if declared is None:
        return None
    if not declared.strip().isdigit():
        raise ApiError.one(
            400, "content-length", "invalid_value", f"Content-Length {declared!r} is not a number"
        )
    return int(declared)


async def read_json_body(request: Request, max_bytes: int) -> Any:
    """Parse the body as strict JSON, refusing it before reading when it is declared too big."""
    _check_content_type(request)
    declared = declared_length(request)
    if declared is not None and declared > max_bytes:
        raise _too_large(max_bytes, str(declared))
    parts: list[bytes] = []
    total = 0
    async for chunk in request.stream():
        total += len(chunk)
        if total > max_bytes:
            # A chunked upload has no length up front: stop reading at the limit.
            raise _too_large(max_bytes, f"more than {max_bytes}")
        parts.append(chunk)
    raw = b"".join(parts)
    if not raw.strip():
        raise ApiError.one(400, "(body)", "invalid_json", "the body is empty; send a JSON object")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        raise ApiError.one(
            400, "(body)", "invalid_json", f"the body is not UTF-8 text (byte {exc.start})"
        ) from None
    try:
        return json.loads(
            text, parse_constant=_refuse_constant, object_pairs_hook=_no_duplicate_keys
        )
    except json.JSONDecodeError as exc:
        raise ApiError.one(
            400,
            "(body)",
            "invalid_json",
            f"the body is not valid JSON: {exc.msg} at line {exc.lineno} column {exc.colno}",
        ) from None
    except RecursionError:
        raise ApiError.one(
            400, "(body)", "invalid_json", "the body's JSON is nested too deeply"
        ) from None
    except ValueError as exc:  # e.g. an integer literal with more digits than Python converts
        raise ApiError.one(
            400, "(body)", "invalid_json", f"the body is not usable JSON: {exc}"
        ) from None
