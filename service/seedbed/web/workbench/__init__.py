"""The workbench: pages served by the service for looking at plans, signals, recipes and audits
in a browser, with every asset local (no CDN, no build step), and the API docs page on local
assets too. The app factory includes `WORKBENCH_ROUTERS` with its other routers (and builds the
app with docs_url=None, since /docs is served from here)."""

from __future__ import annotations

from seedbed.web.workbench.assets import router as assets_router
from seedbed.web.workbench.docs_page import router as docs_router
from seedbed.web.workbench.pages import router as pages_router

WORKBENCH_ROUTERS = (pages_router, assets_router, docs_router)

__all__ = ["WORKBENCH_ROUTERS"]
