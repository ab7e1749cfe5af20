"""The workbench: pages served by the service for looking at plans, signals, recipes and audits
in a browser, with every asset local (no CDN, no build step), and the API docs page on local
assets too. `install_workbench(app)` is the one call the app factory makes."""

from __future__ import annotations

from fastapi import FastAPI

from seedbed.web.workbench.assets import router as assets_router
from seedbed.web.workbench.docs_page import router as docs_router
from seedbed.web.workbench.pages import router as pages_router


def install_workbench(app: FastAPI) -> None:
    """Add the workbench pages, their assets and /docs (the app is built with docs_url=None)."""
    for router in (pages_router, assets_router, docs_router):
        app.include_router(router)


__all__ = ["install_workbench"]
