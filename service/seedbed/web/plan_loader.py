"""From an HTTP request to a validated Plan: body limits, strict JSON, the core's checks, and
the bounded plan cache (seedbed.web.plan_cache) in front of them."""

from __future__ import annotations

from starlette.concurrency import run_in_threadpool
from starlette.requests import Request

from seedbed.core.plan import build_plan
from seedbed.core.plan_types import Plan
from seedbed.web.body import read_json_body
from seedbed.web.plan_cache import CachedPlan, PlanCache, request_key
from seedbed.web.settings import Settings

# A cached plan is charged this many bytes per layer-list byte: the plan, its document and
# the encoded body are a few times the request's size.
_BYTES_PER_REQUEST_BYTE = 16


def settings_of(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def plan_cache_of(request: Request) -> PlanCache | None:
    cache: PlanCache | None = getattr(request.app.state, "plan_cache", None)
    return cache


async def load_cached_plan(request: Request) -> CachedPlan:
    settings = settings_of(request)
    data = await read_json_body(request, settings.max_body_bytes)
    cache = plan_cache_of(request)
    if cache is None or cache.max_entries <= 0:
        return CachedPlan(await run_in_threadpool(build_plan, data, settings.limits))
    key, size = request_key(data)
    found = cache.get(key)
    if found is not None:
        return found
    # Validation of thousands of layers is plain Python work: keep it off the event loop.
    plan: Plan = await run_in_threadpool(build_plan, data, settings.limits)
    entry = CachedPlan(plan)
    cache.put(key, entry, size * _BYTES_PER_REQUEST_BYTE)
    return entry


async def load_plan(request: Request) -> Plan:
    return (await load_cached_plan(request)).plan
