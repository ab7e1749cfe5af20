"""POST /v1/weights: the values, streamed in the chosen container with a manifest."""

from __future__ import annotations

from typing import Literal

from fastapi import APIRouter, Query, Request, Response

from seedbed.web.dependencies import load_plan
from seedbed.web.openapi_doc import error_responses, request_body
from seedbed.web.response_models import WeightsDocument
from seedbed.web.weights_response import WeightsOptions, select, weights_response

router = APIRouter(tags=["weights"])

WeightsFormat = Literal["json", "npz", "safetensors"]
# One default for the service, the client, the command line and the adapters (docs/formats.md).
DEFAULT_FORMAT = "npz"

_MEDIA_DOC = {
    "application/json": {"schema": {"$ref": "#/components/schemas/WeightsDocument"}},
    "application/zip": {"schema": {"type": "string", "format": "binary"}},
    "application/octet-stream": {"schema": {"type": "string", "format": "binary"}},
}


@router.post(
    "/v1/weights",
    operation_id="generateWeights",
    summary="Generate the weights of a network",
    description=(
        "Streams every tensor (or one block of one tensor) in the chosen format together with a "
        "manifest: per tensor the plan entry plus `sha256` of its raw little-endian C-order "
        "bytes, and response-wide `algorithm` and `numpy`. Content-Length is set up front. "
        "The strong ETag depends only on what the bytes depend on; If-None-Match with it "
        "answers 304 without generating anything."
    ),
    response_class=Response,
    responses={
        200: {"model": WeightsDocument, "description": "The weights.", "content": _MEDIA_DOC},
        304: {"description": "Unchanged: the caller's ETag matches."},
        **error_responses(400, 413, 415, 422),
    },
    openapi_extra=request_body("The network whose weights to generate."),
)
async def generate_weights(
    request: Request,
    format: WeightsFormat = Query(  # noqa: B008 - FastAPI's parameter declaration style
        DEFAULT_FORMAT,
        description="Container: npz (the default: zip of .npy members plus a manifest "
        "member), safetensors (manifest in the header metadata) or json (base64 in `data`). "
        "docs/formats.md says why npz is the default everywhere.",
    ),
    tensor: str | None = Query(None, description="Serve only this tensor (a name from the plan)."),
    rows: str | None = Query(
        None,
        description="START:STOP rows of the served first axis of `tensor`; the block equals "
        "that slice of the full tensor byte for byte.",
        examples=["0:128"],
    ),
) -> Response:
    plan = await load_plan(request)
    options = WeightsOptions(format, select(plan, tensor, rows), selectable=True)
    return await weights_response(request, plan, options)
