"""Two separate service processes answer the same request with byte-identical bodies, in every
format (docs/architecture.md, reproducibility contract: no timestamps, request ids or host
names inside a body; zip members carry a fixed date)."""

from __future__ import annotations

import hashlib
from collections.abc import Callable

import httpx
import pytest

from .networks import greenhouse_controller, harbor_crane_monitor
from .server import RunningServer

CASES: list[tuple[str, dict[str, str]]] = [
    ("json", {}),
    ("npz", {}),
    ("safetensors", {}),
    ("json", {"tensor": "timeline.input_weight", "rows": "5:40"}),
    ("npz", {"tensor": "focus.value.weight", "rows": "0:7"}),
    ("safetensors", {"tensor": "trace.conv.weight"}),
]


@pytest.fixture(scope="module")
def second_service(server_factory: Callable[..., RunningServer]) -> RunningServer:
    # Settled differently on purpose: generation threads, chunk size and string hashing must not
    # reach the bytes.
    return server_factory(
        {
            "SEEDBED_GENERATION_THREADS": "2",
            "SEEDBED_CHUNK_BYTES": "65536",
            "PYTHONHASHSEED": "20261202",
        }
    )


@pytest.mark.parametrize("dtype", ["float32", "bfloat16"])
def test_two_processes_give_identical_bodies(
    service: RunningServer, second_service: RunningServer, dtype: str
) -> None:
    assert service.pid != second_service.pid
    request = harbor_crane_monitor(dtype=dtype)
    with (
        httpx.Client(base_url=service.base_url, timeout=60) as a,
        httpx.Client(base_url=second_service.base_url, timeout=60) as b,
    ):
        for fmt, params in CASES:
            query = {"format": fmt, **params}
            ra = a.post("/v1/weights", params=query, json=request)
            rb = b.post("/v1/weights", params=query, json=request)
            assert ra.status_code == rb.status_code == 200, (ra.text[:300], rb.text[:300])
            assert ra.headers["x-request-id"] != rb.headers["x-request-id"]
            assert ra.headers["etag"] == rb.headers["etag"]
            assert ra.headers["content-length"] == rb.headers["content-length"]
            assert (
                hashlib.sha256(ra.content).hexdigest() == hashlib.sha256(rb.content).hexdigest()
            ), f"{fmt} {params}: bodies differ between processes"
        pa = a.post("/v1/plan", json=greenhouse_controller())
        pb = b.post("/v1/plan", json=greenhouse_controller())
        assert pa.content == pb.content and pa.headers["etag"] == pb.headers["etag"]
