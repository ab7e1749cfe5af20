"""POST /v1/diagnose: how the signal and the gradients travel through the network at the start.

Body `{"request": <as for /v1/weights>, "alternatives": [{"label", "init"}], "batch"}`;
response `{"notice", "simulation", "finite_width", "definitions", "runs": [{"label",
"verdict", "failed_at", ..., "mean_field", "layers": [...]}]}` with the first run labelled
"recommended" (see seedbed.core.diagnostics and docs/diagnostics.md). `?chart=svg` answers with
the chart as a self-contained SVG image, `?chart=html` with an HTML page around it.

The work is bounded before it starts (413 with the numbers; see DiagnosticLimits) and runs off
the event loop. Limits come from `app.state.diagnostic_limits` when the app sets one, else the
defaults.
"""

from __future__ import annotations

import math
from typing import Any, Literal

from fastapi import APIRouter, Query, Request, Response
from fastapi.responses import JSONResponse
from starlette.concurrency import run_in_threadpool

from seedbed.core.diagnostics import (
    DEFAULT_BATCH,
    DiagnosticLimits,
    chart_html,
    chart_svg,
    diagnose,
    diagnosis_document,
)
from seedbed.web.dependencies import diagnostic_limits_of, settings_of
from seedbed.web.json_body import read_json_body
from seedbed.web.openapi_doc import REQUEST_SCHEMA_NAME, error_responses
from seedbed.web.response_models import DiagnosisDocument

router = APIRouter(tags=["diagnostics"])

SVG_MEDIA_TYPE = "image/svg+xml"
HTML_MEDIA_TYPE = "text/html; charset=utf-8"

# An invented scenario: a deep ReLU regressor for greenhouse sensor readings.
_EXAMPLE_BODY: dict[str, Any] = {
    "request": {
        "seed": 4471,
        "layers": [
            *(
                {
                    "name": f"sensors.{i}",
                    "kind": "dense",
                    "n_in": 128,
                    "n_out": 128,
                    "activation": "relu",
                }
                for i in range(12)
            ),
            {"name": "humidity", "kind": "dense", "n_in": 128, "n_out": 1, "role": "output"},
        ],
    },
    "alternatives": [
        {"label": "tiny uniform", "init": {"method": "symmetric_uniform", "bound": 0.01}},
        {"label": "all constant", "init": {"method": "constant", "value": 0.05}},
    ],
    "batch": 64,
}

_BODY_SCHEMA: dict[str, Any] = {
    "type": "object",
    "additionalProperties": False,
    "required": ["request"],
    "properties": {
        "request": {"$ref": f"#/components/schemas/{REQUEST_SCHEMA_NAME}"},
        "alternatives": {
            "type": "array",
            "description": "Initialisations to compare with the request as given; each `init` "
            "applies to every dense, conv, attention and embedding layer.",
            "items": {
                "type": "object",
                "additionalProperties": False,
                "required": ["label", "init"],
                "properties": {
                    "label": {"type": "string", "minLength": 1, "maxLength": 64},
                    "init": {"$ref": "#/components/schemas/WeightOverride"},
                },
            },
        },
        "batch": {
            "type": "integer",
            "minimum": 1,
            "default": DEFAULT_BATCH,
            "description": "Samples in the synthetic batch.",
        },
    },
}


def _finite(value: Any) -> Any:
    """The document with any non-finite float replaced by null (JSON has no NaN)."""
    if isinstance(value, float):
        return value if math.isfinite(value) else None
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_finite(v) for v in value]
    return value


def _document(
    data: Any, request_limits: Any, limits: DiagnosticLimits, threads: int
) -> dict[str, Any]:
    document: dict[str, Any] = _finite(
        diagnosis_document(diagnose(data, request_limits, limits, threads=threads))
    )
    return document


@router.post(
    "/v1/diagnose",
    operation_id="diagnoseSignal",
    summary="Simulate how activations and gradients travel through the network at the start",
    description=(
        "Runs a seeded synthetic batch forward through the planned weights and a unit-variance "
        "loss gradient back, for the request as given (run `recommended`) and each "
        "alternative; reports per layer activation std and mean, gradient std, dead and "
        "saturated fractions and twin units, a verdict per run (stable, vanishing, exploding, "
        "symmetric) with the layer at fault, and mean-field figures per activation. Estimates "
        "from one batch at initialisation, not a promise that training succeeds. "
        "`chart=svg` or `chart=html` returns a chart of std versus depth instead."
    ),
    response_class=Response,
    responses={
        200: {
            "model": DiagnosisDocument,
            "description": "The diagnosis (JSON), or its chart.",
            "content": {
                "application/json": {"schema": {"$ref": "#/components/schemas/DiagnosisDocument"}},
                SVG_MEDIA_TYPE: {"schema": {"type": "string"}},
                "text/html": {"schema": {"type": "string"}},
            },
        },
        **error_responses(400, 413, 415, 422),
    },
    openapi_extra={
        "requestBody": {
            "required": True,
            "description": "The network, the alternatives to compare and the batch size.",
            "content": {
                "application/json": {
                    "schema": _BODY_SCHEMA,
                    "examples": {
                        "greenhouse-regressor": {
                            "summary": (
                                "A deep ReLU regressor against tiny-uniform and constant starts"
                            ),
                            "value": _EXAMPLE_BODY,
                        }
                    },
                }
            },
        }
    },
)
async def diagnose_signal(
    request: Request,
    chart: Literal["svg", "html"] | None = Query(
        None, description="Return the chart instead of JSON: svg (an image) or html (a page)."
    ),
) -> Response:
    settings = settings_of(request)
    data = await read_json_body(request, settings.max_body_bytes)
    budget = diagnostic_limits_of(request)
    document = await run_in_threadpool(
        _document, data, settings.limits, budget, settings.threads_per_request()
    )
    if chart == "svg":
        return Response(chart_svg(document), media_type=SVG_MEDIA_TYPE)
    if chart == "html":
        return Response(chart_html(document), media_type=HTML_MEDIA_TYPE)
    return JSONResponse(document)


__all__ = ["router"]
