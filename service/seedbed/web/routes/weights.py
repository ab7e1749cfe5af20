"""POST /v1/weights: the values, streamed in the chosen container with a manifest."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Literal

from fastapi import APIRouter, Query, Request, Response
from fastapi.responses import StreamingResponse
from starlette.concurrency import run_in_threadpool

from seedbed.core.plan_types import Plan
from seedbed.core.render import parse_rows
from seedbed.web.encoding import Selection, encode_weights, json_size_of
from seedbed.web.errors import ApiError
from seedbed.web.etag import none_match, strong_etag
from seedbed.web.metrics import ServiceMetrics
from seedbed.web.openapi_doc import error_responses, request_body
from seedbed.web.plan_loader import load_plan, settings_of
from seedbed.web.response_models import WeightsDocument

router = APIRouter(tags=["weights"])

WeightsFormat = Literal["json", "npz", "safetensors"]

_MEDIA_DOC = {
    "application/json": {"schema": {"$ref": "#/components/schemas/WeightsDocument"}},
    "application/zip": {"schema": {"type": "string", "format": "binary"}},
    "application/octet-stream": {"schema": {"type": "string", "format": "binary"}},
}


def _select(plan: Plan, tensor: str | None, rows: str | None) -> Selection | None:
    if tensor is None:
        if rows is not None:
            raise ApiError.one(
                422, "rows", "needs_tensor", "rows selects rows of one tensor; name it with tensor="
            )
        return None
    try:
        t = plan.tensor(tensor)
    except KeyError:
        names = [x.tensor for x in plan.tensors]
        shown = ", ".join(names[:8]) + (f" ... ({len(names)} in all)" if len(names) > 8 else "")
        raise ApiError.one(
            422,
            "tensor",
            "unknown_tensor",
            f"no tensor named {tensor!r} in this request; it has: {shown}",
        ) from None
    if rows is None:
        start, stop = 0, (t.shape[0] if t.shape else 1)
    else:
        start, stop = parse_rows(rows, t)
    return Selection(t, start, stop)


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
        "json",
        description="Container: json (base64 in `data`), npz (zip of .npy members plus a "
        "manifest member) or safetensors (manifest in the header metadata).",
    ),
    tensor: str | None = Query(
        None, description="Serve only this tensor (a name from the plan)."
    ),
    rows: str | None = Query(
        None,
        description="START:STOP rows of the served first axis of `tensor`; the block equals "
        "that slice of the full tensor byte for byte.",
        examples=["0:128"],
    ),
) -> Response:
    settings = settings_of(request)
    plan = await load_plan(request)
    selection = _select(plan, tensor, rows)
    etag = strong_etag(
        "weights",
        request=plan.canonical_request,
        algorithm=plan.algorithm,
        format=format,
        tensor=None if selection is None else selection.tensor.tensor,
        rows=None if selection is None else [selection.start, selection.stop],
    )
    served = plan.tensors if selection is None else (selection.tensor,)
    if any(t.reproducible != "exact" for t in served):
        # Orthogonal values may differ in the last bits between BLAS builds, so two replicas
        # can send different bytes under the same tag: only a weak validator is honest then.
        etag = "W/" + etag
    common = {"ETag": etag, "X-Seedbed-Algorithm": plan.algorithm}
    if none_match(request.headers.get("if-none-match"), etag):
        return Response(status_code=304, headers=common)
    if format == "json":
        # Serialising thousands of manifest entries to measure them is CPU work: off the loop.
        size = await run_in_threadpool(json_size_of, plan, selection)
        if size > settings.max_json_response_bytes:
            raise ApiError.one(
                413,
                "format",
                "json_too_large",
                f"this JSON response would be {size} bytes, above the limit of "
                f"{settings.max_json_response_bytes} (SEEDBED_MAX_JSON_RESPONSE_BYTES); "
                "ask for format=npz or format=safetensors, or select one tensor with tensor=",
            )
    # safetensors hashes every tensor before its first byte: that pass must not block the loop.
    encoded = await run_in_threadpool(
        encode_weights, plan, selection, format, settings.chunk_bytes,
        settings.threads_per_request(),
    )
    metrics: ServiceMetrics = request.app.state.metrics
    values = plan.total_count if selection is None else selection.count
    headers = {
        **common,
        "Content-Length": str(encoded.content_length),
        "Content-Disposition": f'attachment; filename="weights.{format}"',
    }
    return StreamingResponse(
        _count_when_done(encoded.body, metrics, format, values),
        media_type=encoded.media_type,
        headers=headers,
    )


def _count_when_done(
    body: Iterator[bytes], metrics: ServiceMetrics, fmt: str, values: int
) -> Iterator[bytes]:
    # A sync generator: StreamingResponse runs each step in the threadpool, so generation never
    # blocks the event loop. The values count only once the whole body went out.
    yield from body
    metrics.values_served.labels(format=fmt).inc(values)
