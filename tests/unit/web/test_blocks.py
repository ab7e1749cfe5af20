"""`tensor=NAME&rows=START:STOP` returns one block, byte-identical to that slice of the full
tensor, in every format and both layouts (docs/architecture.md, reproducibility contract: "a
block must equal the same slice of the full tensor, byte for byte"). The full tensor comes from
the same service; the slice is taken by numpy on the full array, and each format is read back
by its own library."""

from __future__ import annotations

import hashlib
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from seedbed.web import Settings, create_app
from unit.web.test_endpoints import READERS

# An invented network for a wind-turbine vibration model.
TURBINE: dict[str, Any] = {
    "seed": "turbine-7/blade-2",
    "dtype": "float32",
    "layers": [
        {"name": "blade", "kind": "dense", "n_in": 9, "n_out": 14, "activation": "relu"},
        {
            "name": "hub",
            "kind": "conv",
            "channels_in": 4,
            "channels_out": 6,
            "kernel": [3, 2],
            "activation": "relu",
        },
        {"name": "gusts", "kind": "recurrent", "cell": "lstm", "n_in": 5, "hidden": 3},
    ],
}

CASES = [
    ("blade.weight", "3:11"),
    ("blade.weight", "0:1"),
    ("blade.bias", "13:14"),
    ("hub.weight", "2:5"),
    ("gusts.input_weight", "4:9"),
]


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def _fetch(client: TestClient, request: dict[str, Any], fmt: str, query: str = "") -> Any:
    got = client.post(f"/v1/weights?format={fmt}{query}", json=request)
    assert got.status_code == 200, got.text
    assert int(got.headers["content-length"]) == len(got.content)
    return READERS[fmt](got.content), got


@pytest.mark.parametrize("layout", ["out_in", "in_out"])
@pytest.mark.parametrize("fmt", ["json", "npz", "safetensors"])
def test_blocks_equal_slices(client: TestClient, fmt: str, layout: str) -> None:
    request = {**TURBINE, "layout": layout}
    (_, full), _ = _fetch(client, request, fmt)
    for name, rows in CASES:
        start, stop = (int(x) for x in rows.split(":"))
        if stop > full[name].shape[0]:
            continue  # in_out puts another axis first; those rows do not exist there
        (doc, block), _got = _fetch(client, request, fmt, f"&tensor={name}&rows={rows}")
        assert list(block) == [name]
        want = full[name][start:stop]
        assert block[name].shape == want.shape, (name, rows)
        assert block[name].tobytes() == want.tobytes(), (name, rows)
        (entry,) = doc["tensors"]
        assert entry["sha256"] == hashlib.sha256(want.tobytes()).hexdigest()
        assert entry["rows"] == [start, stop] and entry["full_shape"] == list(full[name].shape)
        assert doc["selection"] == {"tensor": name, "rows": [start, stop]}


def test_in_out_first_axis_is_served_axis(client: TestClient) -> None:
    # in_out serves conv kernels as (*kernel, in/groups, out): rows run along the kernel height.
    (_, full), _ = _fetch(client, {**TURBINE, "layout": "in_out"}, "npz")
    assert full["hub.weight"].shape == (3, 2, 4, 6)
    (_, block), _ = _fetch(
        client, {**TURBINE, "layout": "in_out"}, "npz", "&tensor=hub.weight&rows=1:3"
    )
    assert block["hub.weight"].tobytes() == full["hub.weight"][1:3].tobytes()


def test_tensor_alone_is_the_whole_tensor(client: TestClient) -> None:
    (_, full), _ = _fetch(client, TURBINE, "safetensors")
    (_, alone), got = _fetch(client, TURBINE, "safetensors", "&tensor=gusts.recurrent_weight")
    assert alone["gusts.recurrent_weight"].tobytes() == full["gusts.recurrent_weight"].tobytes()
    rows = full["gusts.recurrent_weight"].shape[0]
    (_, _explicit), same = _fetch(
        client, TURBINE, "safetensors", f"&tensor=gusts.recurrent_weight&rows=0:{rows}"
    )
    assert same.content == got.content and same.headers["etag"] == got.headers["etag"]


def test_block_etags_differ_by_selection(client: TestClient) -> None:
    tags = set()
    for query in (
        "",
        "&tensor=blade.weight",
        "&tensor=blade.weight&rows=0:2",
        "&tensor=blade.weight&rows=1:2",
        "&tensor=blade.bias",
    ):
        got = client.post(f"/v1/weights?format=npz{query}", json=TURBINE)
        tags.add(got.headers["etag"])
    assert len(tags) == 5
