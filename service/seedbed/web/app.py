"""The application factory. Importing this module does nothing; `create_app` builds an app."""

from __future__ import annotations

from collections.abc import AsyncIterator, Mapping
from contextlib import asynccontextmanager

import anyio.to_thread
from fastapi import Depends, FastAPI
from fastapi.routing import APIRoute
from starlette.routing import Route

from seedbed import __version__
from seedbed.core.audit import AuditLimits
from seedbed.settings import Settings
from seedbed.web.digest_memo import DigestMemo
from seedbed.web.errors import install_error_handlers
from seedbed.web.metrics import ServiceMetrics
from seedbed.web.middleware import RequestBookkeeping
from seedbed.web.openapi_doc import install_openapi
from seedbed.web.plan_cache import PlanCache
from seedbed.web.query_check import refuse_unknown_query
from seedbed.web.readiness import BAKED_ALGORITHM, self_check
from seedbed.web.routes import audit, diagnose, onnx_models, ops, plan, recipes, sample, weights
from seedbed.web.workbench import WORKBENCH_ROUTERS
from seedbed_client.generator import kernel as generator_kernel

DESCRIPTION = (
    "Seeded, reproducible, explained initial weights for neural networks. Describe a network's "
    "layers; get each tensor's values (JSON, NPZ or safetensors), the rationale for every "
    "scale, and SHA-256 fingerprints to verify them. The same request gives the same bytes on "
    'every machine. Every error has one shape: `{"error": {status, code, field, message, '
    "problems}}`."
)


def _size_numeric_thread_pools(threads: int) -> None:
    """BLAS (diagnose's matrix products, orthogonal QR) gets the same thread budget as a
    request's generation: with W workers of cores / W threads each, the workers' pools never
    add up to more threads than cores."""
    from threadpoolctl import threadpool_limits

    threadpool_limits(limits=threads)


def create_app(
    settings: Settings | None = None,
    *,
    reference_digests: Mapping[str, str] | None = None,
    reference_algorithm: str = BAKED_ALGORITHM,
) -> FastAPI:
    """Build the service. `settings` defaults to the `SEEDBED_*` environment; the reference
    arguments replace the baked /readyz values (tests use them to prove a mismatch is caught)."""
    settings = Settings.from_env() if settings is None else settings
    metrics = ServiceMetrics()
    generator_kernel.set_enabled(settings.generator_kernel)
    _size_numeric_thread_pools(settings.threads_per_request())

    @asynccontextmanager
    async def lifespan(app: FastAPI) -> AsyncIterator[None]:
        app.state.readiness = await anyio.to_thread.run_sync(
            lambda: self_check(
                reference_digests, reference_algorithm, threads=settings.threads_per_request()
            )
        )
        # Opens (creating or upgrading) the recipe database now rather than on the first
        # request; a failure is not fatal here: /readyz reports it until the database answers.
        await recipes.registry_problem(app)
        try:
            yield
        finally:
            recipes.close_registry(app)

    app = FastAPI(
        title="seedbed",
        version=__version__,
        description=DESCRIPTION,
        lifespan=lifespan,
        redoc_url=None,
        # Every route refuses query parameters it does not define (a typo is not a default).
        dependencies=[Depends(refuse_unknown_query)],
        docs_url=None,  # served on local assets by the workbench's routers
        openapi_tags=[
            {"name": "weights", "description": "Plans, weights and the catalog."},
            {"name": "operations", "description": "Liveness, readiness and metrics."},
            {
                "name": "diagnostics",
                "description": "Signal propagation through depth, estimated on a synthetic batch.",
            },
            {"name": "audit", "description": "Checks of existing weights files."},
            {
                "name": "recipes",
                "description": "Team recipes: named, immutable versions of a "
                "request, and their weights.",
            },
            {
                "name": "onnx",
                "description": "Weights for an ONNX model file: the request read "
                "from its graph, its initializers filled in its own layouts.",
            },
        ],
    )
    app.state.settings = settings
    app.state.metrics = metrics
    app.state.readiness = None
    app.state.plan_cache = PlanCache(settings.plan_cache_entries, settings.plan_cache_bytes)
    app.state.digest_memo = DigestMemo(settings.plan_cache_entries)
    app.state.audit_limits = AuditLimits(max_upload_bytes=settings.max_audit_bytes)
    app.state.diagnostic_limits = settings.diagnostics
    install_error_handlers(app)
    methods_by_path: dict[str, set[str]] = {}
    for router in (
        plan.router,
        weights.router,
        sample.router,
        diagnose.router,
        audit.router,
        recipes.router,
        onnx_models.router,
        ops.router,
        *WORKBENCH_ROUTERS,
    ):
        app.include_router(router)
        for route in router.routes:
            if isinstance(route, APIRoute):
                methods_by_path.setdefault(route.path, set()).update(route.methods or ())
    for route in app.routes:
        if isinstance(route, Route) and route.methods:
            methods_by_path.setdefault(route.path, set()).update(route.methods)
    app.state.methods_by_path = methods_by_path
    install_openapi(app)
    app.add_middleware(RequestBookkeeping, metrics=metrics, access_log_on=settings.access_log)
    return app
