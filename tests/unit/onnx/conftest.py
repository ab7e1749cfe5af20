"""An in-process app and helpers for the ONNX import tests."""

from __future__ import annotations

from collections.abc import Iterator

import pytest
from fastapi.testclient import TestClient

from seedbed.web import Settings, create_app


@pytest.fixture(scope="module")
def http() -> Iterator[TestClient]:
    with TestClient(create_app(Settings(max_onnx_bytes=1 << 20))) as client:
        yield client
