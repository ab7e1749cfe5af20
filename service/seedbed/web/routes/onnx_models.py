"""POST /v1/onnx/plan, /v1/onnx/weights and /v1/onnx/model: send an ONNX model, get weights
for it.

The model arrives as the raw body (application/octet-stream) or as the `model` part of a
multipart form. It is bounded before it is read: a declared Content-Length over
SEEDBED_MAX_ONNX_BYTES is refused at once, and a chunked body as soon as it passes the limit
(413). It is parsed with the `onnx` package and never executed (seedbed.onnx_import).
"""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from typing import Any, Literal

from fastapi import APIRouter, Query, Request, Response
from fastapi.responses import JSONResponse
from pydantic import BaseModel, Field
from starlette.concurrency import run_in_threadpool

from seedbed.core.request.problems import RequestRejected
from seedbed.formats import FormatInputError, OutgoingTensor
from seedbed.formats.multipart_in import FormError, FormPartsParser, PartInfo, boundary_of
from seedbed.onnx_import import ModelRefused
from seedbed.onnx_import.assembly import binding_bytes
from seedbed.onnx_import.pipeline import ImportedModel, import_model
from seedbed.onnx_import.rewrite import seeded_model
from seedbed.web.dependencies import settings_of
from seedbed.web.errors import ApiError, Fault
from seedbed.web.json_body import declared_length
from seedbed.web.openapi_doc import error_responses
from seedbed.web.weights_response import Rearranged, WeightsOptions, weights_response

router = APIRouter(tags=["onnx"])

MAX_ONNX_ENV = "SEEDBED_MAX_ONNX_BYTES"
RAW_MEDIA_TYPES = ("application/octet-stream",)
MULTIPART = "multipart/form-data"
MODEL_PART = "model"
# Room for multipart framing (boundary lines and part headers) on top of the model.
FRAMING_ALLOWANCE = 64 << 10
# The prefix of problems found in the inferred request, so the caller can tell them from
# problems of what they sent.
INFERRED = "inferred_request"

WeightsFormat = Literal["json", "npz", "safetensors"]

_SEED_QUERY = Query(
    ...,
    min_length=1,
    max_length=128,
    description="The seed: an integer 0..2**63-1 written in digits, or any other string of 1 to "
    "128 characters (hashed), exactly as in a request body's `seed`.",
    examples=["20261201"],
)
_KEEP_QUERY = Query(
    default_factory=list,
    description="Names of initializers to leave exactly as they are (repeat the parameter). "
    "A float initializer read by an operator seedbed does not fill is refused unless named "
    "here.",
    examples=[["attention_mask"]],
)


_ACTIVATION_QUERY = Query(
    default_factory=list,
    description="Replace the activation read for a layer: LAYER=NAME or LAYER=NAME:PARAM "
    "(repeat the parameter), e.g. mlp.fc=gelu or probe=leaky_relu:0.1. The layer names are the "
    "review's; the inference table then says `caller override`.",
    examples=[["mlp.fc=gelu"]],
)


def _activation_overrides(items: list[str]) -> dict[str, tuple[str, float | None]]:
    out: dict[str, tuple[str, float | None]] = {}
    for item in items:
        layer, sep, rest = item.partition("=")
        name, colon, param = rest.partition(":")
        value: float | None = None
        try:
            value = float(param) if colon else None
        except ValueError:
            sep = ""
        if not sep or not layer or not name or (value is not None and value != value):
            raise ApiError.one(
                422,
                "activation",
                "invalid_value",
                f"activation {item[:80]!r} is not LAYER=NAME or "
                "LAYER=NAME:PARAM (e.g. probe=leaky_relu:0.1)",
            )
        if layer in out:
            raise ApiError.one(
                422, "activation", "duplicate_name", f"activation names layer {layer!r} twice"
            )
        out[layer] = (name, value)
    return out


def _too_large(seen: str, limit: int) -> ApiError:
    return ApiError.one(
        413,
        "(body)",
        "body_too_large",
        f"the upload is {seen} bytes; at most {limit} bytes are accepted "
        f"({MAX_ONNX_ENV} for the model)",
    )


class _Buffer:
    def __init__(self, limit: int) -> None:
        self.parts: list[bytes] = []
        self.size = 0
        self.limit = limit

    def write(self, data: bytes) -> None:
        self.size += len(data)
        if self.size > self.limit:
            raise _too_large(f"more than {self.limit}", self.limit)
        self.parts.append(data)


async def read_model(request: Request) -> bytes:
    """The uploaded model's bytes, refused (413) before reading when declared too large and
    while reading when a chunked body passes the limit."""
    limit = settings_of(request).max_onnx_bytes
    raw_type = request.headers.get("content-type")
    media = (raw_type or "").split(";", 1)[0].strip().lower()
    if media not in (*RAW_MEDIA_TYPES, MULTIPART):
        shown = repr(raw_type) if raw_type is not None else "missing"
        raise ApiError.one(
            415,
            "content-type",
            "unsupported_media_type",
            f"Content-Type is {shown}; send the ONNX file as "
            f"application/octet-stream, or as the `{MODEL_PART}` part of "
            f"{MULTIPART}",
        )
    whole = limit if media != MULTIPART else limit + FRAMING_ALLOWANCE
    declared = declared_length(request)
    if declared is not None and declared > whole:
        raise _too_large(str(declared), whole)
    if media != MULTIPART:
        buffer = _Buffer(limit)
        async for chunk in request.stream():
            buffer.write(chunk)  # stops at the limit: a chunked body has no length up front
        return b"".join(buffer.parts)
    try:
        boundary = boundary_of(raw_type or "")
    except FormError as exc:
        raise ApiError.one(400, "content-type", "invalid_multipart", str(exc)) from None
    model: _Buffer | None = None

    def open_part(info: PartInfo) -> _Buffer:
        nonlocal model
        if info.name != MODEL_PART:
            raise ApiError.one(
                422,
                "(body)",
                "unknown_part",
                f"the form has a part named {info.name[:60]!r}; the only part "
                f"is {MODEL_PART} (the ONNX file)",
            )
        if model is not None:
            raise ApiError.one(422, MODEL_PART, "duplicate_part", "send one model part only")
        model = _Buffer(limit)
        return model

    parser = FormPartsParser(boundary, open_part)
    seen = 0
    try:
        async for chunk in request.stream():
            seen += len(chunk)
            if seen > whole:
                raise _too_large(f"more than {whole}", whole)
            parser.feed(chunk)
        parser.finish()
    except FormError as exc:
        raise ApiError.one(400, "(body)", "invalid_multipart", str(exc)) from None
    if model is None:
        raise ApiError.one(
            422,
            MODEL_PART,
            "missing_field",
            f"the form has no `{MODEL_PART}` part; send the ONNX file in it",
        )
    return b"".join(model.parts)


def _seed_value(text: str) -> int | str:
    # Digits are an integer seed, as a JSON number would be; anything else is a string seed.
    if text.isascii() and text.isdigit() and len(text) <= 19:
        return int(text)
    return text


async def _imported(
    request: Request, seed: str, keep: list[str], activation: list[str]
) -> ImportedModel:
    overrides = _activation_overrides(activation)
    data = await read_model(request)
    settings = settings_of(request)
    try:
        imported: ImportedModel = await run_in_threadpool(
            import_model,
            data,
            settings.max_onnx_bytes,
            _seed_value(seed),
            keep,
            settings.limits,
            overrides,
        )
    except ModelRefused as exc:
        field = exc.field if exc.field != "keep" else "keep"
        raise ApiError(exc.status, [Fault(field, exc.code, exc.message)]) from None
    except RequestRejected as exc:
        faults = [Fault(_inferred_field(p.field), p.code, p.message) for p in exc.problems]
        if not faults:
            faults = [Fault(INFERRED, "invalid_request", str(exc) or "refused")]
        raise ApiError(413 if exc.too_large else 422, faults) from None
    return imported


def _inferred_field(field: str) -> str:
    if field == "seed":
        return "seed"  # the caller's own query parameter
    return INFERRED if field == "(body)" else f"{INFERRED}.{field}"


# --- documentation models -------------------------------------------------------------------


class InferenceRowDoc(BaseModel):
    layer: str | list[str] = Field(
        description="The seedbed layer (a list: one per direction "
        "of a bidirectional recurrent node)."
    )
    node: str = Field(description="The graph node it was read from.")
    kind: str
    activation: str | None
    activation_param: float | None
    activation_from: str = Field(
        description="Where the activation was read from: a node, "
        "the Erf GELU pattern, the cell itself, or nothing."
    )
    role: str
    branch: str | None
    initializers: list[str]


class BindingDoc(BaseModel):
    initializer: str
    shape: list[int]
    conversion: str = Field(
        description="same | transposed | transposed_conv | "
        "recurrent_weights | recurrent_bias | constant (docs/onnx.md)."
    )
    sources: list[str] = Field(description="The seedbed tensors it is made of, in order.")
    gate_order: list[str] | None = None
    groups: int | None = None
    value: float | None = None
    note: str | None = None


class OnnxReviewDoc(BaseModel):
    notice: str
    opset: int
    request: dict[str, Any] = Field(
        description="The inferred seedbed request (POST it to "
        "/v1/weights for the same values in seedbed's names)."
    )
    inference: list[InferenceRowDoc]
    initializers: list[BindingDoc]
    kept: list[str]
    constants: list[str]
    notes: list[str]
    plan: dict[str, Any] = Field(
        description="The plan of the inferred request, as POST /v1/plan answers it."
    )


class OnnxTensorDoc(BindingDoc):
    tensor: str = Field(description="The initializer's name.")
    dtype: str
    sha256: str = Field(description="Of the raw little-endian C-order bytes.")
    data: str | None = Field(None, description="json format: the bytes in base64.")
    planned: list[dict[str, Any]] = Field(description="The plan entries of `sources`.")


class OnnxWeightsDoc(BaseModel):
    algorithm: str
    numpy: str
    seed: int | str
    dtype: str
    layout: str
    warnings: list[str]
    onnx: dict[str, Any] = Field(
        description="The inferred request, kept initializers and formula constants."
    )
    tensors: list[OnnxTensorDoc]


_BINARY = {"schema": {"type": "string", "format": "binary"}}
_UPLOAD = {
    "requestBody": {
        "required": True,
        "description": "The ONNX model file, as the raw body or as the `model` part of a form. "
        f"At most {MAX_ONNX_ENV} bytes (default 128 MiB); weights in external "
        "data files are not needed (only their shapes are read).",
        "content": {
            "application/octet-stream": _BINARY,
            MULTIPART: {
                "schema": {
                    "type": "object",
                    "required": [MODEL_PART],
                    "properties": {
                        MODEL_PART: {
                            "type": "string",
                            "format": "binary",
                            "description": "The ONNX model file.",
                        }
                    },
                },
                "examples": {
                    "orchard_counter": {
                        "summary": "An exported fruit-counting CNN (any .onnx file)",
                        "value": {MODEL_PART: "(binary ONNX file: orchard_counter.onnx)"},
                    }
                },
            },
        },
    }
}
_ERRORS = error_responses(
    400,
    413,
    415,
    422,
    s413="Too large: the upload (SEEDBED_MAX_ONNX_BYTES), the inferred request's element "
    "counts, or a JSON response.",
    s415="Content-Type is not application/octet-stream or multipart/form-data.",
    s422="The file is not a readable ONNX model (code not_onnx, cyclic_graph, undefined_input "
    "...), holds weights seedbed does not fill (unsupported_weights), or the inferred "
    "request is refused (fields under inferred_request).",
)


@router.post(
    "/v1/onnx/plan",
    operation_id="reviewOnnxModel",
    summary="Read an ONNX model: the inferred request, how each initializer is filled, the plan",
    description="Nothing is generated. Check `inference` (each layer's activation and where it "
    "was read from) before using the weights.",
    response_class=JSONResponse,
    responses={200: {"model": OnnxReviewDoc, "description": "The review."}, **_ERRORS},
    openapi_extra=_UPLOAD,
)
async def review_onnx(
    request: Request,
    seed: str = _SEED_QUERY,
    keep: list[str] = _KEEP_QUERY,
    activation: list[str] = _ACTIVATION_QUERY,
) -> JSONResponse:
    imported = await _imported(request, seed, keep, activation)
    return JSONResponse(imported.review())


def _outgoing(imported: ImportedModel, chunk_bytes: int = 4 << 20) -> list[OutgoingTensor]:
    plan = imported.plan
    out = []
    for binding in imported.translation.bindings:
        entry = binding.document()
        entry["tensor"] = binding.initializer
        entry["dtype"] = plan.dtype
        entry["planned"] = [plan.tensor(s).manifest() for s in binding.sources]
        nbytes = 1
        for d in binding.shape:
            nbytes *= d
        nbytes *= plan.tensors[0].itemsize

        def chunks(b: Any = binding) -> Iterator[bytes]:
            return binding_bytes(plan, b, chunk_bytes)

        out.append(
            OutgoingTensor(
                name=binding.initializer,
                dtype=plan.dtype,
                shape=binding.shape,
                nbytes=nbytes,
                entry=entry,
                chunks=chunks,
            )
        )
    return out


@router.post(
    "/v1/onnx/weights",
    operation_id="generateOnnxWeights",
    summary="Weights for an ONNX model, keyed by its initializer names, in its layouts",
    description="The values of POST /v1/weights for the inferred request, rearranged into each "
    "initializer's layout (docs/onnx.md lists the conversions); each manifest entry "
    "names its conversion and the plan entries of its sources.",
    response_class=Response,
    responses={
        200: {
            "model": OnnxWeightsDoc,
            "description": "The weights.",
            "content": {
                "application/json": {"schema": {"$ref": "#/components/schemas/OnnxWeightsDoc"}},
                "application/zip": _BINARY,
                "application/octet-stream": _BINARY,
            },
        },
        **_ERRORS,
    },
    openapi_extra=_UPLOAD,
)
async def onnx_weights(
    request: Request,
    seed: str = _SEED_QUERY,
    keep: list[str] = _KEEP_QUERY,
    activation: list[str] = _ACTIVATION_QUERY,
    format: WeightsFormat = Query(  # noqa: B008 - FastAPI's parameter declaration style
        "json", description="Container: json, npz or safetensors, as for POST /v1/weights."
    ),
) -> Response:
    imported = await _imported(request, seed, keep, activation)
    try:
        _outgoing(imported)  # initializer names a container cannot hold are refused here
    except FormatInputError as exc:
        raise ApiError.one(
            422,
            "(body)",
            "unservable_name",
            f"{exc}; ask for POST /v1/onnx/model, which keeps any name",
        ) from None
    translation = imported.translation
    rearranged = Rearranged(
        tensors=lambda: _outgoing(imported, settings_of(request).chunk_bytes),
        document={
            "onnx": {
                "request": translation.request,
                "kept": list(translation.kept),
                "constants": list(translation.constants),
            }
        },
        etag_parts={"onnx_bindings": [b.document() for b in translation.bindings]},
    )
    options = WeightsOptions(format=format, filename="weights", rearranged=rearranged)
    return await weights_response(request, imported.plan, options)


@router.post(
    "/v1/onnx/model",
    operation_id="seedOnnxModel",
    summary="The same ONNX model with its initializers replaced by the seeded values",
    description="Nodes, names and kept initializers are unchanged; filled initializers are "
    "written inline (also those that were external). The model's metadata gains "
    "seedbed.algorithm and seedbed.seed.",
    response_class=Response,
    responses={
        200: {
            "description": "The seeded ONNX model.",
            "content": {"application/octet-stream": _BINARY},
        },
        **_ERRORS,
    },
    openapi_extra=_UPLOAD,
)
async def onnx_model(
    request: Request,
    seed: str = _SEED_QUERY,
    keep: list[str] = _KEEP_QUERY,
    activation: list[str] = _ACTIVATION_QUERY,
) -> Response:
    imported = await _imported(request, seed, keep, activation)
    try:
        body: bytes = await run_in_threadpool(
            seeded_model, imported.loaded.model, imported.plan, imported.translation.bindings
        )
    except ModelRefused as exc:
        raise ApiError.one(exc.status, exc.field, exc.code, exc.message) from None
    plan = imported.plan
    tag = '"' + hashlib.sha256(body).hexdigest() + '"'
    if any(t.reproducible != "exact" for t in plan.tensors):
        tag = "W/" + tag
    return Response(
        body,
        media_type="application/octet-stream",
        headers={
            "ETag": tag,
            "X-Seedbed-Algorithm": plan.algorithm,
            "Content-Disposition": 'attachment; filename="seeded.onnx"',
        },
    )
