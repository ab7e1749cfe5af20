"""The client against a real service: every format, blocks, plans, and the async twin.

The oracle for the arrays is the end-to-end suite's reader (tests/support/readback.py), which opens
each container with the library that owns the format (json+base64, numpy.load, the safetensors
package), never with seedbed or seedbed_client code.
"""

from __future__ import annotations

import asyncio
from collections.abc import Callable
from pathlib import Path

import httpx
import numpy as np
import pytest

from seedbed_client import AsyncClient, Client, WeightSet
from support.networks import greenhouse_controller, harbor_crane_monitor
from support.readback import read_body
from support.server import RunningServer


def _served(base_url: str, request: dict, fmt: str, scratch: Path, **params: str):
    """The same response fetched with plain httpx and read by the format's own library."""
    response = httpx.post(
        f"{base_url}/v1/weights", params={"format": fmt, **params}, json=request, timeout=60
    )
    assert response.status_code == 200, response.text
    return read_body(fmt, response.content, scratch)


@pytest.mark.parametrize("fmt", ["json", "npz", "safetensors"])
@pytest.mark.parametrize("dtype", ["float32", "bfloat16"])
def test_weights_in_each_format_equal_an_independent_reading(
    service: RunningServer,
    make_client: Callable[..., Client],
    tmp_path: Path,
    fmt: str,
    dtype: str,
) -> None:
    request = harbor_crane_monitor(dtype)
    weights = make_client(service.base_url).weights(request, format=fmt)
    reference = _served(service.base_url, request, fmt, tmp_path)

    assert isinstance(weights, WeightSet) and weights.source == "service"
    assert list(weights) == [e["tensor"] for e in reference.manifest["tensors"]]
    for name, array in weights.items():
        entry = reference.entry(name)
        assert list(array.shape) == entry["shape"]
        assert array.tobytes() == reference.raw[name], name
        assert weights.entry(name)["sha256"] == entry["sha256"]
        assert array.flags.writeable
    assert weights.algorithm == reference.manifest["algorithm"]
    if dtype == "bfloat16":  # ml_dtypes is installed here: real bfloat16 values come back
        assert str(next(iter(weights.values())).dtype) == "bfloat16"


def test_the_three_formats_give_identical_arrays(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    client = make_client(service.base_url, cache=False)
    request = greenhouse_controller(layout="in_out")
    sets = [client.weights(request, format=f) for f in ("json", "npz", "safetensors")]
    for name in sets[0]:
        assert sets[0][name].tobytes() == sets[1][name].tobytes() == sets[2][name].tobytes()


@pytest.mark.parametrize("layout", ["out_in", "in_out"])
def test_a_block_equals_the_slice_of_the_full_tensor(
    service: RunningServer, make_client: Callable[..., Client], layout: str
) -> None:
    client = make_client(service.base_url)
    request = greenhouse_controller(layout=layout)
    full = client.weights(request)["sensors.1.weight"]
    for rows, (start, stop) in [(slice(3, 17), (3, 17)), ("0:1", (0, 1)), ((39, 40), (39, 40))]:
        block = client.tensor(request, "sensors.1.weight", rows=rows, format="safetensors")
        assert block.tobytes() == full[start:stop].tobytes()
        assert block.shape == full[start:stop].shape
    whole = client.tensor(request, "setpoints.bias", format="json")
    assert whole.tobytes() == client.weights(request)["setpoints.bias"].tobytes()


def test_plan_lists_the_same_tensors_as_the_weights(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    client = make_client(service.base_url)
    request = harbor_crane_monitor()
    plan = client.plan(request)
    weights = client.weights(request)
    assert [e["tensor"] for e in plan["tensors"]] == list(weights)
    for entry in plan["tensors"]:
        assert entry["shape"] == list(weights[entry["tensor"]].shape)
        assert entry["rationale"]
    catalog = client.catalog()
    assert "relu" in {a["name"] for a in catalog["activations"]}


def test_async_client_gives_the_same_answers(
    service: RunningServer, tmp_path: Path, make_client: Callable[..., Client]
) -> None:
    request = greenhouse_controller()
    expected = make_client(service.base_url, cache=False).weights(request, format="npz")

    async def run() -> tuple[dict, WeightSet, np.ndarray, WeightSet]:
        async with AsyncClient(service.base_url, cache_dir=tmp_path / "async-cache") as client:
            plan = await client.plan(request)
            weights = await client.weights(request, format="safetensors")
            block = await client.tensor(request, "sensors.0.weight", rows="5:9")
            again = await client.weights(request, format="safetensors")
            return plan, weights, block, again

    plan, weights, block, again = asyncio.run(run())
    assert [e["tensor"] for e in plan["tensors"]] == list(expected)
    for name in expected:
        assert weights[name].tobytes() == expected[name].tobytes()
    assert block.tobytes() == expected["sensors.0.weight"][5:9].tobytes()
    assert weights.source == "service" and again.source == "revalidated"
