"""POST /v1/audit: upload existing weights (NPZ or safetensors), get a report on them.

Two ways to send the file:
- raw body, Content-Type application/octet-stream or application/zip: the file alone;
- multipart/form-data: a `file` part with the file and an optional `request` part with the
  JSON request describing the network (as for /v1/weights), to compare against its plan.

The upload is bounded before it is read: a declared Content-Length over the limit is refused at
once, and a chunked body is refused as soon as it passes the limit (413 with the numbers). It
is spooled to memory, then to a temporary file above `SPOOL_IN_MEMORY`, and analysed off the
event loop. The limit comes from SEEDBED_MAX_AUDIT_BYTES (see `audit_limits_from_env`).
"""

from __future__ import annotations

import json
import tempfile
from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import IO, Any, NoReturn

from fastapi import APIRouter, Request
from fastapi.responses import JSONResponse
from pydantic import BaseModel, Field
from starlette.concurrency import run_in_threadpool

from seedbed.core.audit import AuditLimits, UploadRefused
from seedbed.core.plan import build_plan
from seedbed.core.plan_types import Plan
from seedbed.core.request.problems import RequestRejected
from seedbed.formats.multipart_in import FormError, FormPartsParser, PartInfo, boundary_of
from seedbed.formats.upload_in import audit_upload
from seedbed.settings import Settings
from seedbed.web.dependencies import audit_limits_of, settings_of
from seedbed.web.errors import ApiError, Fault
from seedbed.web.json_body import declared_length
from seedbed.web.openapi_doc import EXAMPLES, REQUEST_SCHEMA_NAME, error_responses

router = APIRouter(tags=["audit"])

MAX_AUDIT_ENV = "SEEDBED_MAX_AUDIT_BYTES"
RAW_MEDIA_TYPES = ("application/octet-stream", "application/zip")
MULTIPART = "multipart/form-data"
# Uploads up to this size stay in memory; larger ones go to a temporary file as they arrive.
SPOOL_IN_MEMORY = 8 << 20
# Room for multipart framing (boundaries and part headers) on top of the file and request.
FRAMING_ALLOWANCE = 64 << 10
FILE_PART, REQUEST_PART = "file", "request"


def audit_limits_from_env(environ: Mapping[str, str] | None = None) -> AuditLimits:
    """AuditLimits with max_upload_bytes from SEEDBED_MAX_AUDIT_BYTES (default 256 MiB), read
    by the service settings like every other variable."""
    return AuditLimits(max_upload_bytes=Settings.from_env(environ).max_audit_bytes)


def _too_large(field: str, seen: str, limit: int, what: str) -> ApiError:
    return ApiError.one(
        413,
        field,
        "body_too_large",
        f"the {what} is {seen} bytes; at most {limit} bytes are accepted "
        f"({MAX_AUDIT_ENV} for the file)",
    )


class _CappedSpool:
    """A spooled file that refuses to grow past its limit."""

    def __init__(self, limit: int, field: str) -> None:
        self.file: IO[bytes] = tempfile.SpooledTemporaryFile(max_size=SPOOL_IN_MEMORY)  # noqa: SIM115
        self.size = 0
        self.limit = limit
        self.field = field

    def write(self, data: bytes) -> None:
        self.size += len(data)
        if self.size > self.limit:
            raise _too_large(self.field, f"more than {self.limit}", self.limit, "file")
        self.file.write(data)


class _CappedBuffer:
    def __init__(self, limit: int) -> None:
        self.parts: list[bytes] = []
        self.size = 0
        self.limit = limit

    def write(self, data: bytes) -> None:
        self.size += len(data)
        if self.size > self.limit:
            raise ApiError.one(
                413,
                REQUEST_PART,
                "body_too_large",
                f"the request part is more than {self.limit} bytes; at most "
                f"{self.limit} are accepted (SEEDBED_MAX_BODY_BYTES)",
            )
        self.parts.append(data)


async def _read_raw(request: Request, limits: AuditLimits) -> _CappedSpool:
    limit = limits.max_upload_bytes
    declared = declared_length(request)
    if declared is not None and declared > limit:
        raise _too_large("(body)", str(declared), limit, "upload")
    spool = _CappedSpool(limit, "(body)")
    try:
        async for chunk in request.stream():
            spool.write(chunk)  # stops reading at the limit: a chunked body has no length
    except BaseException:
        spool.file.close()
        raise
    return spool


class _FormReader:
    def __init__(self, limits: AuditLimits, request_limit: int) -> None:
        self.limits = limits
        self.request_limit = request_limit
        self.spool: _CappedSpool | None = None
        self.request_part: _CappedBuffer | None = None

    def open_part(self, info: PartInfo) -> _CappedSpool | _CappedBuffer:
        if info.name == FILE_PART:
            if self.spool is not None:
                raise ApiError.one(422, FILE_PART, "duplicate_part", "send one `file` part only")
            self.spool = _CappedSpool(self.limits.max_upload_bytes, FILE_PART)
            return self.spool
        if info.name == REQUEST_PART:
            if self.request_part is not None:
                raise ApiError.one(
                    422, REQUEST_PART, "duplicate_part", "send one `request` part only"
                )
            self.request_part = _CappedBuffer(self.request_limit)
            return self.request_part
        raise ApiError.one(
            422,
            "(body)",
            "unknown_part",
            f"the form has a part named {info.name[:60]!r}; allowed: "
            f"{FILE_PART} (the NPZ or safetensors file) and {REQUEST_PART} "
            "(optional JSON describing the network)",
        )

    def close(self) -> None:
        if self.spool is not None:
            self.spool.file.close()


async def _read_form(
    request: Request, limits: AuditLimits, request_limit: int
) -> tuple[_CappedSpool, bytes | None]:
    whole = limits.max_upload_bytes + request_limit + FRAMING_ALLOWANCE
    declared = declared_length(request)
    if declared is not None and declared > whole:
        raise _too_large("(body)", str(declared), whole, "upload")
    try:
        boundary = boundary_of(request.headers.get("content-type", ""))
    except FormError as exc:
        raise ApiError.one(400, "content-type", "invalid_multipart", str(exc)) from None
    reader = _FormReader(limits, request_limit)
    parser = FormPartsParser(boundary, reader.open_part)
    seen = 0
    try:
        async for chunk in request.stream():
            seen += len(chunk)
            if seen > whole:
                raise _too_large("(body)", f"more than {whole}", whole, "upload")
            parser.feed(chunk)
        parser.finish()
    except FormError as exc:
        reader.close()
        raise ApiError.one(400, "(body)", "invalid_multipart", str(exc)) from None
    except BaseException:
        reader.close()
        raise
    if reader.spool is None:
        raise ApiError.one(
            422,
            FILE_PART,
            "missing_field",
            "the form has no `file` part; send the NPZ or safetensors file in a part named file",
        )
    raw_request = b"".join(reader.request_part.parts) if reader.request_part else None
    return reader.spool, raw_request


def _refuse_json(message: str) -> NoReturn:
    raise ApiError.one(400, REQUEST_PART, "invalid_json", message)


def _unique_keys(pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    out: dict[str, Any] = {}
    for key, value in pairs:
        if key in out:
            _refuse_json(f"the request part names the key {key!r} twice in one object")
        out[key] = value
    return out


def _no_constant(token: str) -> NoReturn:
    _refuse_json(f"the request part contains {token}, which is not JSON; numbers must be finite")


def _parse_request_part(raw: bytes) -> Any:
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError as exc:
        _refuse_json(f"the request part is not UTF-8 text (byte {exc.start})")
    if not text.strip():
        _refuse_json("the request part is empty; send the JSON request or leave the part out")
    try:
        return json.loads(text, object_pairs_hook=_unique_keys, parse_constant=_no_constant)
    except json.JSONDecodeError as exc:
        _refuse_json(
            f"the request part is not valid JSON: {exc.msg} at line {exc.lineno} column {exc.colno}"
        )
    except (RecursionError, ValueError) as exc:
        _refuse_json(f"the request part is not usable JSON: {exc}")


async def _plan_of(raw: bytes, request: Request) -> Plan:
    data = _parse_request_part(raw)
    try:
        plan: Plan = await run_in_threadpool(build_plan, data, settings_of(request).limits)
    except RequestRejected as exc:
        faults = [
            Fault(
                f"{REQUEST_PART}.{p.field}" if p.field != "(body)" else REQUEST_PART,
                p.code,
                p.message,
            )
            for p in exc.problems
        ]
        raise ApiError(413 if exc.too_large else 422, faults) from None
    return plan


# --- documentation models: the report's shape in the OpenAPI document ------------------------


class FindingDoc(BaseModel):
    tensor: str | None = Field(description="The tensor concerned; null for the file as a whole.")
    severity: str = Field(description="error | warning | note.")
    code: str = Field(
        description="Machine-readable kind, e.g. twin_units, all_zero, "
        "non_finite, rank_deficient, scale_too_large, missing_tensor."
    )
    message: str = Field(description="What was found, with the numbers, and what it means.")


class SummaryDoc(BaseModel):
    verdict: str = Field(description="errors | warnings | ok: the worst severity found.")
    tensors: int
    values: int
    errors: int
    warnings: int
    notes: int
    compared_with_request: bool


class TensorReportDoc(BaseModel):
    tensor: str
    dtype: str
    shape: list[int]
    values: int
    bytes: int
    note: str | None = Field(description="How the values were read, or why they were not.")
    mean: float | None
    std: float | None = Field(description="Population std of the finite values.")
    min: float | None
    max: float | None
    nonfinite: dict[str, int] | None = Field(description="Counts of nan, posinf, neginf.")
    all_zero: bool | None
    all_constant: bool | None
    units: dict[str, Any] | None = Field(
        description="Which axis holds the units (first axis, or the output axis from the "
        "request), their count, values per unit and blocks (gates, groups)."
    )
    twins: dict[str, Any] | None = Field(
        description="group_count, units_in_groups and the first groups of identical units."
    )
    rank: dict[str, Any] | None = Field(
        description="Numerical rank, the full rank possible, the tolerance and whether a "
        "sample was decomposed."
    )
    planned: dict[str, Any] | None = Field(
        description="With a request: the plan's method, recommended_std, constant values, "
        "observed_rms and ratio = observed_rms / recommended_std."
    )


class AuditReportDoc(BaseModel):
    notice: str = Field(description="What this audit is and is not.")
    container: str = Field(description="npz | safetensors, recognised from the first bytes.")
    file_bytes: int
    summary: SummaryDoc
    findings: list[FindingDoc] = Field(description="Errors first, then warnings, then notes.")
    tensors: list[TensorReportDoc] = Field(description="One entry per tensor, in file order.")


_BINARY = {"schema": {"type": "string", "format": "binary"}}
_REQUEST_BODY = {
    "requestBody": {
        "required": True,
        "description": (
            "The weights file (NPZ or safetensors, recognised from its first bytes), either as "
            "the raw body, or as the `file` part of a multipart form whose optional `request` "
            "part holds the JSON request describing the network. Pickled NPZ members are "
            "refused, never loaded."
        ),
        "content": {
            "application/octet-stream": _BINARY,
            "application/zip": _BINARY,
            MULTIPART: {
                "schema": {
                    "type": "object",
                    "required": [FILE_PART],
                    "properties": {
                        FILE_PART: {
                            "type": "string",
                            "format": "binary",
                            "description": "The NPZ or safetensors file.",
                        },
                        REQUEST_PART: {"$ref": f"#/components/schemas/{REQUEST_SCHEMA_NAME}"},
                    },
                },
                "encoding": {REQUEST_PART: {"contentType": "application/json"}},
                "examples": {
                    name: {
                        "summary": ex["summary"],
                        "value": {REQUEST_PART: ex["value"], FILE_PART: "(binary file)"},
                    }
                    for name, ex in EXAMPLES.items()
                },
            },
        },
    }
}


@router.post(
    "/v1/audit",
    operation_id="auditWeights",
    summary="Audit existing weights: scale, twins, constant or non-finite values, rank",
    description=(
        "Reports per tensor: mean, std, non-finite counts, all-zero / all-constant, groups of "
        "twin units (identical incoming weights), and numerical rank; with a request, the "
        "scale against the recommended std and missing, extra or mis-shaped tensors. "
        "A check of a starting point, not of a trained model. Files over "
        f"{MAX_AUDIT_ENV} (default 256 MiB) are refused before they are read."
    ),
    response_class=JSONResponse,
    responses={
        200: {"model": AuditReportDoc, "description": "The audit report."},
        **error_responses(
            400,
            413,
            415,
            422,
            503,
            s503="Too many audits are running at once (code too_many_audits); "
            "the Retry-After header says when to try again.",
        ),
    },
    openapi_extra=_REQUEST_BODY,
)
async def audit_weights(request: Request) -> JSONResponse:
    with _audit_slot(request):
        return await _audit(request)


# Seconds a caller refused for want of a free audit slot is asked to wait: an audit of a file
# near the default limit takes a few seconds.
AUDIT_RETRY_AFTER_S = 2


@contextmanager
def _audit_slot(request: Request) -> Iterator[None]:
    """Hold one of the worker's audit slots, or refuse with 503 + Retry-After when none is free.

    The count lives on the app and changes only on the event loop, so no lock is needed.
    """
    state = request.app.state
    cap = settings_of(request).max_concurrent_audits
    running = getattr(state, "audits_running", 0)
    if running >= cap:
        raise ApiError.one(
            503,
            "(request)",
            "too_many_audits",
            f"{running} audits are running, the most this service runs at once (the "
            f"service's setting SEEDBED_MAX_CONCURRENT_AUDITS raises it); retry after "
            f"{AUDIT_RETRY_AFTER_S} seconds",
            headers={"Retry-After": str(AUDIT_RETRY_AFTER_S)},
        )
    state.audits_running = running + 1
    try:
        yield
    finally:
        state.audits_running -= 1


async def _audit(request: Request) -> JSONResponse:
    limits = audit_limits_of(request)
    raw_type = request.headers.get("content-type")
    media = (raw_type or "").split(";", 1)[0].strip().lower()
    raw_request: bytes | None = None
    if media in RAW_MEDIA_TYPES:
        spool, field = await _read_raw(request, limits), "(body)"
    elif media == MULTIPART:
        spool, raw_request = await _read_form(request, limits, settings_of(request).max_body_bytes)
        field = FILE_PART
    else:
        shown = repr(raw_type) if raw_type is not None else "missing"
        raise ApiError.one(
            415,
            "content-type",
            "unsupported_media_type",
            f"Content-Type is {shown}; send the file as application/octet-stream "
            f"or application/zip, or as the `file` part of {MULTIPART}",
        )
    try:
        plan = await _plan_of(raw_request, request) if raw_request is not None else None
        if media == "application/zip" and spool.size:
            spool.file.seek(0)
            if spool.file.read(2) != b"PK":
                raise ApiError.one(
                    422,
                    "(body)",
                    "not_a_zip",
                    "the body was sent as application/zip but is not a zip "
                    "archive; send safetensors as application/octet-stream",
                )
        try:
            report = await run_in_threadpool(audit_upload, spool.file, spool.size, limits, plan)
        except UploadRefused as exc:
            raise ApiError.one(
                413 if exc.too_large else 422, field, exc.code, exc.message
            ) from None
    finally:
        spool.file.close()
    return JSONResponse(report)
