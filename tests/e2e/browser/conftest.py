"""Fixtures for the browser tests: one real service (uvicorn, SQLite registry in its temp dir),
one headless Chromium, and a page that records console errors and every request that would
leave the service's origin."""

from __future__ import annotations

import os
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import pytest

from support.server import RunningServer

from ..conftest import _TROUBLE_MARKERS, ServerFactory
from .chromium import chromium_path, launch

ARTIFACTS = Path(
    os.environ.get(
        "SEEDBED_BROWSER_ARTIFACTS",
        Path(__file__).resolve().parents[3] / "test-artifacts" / "browser",
    )
)
# Local schemes a page may use without any network traffic.
_LOCAL_SCHEMES = {"data", "blob", "about"}


def _require_browser() -> tuple[Any, str]:
    """Playwright and the Chromium executable; a skip by hand, a failure in CI (as oracles)."""
    strict = os.environ.get("SEEDBED_REQUIRE_ORACLES") == "1"
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        if strict:
            raise
        pytest.skip("playwright is not installed (pip install -e '.[dev]')")
    executable = chromium_path()
    if executable is None:
        if strict:
            raise RuntimeError("no Chromium at /usr/bin/chromium (apt-get install chromium)")
        pytest.skip("Chromium is not installed (apt-get install chromium)")
    return sync_playwright, executable


@pytest.fixture(scope="session")
def bench_server(server_factory: ServerFactory) -> RunningServer:
    return server_factory()


# Package scope, not session: while Playwright's sync API is open it keeps an asyncio loop
# marked as running on the main thread, and every later test that starts a loop of its own
# (asyncio.run, anyio.run) would fail with "already running".
@pytest.fixture(scope="package")
def browser_context(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Any]:
    sync_playwright, executable = _require_browser()
    profile = tmp_path_factory.mktemp("chromium-profile")
    downloads = tmp_path_factory.mktemp("downloads")
    with sync_playwright() as playwright:
        context = launch(playwright, profile, executable, downloads)
        try:
            yield context
        finally:
            context.close()


@dataclass
class Watched:
    """A page with what it did: console errors, failed loads and requests to other origins."""

    page: Any
    origin: str
    console_errors: list[str] = field(default_factory=list)
    outside: list[str] = field(default_factory=list)
    failed: list[str] = field(default_factory=list)

    def goto(self, path: str) -> None:
        self.page.goto(self.origin + path, wait_until="networkidle")

    def assert_clean(self, refused: int | None = None) -> None:
        """No outside request, no failed load, no console error; `refused` names the one HTTP
        status the test provoked on purpose (Chromium logs every 4xx fetch as an error)."""
        assert not self.outside, f"requests left the service's origin: {self.outside}"
        expected = f"the server responded with a status of {refused} "
        errors = [e for e in self.console_errors if refused is None or expected not in e]
        assert not errors, f"console errors: {errors}"
        assert not self.failed, f"failed loads: {self.failed}"

    def shot(self, name: str, full_page: bool = True) -> Path:
        ARTIFACTS.mkdir(parents=True, exist_ok=True)
        path = ARTIFACTS / f"{name}.png"
        self.page.screenshot(path=str(path), full_page=full_page)
        return path


@pytest.fixture
def watched(browser_context: Any, bench_server: RunningServer) -> Iterator[Watched]:
    page = browser_context.new_page()
    origin = bench_server.base_url
    seen = Watched(page=page, origin=origin)

    def on_request(request: Any) -> None:
        parts = urlsplit(request.url)
        if parts.scheme in _LOCAL_SCHEMES:
            return
        if f"{parts.scheme}://{parts.netloc}" != origin:
            seen.outside.append(request.url)

    def on_console(message: Any) -> None:
        if message.type == "error":
            seen.console_errors.append(message.text)

    def on_failed(request: Any) -> None:
        seen.failed.append(f"{request.url}: {request.failure}")

    page.on("request", on_request)
    page.on("console", on_console)
    page.on("pageerror", lambda exc: seen.console_errors.append(f"uncaught: {exc}"))
    page.on("requestfailed", on_failed)
    log_size = bench_server.log_path.stat().st_size
    try:
        yield seen
    finally:
        page.close()
    # Whatever the page did, the service must not have logged an unexpected failure.
    assert bench_server.alive(), bench_server.log_tail()
    with open(bench_server.log_path, "rb") as fh:
        fh.seek(log_size)
        lines = fh.read().decode("utf-8", errors="replace").splitlines()
    trouble = [line for line in lines if any(m in line for m in _TROUBLE_MARKERS)]
    assert not trouble, "the service logged errors:\n" + "\n".join(trouble[:20])
