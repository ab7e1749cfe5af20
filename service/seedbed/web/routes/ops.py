"""Operational endpoints: liveness, readiness, metrics. Each answers GET and HEAD."""

from __future__ import annotations

from fastapi import APIRouter, Request, Response
from fastapi.responses import JSONResponse

from seedbed.web import metrics as metrics_mod
from seedbed.web.readiness import NOT_CHECKED, Readiness
from seedbed.web.response_models import Liveness, NotReadyReport, ReadyReport
from seedbed.web.routes.recipes import registry_problem

router = APIRouter(tags=["operations"])


@router.get(
    "/healthz",
    operation_id="probeLiveness",
    summary="Is the process alive?",
    description="Answers at once without touching the core; stays responsive while weights "
    "stream, because generation runs off the event loop.",
    responses={
        200: {
            "model": Liveness,
            "description": "Alive.",
            "content": {"application/json": {"example": {"status": "alive"}}},
        }
    },
)
@router.head(
    "/healthz",
    operation_id="probeLivenessHead",
    include_in_schema=True,
    summary="Liveness headers only.",
)
async def healthz() -> JSONResponse:
    return JSONResponse({"status": "alive"}, headers={"Cache-Control": "no-store"})


@router.get(
    "/readyz",
    operation_id="probeReadiness",
    summary="Does this machine reproduce the reference bytes?",
    description="Ready (200) once the start-up self-check generated the probe tensors and "
    "their SHA-256 matched the values baked into the service; 503 with the reason otherwise.",
    responses={
        200: {
            "model": ReadyReport,
            "description": "Ready: the probe tensors match and the registry answers.",
            "content": {
                "application/json": {
                    "example": {
                        "status": "ready",
                        "reason": "7 probe tensors match the reference bytes",
                        "algorithm": "seedbed-philox4x64-v1",
                        "tensors_checked": 7,
                        "mismatches": [],
                        "seconds": 0.01,
                        "generator": "compiled (C kernel, avx2 loops)",
                        "registry": "ok",
                    }
                }
            },
        },
        503: {"model": NotReadyReport, "description": "Not ready; `reason` says why."},
    },
)
@router.head("/readyz", operation_id="probeReadinessHead", summary="Readiness headers only.")
async def readyz(request: Request) -> JSONResponse:
    state: Readiness = getattr(request.app.state, "readiness", None) or NOT_CHECKED
    body = state.body()
    # A replica whose recipe database does not answer must not take traffic either.
    problem = await registry_problem(request.app)
    body["registry"] = problem or "ok"
    ready = state.ready and problem is None
    if state.ready and problem is not None:
        body["status"] = "not_ready"
        body["reason"] = problem
    return JSONResponse(
        body, status_code=200 if ready else 503, headers={"Cache-Control": "no-store"}
    )


@router.get(
    "/metrics",
    operation_id="scrapeMetrics",
    summary="Prometheus metrics of this process.",
    description="Text exposition format. With several workers each process keeps its own "
    "counters, and a scrape reaches one of them.",
    response_class=Response,
    responses={200: {"content": {metrics_mod.MEDIA_TYPE: {"schema": {"type": "string"}}}}},
)
@router.head(
    "/metrics",
    operation_id="scrapeMetricsHead",
    summary="Metrics headers only.",
    response_class=Response,
)
async def metrics(request: Request) -> Response:
    registry: metrics_mod.ServiceMetrics = request.app.state.metrics
    return Response(
        registry.render(), media_type=metrics_mod.MEDIA_TYPE, headers={"Cache-Control": "no-store"}
    )
