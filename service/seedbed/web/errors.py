"""The one error shape every failure leaves the service in, and the handlers that produce it.

    {"error": {"status": 422, "code": "...", "field": "...", "message": "...",
               "problems": [{"field": "...", "code": "...", "message": "..."}]}}

`code`, `field` and `message` repeat the first problem so a caller that only wants one line can
read them directly; `problems` lists everything wrong with the request at once.
"""

from __future__ import annotations

import logging
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import JSONResponse
from pydantic import BaseModel, Field
from starlette.exceptions import HTTPException as StarletteHTTPException

from seedbed.core.request.problems import RequestRejected, describe_input
from seedbed.core.request.suggest import did_you_mean

log = logging.getLogger("seedbed.errors")


@dataclass(frozen=True)
class Fault:
    """One thing wrong with a request (mirrors the core's Problem, for web-only checks)."""

    field: str
    code: str
    message: str


class ApiError(Exception):
    """Raised anywhere in the web layer to answer with an error in the common shape."""

    def __init__(
        self,
        status: int,
        faults: Sequence[Fault],
        headers: Mapping[str, str] | None = None,
    ) -> None:
        if not faults:
            raise ValueError("an ApiError needs at least one fault")
        super().__init__(faults[0].message)
        self.status = status
        self.faults = list(faults)
        self.headers = dict(headers or {})

    @classmethod
    def one(
        cls,
        status: int,
        field: str,
        code: str,
        message: str,
        headers: Mapping[str, str] | None = None,
    ) -> ApiError:
        return cls(status, [Fault(field, code, message)], headers)


def error_body(status: int, faults: Iterable[Fault]) -> dict[str, Any]:
    items = list(faults)
    first = items[0]
    message = first.message
    if len(items) > 1:
        message += f" (and {len(items) - 1} more problem{'s' if len(items) > 2 else ''})"
    return {
        "error": {
            "status": status,
            "code": first.code,
            "field": first.field,
            "message": message,
            "problems": [{"field": f.field, "code": f.code, "message": f.message} for f in items],
        }
    }


def error_response(
    status: int, faults: Iterable[Fault], headers: Mapping[str, str] | None = None
) -> JSONResponse:
    return JSONResponse(error_body(status, faults), status_code=status, headers=dict(headers or {}))


def from_rejection(exc: RequestRejected) -> ApiError:
    faults = [Fault(p.field, p.code, p.message) for p in exc.problems]
    if not faults:  # the core promises problems; never answer with an empty list regardless
        faults = [Fault("(body)", "invalid_request", str(exc) or "the request was refused")]
    return ApiError(413 if exc.too_large else 422, faults)


# --- documentation models: what the OpenAPI document says an error looks like --------------


class ProblemDoc(BaseModel):
    field: str = Field(
        description="Where the problem is: a body path like layers[2].kernel, "
        "a query parameter name, a header name, or (body), (path), (method) for the whole."
    )
    code: str = Field(description="Machine-readable reason, e.g. too_large, invalid_value.")
    message: str = Field(description="What is wrong and what is allowed.")


class ErrorDetailDoc(ProblemDoc):
    status: int = Field(description="The HTTP status code, repeated.")
    problems: list[ProblemDoc] = Field(description="Every problem found (at least one).")


class ErrorDoc(BaseModel):
    error: ErrorDetailDoc


def _validation_faults(exc: RequestValidationError) -> list[Fault]:
    faults: list[Fault] = []
    for err in exc.errors():
        loc = [str(p) for p in err.get("loc", ()) if p not in ("query", "path", "header", "body")]
        where = ".".join(loc) or "(request)"
        kind = str(err.get("type", ""))
        code = {
            "missing": "missing_field",
            "literal_error": "not_allowed",
            "enum": "not_allowed",
        }.get(kind, "invalid_value")
        faults.append(Fault(where, code, _in_our_words(where, kind, err)))
    return faults or [Fault("(request)", "invalid_value", "the request is not valid")]


# The choices in a validation error's `expected` context ("'a', 'b' or 'c'").
_QUOTED = re.compile(r"'([^']*)'")


def _in_our_words(where: str, kind: str, err: Mapping[str, Any]) -> str:
    """A query, path or header problem told the way the core tells body problems: what was
    sent, what is allowed, and the likely intended value; never the library's wording."""
    ctx = err.get("ctx") or {}
    value = err.get("input")
    got = describe_input(value)
    if kind in ("literal_error", "enum"):
        allowed = _QUOTED.findall(str(ctx.get("expected", "")))
        return (
            f"{where}: got {got}; allowed values: {', '.join(allowed)}"
            f"{did_you_mean(value, allowed)}"
        )
    if kind == "missing":
        return f"{where} is required"
    for key, phrase in (
        ("ge", "at least"),
        ("gt", "greater than"),
        ("le", "at most"),
        ("lt", "less than"),
    ):
        if key in ctx:
            return f"{where}: got {got}; allowed: a number {phrase} {ctx[key]}"
    if kind in ("int_parsing", "int_type"):
        return f"{where}: got {got}; allowed: an integer"
    if kind in ("string_too_long", "too_long") and "max_length" in ctx:
        return f"{where}: got {got}; allowed: at most {ctx['max_length']} characters"
    return f"{where}: got {got}; see the parameter's description in openapi/openapi.json"


_STATUS_CODES = {
    404: ("(path)", "not_found"),
    405: ("(method)", "method_not_allowed"),
}


def _allowed_methods(request: Request) -> list[str]:
    # GET and HEAD are separate routes (distinct operation ids), so Starlette's own Allow
    # header names only one of them; the app factory records every method per path.
    table: Mapping[str, Iterable[str]] = getattr(request.app.state, "methods_by_path", {})
    return sorted(table.get(request.scope.get("path", ""), ()))


def install_error_handlers(app: FastAPI) -> None:
    """Route every failure FastAPI or Starlette would answer themselves through our shape."""

    async def on_api_error(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, ApiError)
        return error_response(exc.status, exc.faults, exc.headers)

    async def on_rejected(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, RequestRejected)
        api = from_rejection(exc)
        return error_response(api.status, api.faults)

    async def on_validation(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, RequestValidationError)
        return error_response(422, _validation_faults(exc))

    async def on_http(request: Request, exc: Exception) -> JSONResponse:
        assert isinstance(exc, StarletteHTTPException)
        field, code = _STATUS_CODES.get(exc.status_code, ("(request)", "http_error"))
        if exc.status_code == 404:
            message = f"no such endpoint: {request.url.path}; see /docs or openapi/openapi.json"
        elif exc.status_code == 405:
            allowed = _allowed_methods(request)
            headers = {**(exc.headers or {}), "Allow": ", ".join(allowed)}
            message = (
                f"{request.method} is not allowed on {request.url.path}; "
                f"allowed: {', '.join(allowed)}"
            )
            return error_response(405, [Fault(field, code, message)], headers)
        else:
            message = str(exc.detail)
        return error_response(exc.status_code, [Fault(field, code, message)], exc.headers)

    app.add_exception_handler(ApiError, on_api_error)
    app.add_exception_handler(RequestRejected, on_rejected)
    app.add_exception_handler(RequestValidationError, on_validation)
    app.add_exception_handler(StarletteHTTPException, on_http)
