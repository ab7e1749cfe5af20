"""The workbench's files ask for nothing outside the service: no URL of another host in any
static file or page, and every file a page names is one the service serves."""

from __future__ import annotations

import re
from collections.abc import Iterator
from importlib import resources

import pytest
from fastapi.testclient import TestClient

from seedbed.settings import Settings
from seedbed.web.app import create_app
from seedbed.web.workbench.assets import bundled
from seedbed.web.workbench.pages import VIEWS

# The SVG namespace is an identifier written into elements, never fetched.
NAMESPACES = {"http://www.w3.org/2000/svg"}
URL = re.compile(r"(?:https?:)?//[a-z0-9.-]+\.[a-z]{2,}[^\s\"')]*", re.IGNORECASE)


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def test_static_files_name_no_other_host() -> None:
    folder = resources.files("seedbed.web.workbench") / "static"
    names = sorted(p.name for p in folder.iterdir())
    assert {"common.js", "workbench.css", "mark.svg"} <= set(names)
    for name in names:
        text = (folder / name).read_text(encoding="utf-8")
        found = {u for u in URL.findall(text)} - NAMESPACES
        assert not found, f"{name} names other hosts: {found}"


def test_pages_load_only_what_the_service_serves(client: TestClient) -> None:
    for view, _, _ in VIEWS:
        page = client.get(f"/workbench/{view}").text
        assert not (set(URL.findall(page)) - NAMESPACES), view
        for ref in re.findall(r'(?:src|href)="(/[^"]*)"', page):
            got = client.get(ref)
            assert got.status_code == 200, (view, ref)
        # Each view's own script exists and is served as JavaScript.
        script = client.get(f"/workbench/assets/{view}.js")
        assert script.headers["content-type"].startswith("text/javascript")
    assert set(bundled()) >= {f"{view}.js" for view, _, _ in VIEWS}


def test_assets_carry_validators(client: TestClient) -> None:
    first = client.get("/workbench/assets/workbench.css")
    again = client.get(
        "/workbench/assets/workbench.css", headers={"If-None-Match": first.headers["etag"]}
    )
    assert again.status_code == 304
    docs = client.get("/docs/assets/swagger-ui.css")
    assert docs.status_code == 200 and docs.headers["content-type"].startswith("text/css")
