"""From an HTTP request to a validated Plan: body limits, strict JSON, the core's checks."""

from __future__ import annotations

from starlette.concurrency import run_in_threadpool
from starlette.requests import Request

from seedbed.core.plan import build_plan
from seedbed.core.plan_types import Plan
from seedbed.settings import Settings
from seedbed.web.body import read_json_body


def settings_of(request: Request) -> Settings:
    settings: Settings = request.app.state.settings
    return settings


async def load_plan(request: Request) -> Plan:
    settings = settings_of(request)
    data = await read_json_body(request, settings.max_body_bytes)
    # Validation of thousands of layers is plain Python work: keep it off the event loop.
    plan: Plan = await run_in_threadpool(build_plan, data, settings.limits)
    return plan
