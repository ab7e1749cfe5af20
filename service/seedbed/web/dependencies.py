"""What a route needs from the app, typed, in one place: settings, metrics, budgets, the plan.

Routes take these from here instead of reaching into `request.app.state` themselves, so the
names and types of what the app holds are written down once (seedbed.web.app sets them).
"""

from __future__ import annotations

from starlette.concurrency import run_in_threadpool
from starlette.requests import Request

from seedbed.core.audit import AuditLimits
from seedbed.core.diagnostics import DiagnosticLimits
from seedbed.core.plan import build_plan
from seedbed.core.plan_types import Plan
from seedbed.settings import Settings
from seedbed.web.body import read_json_body
from seedbed.web.metrics import ServiceMetrics


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


async def load_plan(request: Request) -> Plan:
    """The plan of the request's JSON body: body limits, strict JSON, the core's checks."""
    settings = settings_of(request)
    data = await read_json_body(request, settings.max_body_bytes)
    # Validation of thousands of layers is plain Python work: keep it off the event loop.
    plan: Plan = await run_in_threadpool(build_plan, data, settings.limits)
    return plan
