"""POST /v1/weights over the wire: every container read back by its own library, every tensor's
sha256 checked against the manifest, blocks against slices, ETags against If-None-Match."""

from __future__ import annotations

import math
from pathlib import Path

import httpx
import numpy as np
import pytest

from support.networks import greenhouse_controller, harbor_crane_monitor, single_dense
from support.readback import Payload, check_digests, read_body

FORMATS = ["json", "npz", "safetensors"]
MEDIA_TYPES = {
    "json": "application/json",
    "npz": "application/zip",
    "safetensors": "application/octet-stream",
}


def fetch(
    client: httpx.Client, request: dict[str, object], fmt: str, scratch: Path, **params: str
) -> Payload:
    r = client.post("/v1/weights", params={"format": fmt, **params}, json=request)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].split(";")[0] == MEDIA_TYPES[fmt]
    assert int(r.headers["content-length"]) == len(r.content)
    payload = read_body(fmt, r.content, scratch)
    check_digests(payload)
    assert payload.manifest["algorithm"] == r.headers["x-seedbed-algorithm"]
    assert payload.manifest["numpy"] == np.__version__  # same venv as the server
    return payload


@pytest.mark.parametrize("fmt", FORMATS)
@pytest.mark.parametrize("dtype", ["float32", "float64", "float16", "bfloat16"])
def test_every_format_and_dtype_reads_back_and_verifies(
    client: httpx.Client, scratch: Path, fmt: str, dtype: str
) -> None:
    request = harbor_crane_monitor(dtype=dtype)
    payload = fetch(client, request, fmt, scratch)
    plan = client.post("/v1/plan", json=request).json()
    assert [e["tensor"] for e in payload.manifest["tensors"]] == [
        e["tensor"] for e in plan["tensors"]
    ]
    for entry in payload.manifest["tensors"]:
        assert entry["dtype"] == dtype
        values = payload.array(entry["tensor"]).astype(np.float64)
        assert np.all(np.isfinite(values)), entry["tensor"]


def test_all_formats_carry_the_same_bytes(client: httpx.Client, scratch: Path) -> None:
    request = greenhouse_controller()
    payloads = {fmt: fetch(client, request, fmt, scratch) for fmt in FORMATS}
    reference = payloads["json"]
    for fmt, payload in payloads.items():
        assert payload.raw == reference.raw, f"{fmt} bytes differ from json"
        for entry in payload.manifest["tensors"]:
            assert entry["sha256"] == reference.entry(entry["tensor"])["sha256"]


def test_served_values_follow_the_stated_distribution(client: httpx.Client, scratch: Path) -> None:
    # He et al. 2015, eq. 10 [from memory]: a ReLU layer's weights drawn N(0, 2 / fan_in).
    # 512 x 256 = 131072 draws: the sample std is within ~0.4% of the true one (1 sigma is
    # 1/sqrt(2n) relative), the mean within ~3e-3 std; the bounds below leave wide room.
    request = single_dense(256, 512, activation="relu")
    payload = fetch(client, request, "npz", scratch)
    entry = payload.entry("bulk.weight")
    assert entry["method"] == "he" and entry["distribution"] == "normal"
    expected_std = math.sqrt(2 / 256)
    assert math.isclose(entry["std"], expected_std, rel_tol=1e-12)
    w = payload.array("bulk.weight").astype(np.float64)
    assert w.shape == (512, 256)
    assert abs(w.std() / expected_std - 1) < 0.02
    assert abs(w.mean()) < 0.02 * expected_std
    # Symmetry is broken: no two output units start equal.
    assert len({row.tobytes() for row in payload.array("bulk.weight")}) == 512


def test_a_tensor_does_not_depend_on_the_other_layers(client: httpx.Client, scratch: Path) -> None:
    # The reproducibility contract (docs/architecture.md): values depend only on the seed, the
    # tensor's name, its own spec and the algorithm.
    full = greenhouse_controller()
    alone = dict(full, layers=[full["layers"][1]])
    # Reversed, the widths no longer chain: the request says so rather than being refused.
    reordered = dict(full, layers=list(reversed(full["layers"])), widths="unchecked")
    a = fetch(client, full, "safetensors", scratch)
    b = fetch(client, alone, "safetensors", scratch)
    c = fetch(client, reordered, "safetensors", scratch)
    for name in ("sensors.1.weight", "sensors.1.bias"):
        assert a.raw[name] == b.raw[name] == c.raw[name]


@pytest.mark.parametrize("fmt", FORMATS)
def test_row_blocks_equal_slices_of_the_full_tensor(
    client: httpx.Client, scratch: Path, fmt: str
) -> None:
    request = harbor_crane_monitor()
    full = fetch(client, request, fmt, scratch)
    for name in ("trace.grouped.weight", "timeline.recurrent_weight", "operator.weight"):
        whole = full.array(name)
        rows = whole.shape[0]
        cuts = [(0, rows), (0, 1), (rows - 1, rows), (rows // 3, rows // 3 + 5)]
        for start, stop in cuts:
            block = fetch(client, request, fmt, scratch, tensor=name, rows=f"{start}:{stop}")
            assert list(block.raw) == [name]
            entry = block.entry(name)
            assert entry["rows"] == [start, stop]
            assert entry["full_shape"] == list(whole.shape)
            expected = np.ascontiguousarray(whole[start:stop])
            assert block.shapes[name] == expected.shape
            assert block.raw[name] == expected.tobytes(), f"{name}[{start}:{stop}] in {fmt}"
        just = fetch(client, request, fmt, scratch, tensor=name)
        assert just.raw[name] == full.raw[name]


def test_etag_and_if_none_match(client: httpx.Client) -> None:
    request = greenhouse_controller()
    first = client.post("/v1/weights", params={"format": "npz"}, json=request)
    etag = first.headers["etag"]
    assert etag.startswith('"') and etag.endswith('"'), "a strong ETag is a quoted string"
    again = client.post("/v1/weights", params={"format": "npz"}, json=request)
    assert again.headers["etag"] == etag and again.content == first.content
    cached = client.post(
        "/v1/weights", params={"format": "npz"}, json=request, headers={"If-None-Match": etag}
    )
    assert cached.status_code == 304 and cached.content == b""
    assert cached.headers["etag"] == etag
    listed = client.post(
        "/v1/weights",
        params={"format": "npz"},
        json=request,
        headers={"If-None-Match": f'"0000", {etag}'},
    )
    assert listed.status_code == 304
    # Anything the bytes depend on changes the tag: format, selection, seed.
    others = [
        client.post("/v1/weights", params={"format": "json"}, json=request),
        client.post(
            "/v1/weights",
            params={"format": "npz", "tensor": "setpoints.weight", "rows": "0:2"},
            json=request,
        ),
        client.post("/v1/weights", params={"format": "npz"}, json=dict(request, seed=99)),
    ]
    tags = {r.headers["etag"] for r in others}
    assert etag not in tags and len(tags) == 3
    stale = client.post(
        "/v1/weights",
        params={"format": "npz"},
        json=dict(request, seed=99),
        headers={"If-None-Match": etag},
    )
    assert stale.status_code == 200


def test_etag_is_weak_exactly_when_a_served_tensor_is_platform_reproducible(
    client: httpx.Client,
) -> None:
    # RFC 9110 sec. 8.8.1: a strong validator promises identical bytes. Orthogonal tensors may
    # differ in their last bits between BLAS builds (reproducible: platform), so a response that
    # carries one can only honestly have a weak tag.
    request = harbor_crane_monitor()
    plan = {t["tensor"]: t for t in client.post("/v1/plan", json=request).json()["tensors"]}
    platform = [name for name, t in plan.items() if t["reproducible"] == "platform"]
    assert "timeline.recurrent_weight" in platform  # recurrent matrices: orthogonal
    whole = client.post("/v1/weights", params={"format": "npz"}, json=request)
    assert whole.headers["etag"].startswith('W/"')
    for name in ("timeline.recurrent_weight", "trace.conv.weight"):
        one = client.post("/v1/weights", params={"format": "npz", "tensor": name}, json=request)
        weak = one.headers["etag"].startswith('W/"')
        assert weak == (name in platform), (name, one.headers["etag"])
        again = client.post(
            "/v1/weights",
            params={"format": "npz", "tensor": name},
            json=request,
            headers={"If-None-Match": one.headers["etag"]},
        )
        assert again.status_code == 304


def test_etag_follows_meaning_not_spelling(client: httpx.Client) -> None:
    request = greenhouse_controller()
    compact = client.post("/v1/plan", json=request)
    spelled = client.post(
        "/v1/plan",
        content=_pretty(request),
        headers={"Content-Type": "application/json"},
    )
    assert compact.headers["etag"] == spelled.headers["etag"]
    cached = client.post(
        "/v1/plan", json=request, headers={"If-None-Match": compact.headers["etag"]}
    )
    assert cached.status_code == 304


def test_catalog_etag_gives_304(client: httpx.Client) -> None:
    first = client.get("/v1/catalog")
    again = client.get("/v1/catalog", headers={"If-None-Match": first.headers["etag"]})
    assert again.status_code == 304 and again.content == b""


def _pretty(request: dict[str, object]) -> bytes:
    import json

    # Same meaning, different spelling: indentation and reversed key order.
    def reverse(obj: object) -> object:
        if isinstance(obj, dict):
            return {k: reverse(obj[k]) for k in reversed(list(obj))}
        if isinstance(obj, list):
            return [reverse(x) for x in obj]
        return obj

    return json.dumps(reverse(request), indent=3).encode()
