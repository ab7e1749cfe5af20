"""Run the service with the recipes router, for tests, until the app factory includes it.

    python launcher.py --host H --port P

Builds `seedbed.web.create_app()` from the SEEDBED_* environment, adds the recipes router when
the factory does not already have it, and serves it with uvicorn, like `seedbed serve` does.
"""

from __future__ import annotations

import argparse

import uvicorn
from fastapi import FastAPI

from seedbed.web import create_app
from seedbed.web.routes import recipes


def has_recipes(app: FastAPI) -> bool:
    return any(getattr(route, "path", None) == "/v1/recipes" for route in app.routes)


def build() -> FastAPI:
    app = create_app()
    if not has_recipes(app):
        app.include_router(recipes.router)
    return app


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--host", default="127.0.0.1")
    parser.add_argument("--port", type=int, required=True)
    args = parser.parse_args()
    uvicorn.run(build, factory=True, host=args.host, port=args.port, access_log=False,
                log_level="warning", timeout_graceful_shutdown=10)


if __name__ == "__main__":
    main()
