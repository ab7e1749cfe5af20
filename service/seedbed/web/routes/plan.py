"""POST /v1/plan (what would be generated, and why) and GET /v1/catalog (what we know)."""

from __future__ import annotations

import json

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse

from seedbed.core.catalog import catalog
from seedbed.core.plan import plan_document
from seedbed.web.dependencies import load_cached_plan
from seedbed.web.etag import body_etag, none_match, strong_etag
from seedbed.web.openapi_doc import error_responses, request_body
from seedbed.web.response_models import CatalogDocument, PlanDocument

router = APIRouter(tags=["weights"])


@router.post(
    "/v1/plan",
    operation_id="draftPlan",
    summary="Plan every tensor of a network, without values",
    description="Validates the request and returns one entry per tensor: shape, method, "
    "distribution, fans, gain, std, bound, rationale and references. Cheap: nothing is "
    "generated. Carries an ETag; If-None-Match with it answers 304.",
    responses={
        200: {"model": PlanDocument, "description": "The plan."},
        304: {"description": "Unchanged."},
        **error_responses(400, 413, 415, 422),
    },
    openapi_extra=request_body("The network to plan."),
)
async def draft_plan(request: Request) -> Response:
    entry = await load_cached_plan(request)
    plan = entry.plan
    if entry.etag is None or entry.body is None:
        with entry.lock:  # a repeated request reuses the encoded body: no document, no JSON
            etag = strong_etag("plan", request=plan.canonical_request, algorithm=plan.algorithm)
            entry.body = bytes(JSONResponse(plan_document(plan)).body)
            entry.etag = etag
    etag, body = entry.etag, entry.body
    if none_match(request.headers.get("if-none-match"), etag):
        return Response(status_code=304, headers={"ETag": etag})
    return Response(
        body,
        media_type="application/json",
        headers={"ETag": etag, "X-Seedbed-Algorithm": plan.algorithm},
    )


@router.get(
    "/v1/catalog",
    operation_id="describeCatalog",
    summary="Methods, distributions and activations the service knows",
    description="Each entry carries its gain and the published source it comes from.",
    responses={
        200: {"model": CatalogDocument, "description": "The catalog."},
        304: {"description": "Unchanged."},
    },
)
@router.head("/v1/catalog", operation_id="describeCatalogHead", summary="Catalog headers only.")
async def describe_catalog(request: Request) -> Response:
    body = json.dumps(catalog(), sort_keys=True, separators=(",", ":"), allow_nan=False).encode()
    etag = body_etag(body)
    headers = {"ETag": etag, "Cache-Control": "no-cache"}
    if none_match(request.headers.get("if-none-match"), etag):
        return Response(status_code=304, headers=headers)
    return Response(body, media_type="application/json", headers=headers)
