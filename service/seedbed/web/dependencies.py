"""What a route needs from the app, typed, in one place: settings, metrics, budgets, the plan.

Routes take these from here instead of reaching into `request.app.state` themselves, so the
names and types of what the app holds are written down once (seedbed.web.app sets them).
"""

from __future__ import annotations

from starlette.concurrency import run_in_threadpool
from starlette.requests import Request

from seedbed.core.audit import AuditLimits
from seedbed.core.diagnostics import DiagnosticLimits
from seedbed.core.plan import build_plan, reseeded
from seedbed.core.plan_types import Plan
from seedbed.settings import Settings
from seedbed.web.digest_memo import DigestMemo
from seedbed.web.json_body import read_json_body
from seedbed.web.metrics import ServiceMetrics
from seedbed.web.plan_cache import CachedPlan, PlanCache, request_keys


def settings_of(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


def metrics_of(request: Request) -> ServiceMetrics:
    metrics: ServiceMetrics = request.app.state.metrics
    return metrics


def audit_limits_of(request: Request) -> AuditLimits:
    """The audit budget the app installed (from the settings; tests may place their own)."""
    limits = getattr(request.app.state, "audit_limits", None)
    if isinstance(limits, AuditLimits):
        return limits
    return AuditLimits(max_upload_bytes=settings_of(request).max_audit_bytes)


def diagnostic_limits_of(request: Request) -> DiagnosticLimits:
    limits = getattr(request.app.state, "diagnostic_limits", None)
    return limits if isinstance(limits, DiagnosticLimits) else DiagnosticLimits()


def digest_memo_of(request: Request) -> DigestMemo | None:
    memo: DigestMemo | None = getattr(request.app.state, "digest_memo", None)
    return memo


def plan_cache_of(request: Request) -> PlanCache | None:
    cache: PlanCache | None = getattr(request.app.state, "plan_cache", None)
    return cache


# A cached plan is charged this many bytes per byte of canonical request JSON: the plan, its
# document and the encoded body are a few times the request's size.
_BYTES_PER_REQUEST_BYTE = 16


async def load_cached_plan(request: Request) -> CachedPlan:
    """The request's plan, from the plan cache when an equal request was planned before."""
    settings = settings_of(request)
    data = await read_json_body(request, settings.max_body_bytes)
    cache = plan_cache_of(request)
    if cache is None or cache.max_entries <= 0:
        return CachedPlan(await run_in_threadpool(build_plan, data, settings.limits))
    keys = request_keys(data)
    charge = keys.size * _BYTES_PER_REQUEST_BYTE
    found = cache.get(keys.whole)
    if found is not None:
        return found
    template = cache.get(keys.unseeded) if keys.unseeded is not None else None
    if template is not None:
        # The same network under another seed: valid as that one was, and planned the same.
        entry = CachedPlan(reseeded(template.plan, data["seed"]))
    else:
        # Validation of thousands of layers is plain Python work: keep it off the event loop.
        entry = CachedPlan(await run_in_threadpool(build_plan, data, settings.limits))
        if keys.unseeded is not None:
            cache.put(keys.unseeded, CachedPlan(entry.plan), charge)
    cache.put(keys.whole, entry, charge)
    return entry


async def load_plan(request: Request) -> Plan:
    """The plan of the request's JSON body: body limits, strict JSON, the core's checks."""
    return (await load_cached_plan(request)).plan
