"""POST /v1/sample: a bounded sample of one tensor's served values, with its histogram and the
density the plan intends (seedbed.core.value_sample). The workbench draws it; anyone can call it
to see that the numbers follow the rationale without downloading the tensor."""

from __future__ import annotations

from fastapi import APIRouter, Query, Request
from fastapi.responses import JSONResponse
from pydantic import BaseModel, Field
from starlette.concurrency import run_in_threadpool

from seedbed.core.value_sample import (
    DEFAULT_BINS,
    DEFAULT_VALUES,
    MAX_BINS,
    MAX_VALUES,
    MIN_BINS,
    sample_document,
)
from seedbed.web.dependencies import load_plan
from seedbed.web.errors import ApiError
from seedbed.web.openapi_doc import error_responses, request_body

router = APIRouter(tags=["weights"])


class SampleSummaryDoc(BaseModel):
    count: int
    mean: float | None
    std: float | None = Field(description="Population std of the sampled values.")
    min: float | None
    max: float | None


class HistogramDoc(BaseModel):
    edges: list[float] = Field(description="bins + 1 increasing bin edges.")
    counts: list[int] = Field(description="Sampled values per bin.")


class IntendedDoc(BaseModel):
    law: str = Field(
        description="normal | uniform | truncated_normal | approximately_normal "
        "(orthogonal entries) | point (constants, identities)."
    )
    std: float | None
    bound: float | None
    curve: dict[str, list[float]] | None = Field(
        description="`x` and `y`: the intended density times the sample size times the bin "
        "width, so it sits on the histogram's count scale; null for point masses."
    )


class SampleDocument(BaseModel):
    tensor: str
    dtype: str
    shape: list[int]
    total_values: int
    blocks: list[list[int]] = Field(
        description="[start, stop) blocks of served rows the sample was read from."
    )
    values_per_row: int = Field(description="Leading values kept from each of those rows.")
    values: list[float] = Field(
        description="The sampled values in served order, exactly as "
        "served (rounded to dtype), written as float64."
    )
    summary: SampleSummaryDoc
    histogram: HistogramDoc
    intended: IntendedDoc
    notice: str


@router.post(
    "/v1/sample",
    operation_id="sampleTensorValues",
    summary="A bounded sample of one tensor's served values, with histogram and intended density",
    description=(
        "Reads at most `values` of the tensor's served values (the same bytes /v1/weights sends, "
        "from up to 16 evenly spaced blocks of rows; each row cut to the same number of leading "
        "values when rows are long) and returns them with their mean, std, min and max, a "
        "histogram, and the density the plan intends drawn on the histogram's count scale. "
        "A picture of a sample, not statistics of the whole tensor."
    ),
    responses={
        200: {"model": SampleDocument, "description": "The sample."},
        **error_responses(400, 413, 415, 422),
    },
    openapi_extra=request_body("The network the tensor belongs to."),
)
async def sample_tensor_values(
    request: Request,
    tensor: str = Query(description="The tensor to sample (a name from the plan)."),
    values: int = Query(
        DEFAULT_VALUES, ge=1, le=MAX_VALUES, description="At most this many values."
    ),
    bins: int = Query(DEFAULT_BINS, ge=MIN_BINS, le=MAX_BINS, description="Histogram bins."),
) -> JSONResponse:
    plan = await load_plan(request)
    try:
        t = plan.tensor(tensor)
    except KeyError:
        names = [x.tensor for x in plan.tensors]
        shown = ", ".join(names[:8]) + (f" ... ({len(names)} in all)" if len(names) > 8 else "")
        raise ApiError.one(
            422,
            "tensor",
            "unknown_tensor",
            f"no tensor named {tensor[:100]!r} in this request; it has: {shown}",
        ) from None
    document = await run_in_threadpool(sample_document, plan, t, values, bins)
    return JSONResponse(document, headers={"X-Seedbed-Algorithm": plan.algorithm})
