"""Happy paths of every endpoint and format, in process (fastapi.testclient over the ASGI app).

Reference points outside the web layer: each format is read back by its own library (numpy's
NPZ reader, the `safetensors` package, base64 + json from the standard library), SHA-256 by
hashlib, and the values are compared with the core's own `render_rows` for the same plan, so
the web layer is checked to pass the core's bytes through untouched.
"""

from __future__ import annotations

import base64
import hashlib
import io
import json
import logging
import zipfile
from collections.abc import Iterator
from typing import Any

import numpy as np
import pytest
from fastapi.testclient import TestClient
from prometheus_client.parser import text_string_to_metric_families

from seedbed.core.plan import build_plan
from seedbed.core.render import render_rows
from seedbed.core.version import ALGORITHM
from seedbed.web import Settings, create_app

# An invented network: a soil-moisture forecaster with a few of every kind of layer.
GREENHOUSE: dict[str, Any] = {
    "seed": 31337,
    "dtype": "float32",
    "layout": "out_in",
    "layers": [
        {"name": "probe_ids", "kind": "embedding", "vocab": 20, "dim": 8},
        {"name": "soil.0", "kind": "dense", "n_in": 8, "n_out": 12, "activation": "relu"},
        {
            "name": "leaf",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 4,
            "kernel": [3, 3],
            "activation": "tanh",
        },
        {"name": "season", "kind": "recurrent", "cell": "gru", "n_in": 12, "hidden": 6},
        {"name": "norm", "kind": "norm", "dim": 12},
        {"name": "mix", "kind": "attention", "dim": 8, "heads": 2},
        {
            "name": "head",
            "kind": "dense",
            "n_in": 12,
            "n_out": 3,
            "activation": "linear",
            "role": "output",
        },
    ],
    "widths": "unchecked",  # a few of every kind, not one chain
}


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def np_dtype(name: str) -> np.dtype:
    if name == "bfloat16":
        import ml_dtypes

        return np.dtype(ml_dtypes.bfloat16)
    return np.dtype(name).newbyteorder("<")


def read_json_weights(body: bytes) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    doc = json.loads(body)
    arrays = {}
    for entry in doc["tensors"]:
        raw = base64.b64decode(entry["data"], validate=True)
        arrays[entry["tensor"]] = np.frombuffer(raw, np_dtype(entry["dtype"])).reshape(
            entry["shape"]
        )
    return doc, arrays


def read_npz_weights(body: bytes) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    with zipfile.ZipFile(io.BytesIO(body)) as zf:
        assert zf.testzip() is None
        manifest_names = [n for n in zf.namelist() if not n.endswith(".npy")]
        assert len(manifest_names) == 1
        doc = json.loads(zf.read(manifest_names[0]))
        array_names = [n.removesuffix(".npy") for n in zf.namelist() if n.endswith(".npy")]
    with np.load(io.BytesIO(body), allow_pickle=False) as npz:
        arrays = {name: npz[name] for name in array_names}
    for entry in doc["tensors"]:  # bfloat16 travels as its uint16 bit patterns in NPY
        if entry["dtype"] == "bfloat16":
            arrays[entry["tensor"]] = arrays[entry["tensor"]].view(np_dtype("bfloat16"))
    return doc, arrays


def read_safetensors_weights(body: bytes) -> tuple[dict[str, Any], dict[str, np.ndarray]]:
    from safetensors.numpy import load

    n = int.from_bytes(body[:8], "little")
    header = json.loads(body[8 : 8 + n])
    metadata = header["__metadata__"]
    manifests = [json.loads(v) for v in metadata.values() if v.startswith("{")]
    assert len(manifests) == 1
    return manifests[0], dict(load(body))


READERS = {
    "json": read_json_weights,
    "npz": read_npz_weights,
    "safetensors": read_safetensors_weights,
}


def expected_arrays(request: dict[str, Any]) -> dict[str, np.ndarray]:
    plan = build_plan(request)
    return {t.tensor: render_rows(plan, t) for t in plan.tensors}


def test_healthz_and_head(client: TestClient) -> None:
    got = client.get("/healthz")
    assert got.status_code == 200 and got.json() == {"status": "alive"}
    head = client.head("/healthz")
    assert head.status_code == 200 and head.content == b""
    assert head.headers["content-length"] == got.headers["content-length"]


def test_every_get_route_answers_head(client: TestClient) -> None:
    paths = sorted(
        path for path, methods in client.app.state.methods_by_path.items() if "GET" in methods
    )
    assert {"/healthz", "/readyz", "/metrics", "/v1/catalog", "/openapi.json"} <= set(paths)
    for path in paths:
        got, head = client.get(path), client.head(path)
        assert head.status_code == got.status_code, path
        assert head.content == b"", path
        assert head.headers["content-type"] == got.headers["content-type"], path
        if path != "/metrics":  # the metrics text changes between the two calls
            assert head.headers["content-length"] == got.headers["content-length"], path


def test_readyz_ready_with_the_real_core(client: TestClient) -> None:
    got = client.get("/readyz")
    assert got.status_code == 200, got.text
    body = got.json()
    assert body["status"] == "ready" and body["algorithm"] == ALGORITHM
    assert body["tensors_checked"] > 0 and body["mismatches"] == []


def test_plan_lists_every_tensor_with_rationale(client: TestClient) -> None:
    got = client.post("/v1/plan", json=GREENHOUSE)
    assert got.status_code == 200, got.text
    doc = got.json()
    plan = build_plan(GREENHOUSE)
    assert doc["algorithm"] == ALGORITHM
    assert [e["tensor"] for e in doc["tensors"]] == [t.tensor for t in plan.tensors]
    assert doc["totals"]["values"] == plan.total_count
    for entry in doc["tensors"]:
        for key in (
            "tensor",
            "layer",
            "shape",
            "dtype",
            "method",
            "distribution",
            "fan_in",
            "fan_out",
            "gain",
            "std",
            "bound",
            "reproducible",
            "rationale",
            "references",
        ):
            assert key in entry, (entry["tensor"], key)
        assert "data" not in entry and "sha256" not in entry
    assert "soil.0.weight" in {e["tensor"] for e in doc["tensors"]}


def test_plan_etag_follows_meaning_not_spelling(client: TestClient) -> None:
    first = client.post("/v1/plan", json=GREENHOUSE)
    # Same request, keys in another order and with explicit whitespace: same canonical form.
    respelled = json.dumps(dict(reversed(list(GREENHOUSE.items()))), indent=3)
    second = client.post(
        "/v1/plan", content=respelled, headers={"content-type": "application/json"}
    )
    assert first.headers["etag"] == second.headers["etag"]
    assert first.headers["etag"].startswith('"')  # strong, not W/
    other = client.post("/v1/plan", json={**GREENHOUSE, "seed": 31338})
    assert other.headers["etag"] != first.headers["etag"]
    cached = client.post(
        "/v1/plan", json=GREENHOUSE, headers={"if-none-match": first.headers["etag"]}
    )
    assert cached.status_code == 304 and cached.content == b""
    assert cached.headers["etag"] == first.headers["etag"]


@pytest.mark.parametrize("fmt", ["json", "npz", "safetensors"])
def test_weights_every_format(client: TestClient, fmt: str) -> None:
    got = client.post(f"/v1/weights?format={fmt}", json=GREENHOUSE)
    assert got.status_code == 200, got.text
    assert int(got.headers["content-length"]) == len(got.content)
    assert got.headers["x-seedbed-algorithm"] == ALGORITHM
    doc, arrays = READERS[fmt](got.content)
    assert doc["algorithm"] == ALGORITHM and doc["numpy"] == np.__version__
    want = expected_arrays(GREENHOUSE)
    assert set(arrays) == set(want)
    entries = {e["tensor"]: e for e in doc["tensors"]}
    for name, array in arrays.items():
        assert array.shape == want[name].shape, name
        assert array.tobytes() == want[name].tobytes(), name
        assert entries[name]["sha256"] == hashlib.sha256(array.tobytes()).hexdigest(), name
    again = client.post(f"/v1/weights?format={fmt}", json=GREENHOUSE)
    assert again.content == got.content  # whole bodies are byte-identical
    assert again.headers["etag"] == got.headers["etag"]


def test_default_format_is_npz_and_formats_agree(client: TestClient) -> None:
    # npz is the one default of service, client, command line and adapters (docs/formats.md).
    default = client.post("/v1/weights", json=GREENHOUSE)
    assert default.headers["content-type"].startswith("application/zip")
    _, from_npz = read_npz_weights(default.content)
    _, from_json = read_json_weights(
        client.post("/v1/weights?format=json", json=GREENHOUSE).content
    )
    for name in from_json:
        assert from_json[name].tobytes() == from_npz[name].tobytes()


@pytest.mark.parametrize("dtype", ["float64", "float16", "bfloat16"])
def test_weights_other_dtypes_and_layout(client: TestClient, dtype: str) -> None:
    request = {**GREENHOUSE, "dtype": dtype, "layout": "in_out"}
    got = client.post("/v1/weights?format=npz", json=request)
    assert got.status_code == 200, got.text
    _, arrays = read_npz_weights(got.content)
    want = expected_arrays(request)
    for name, array in arrays.items():
        assert array.dtype == np_dtype(dtype), name
        assert array.tobytes() == want[name].tobytes(), name


def test_weights_etag_304_generates_nothing(
    client: TestClient, monkeypatch: pytest.MonkeyPatch
) -> None:
    first = client.post("/v1/weights?format=safetensors", json=GREENHOUSE)
    etag = first.headers["etag"]
    for fmt in ("json", "npz"):  # the format is part of the tag
        other = client.post(f"/v1/weights?format={fmt}", json=GREENHOUSE)
        assert other.headers["etag"] != etag
    import seedbed.web.weights_response as encoding

    calls: list[str] = []
    real = encoding.iter_tensor_bytes

    def counting(*args: Any, **kwargs: Any) -> Iterator[bytes]:
        calls.append("generate")
        return real(*args, **kwargs)

    monkeypatch.setattr(encoding, "iter_tensor_bytes", counting)
    cached = client.post(
        "/v1/weights?format=safetensors",
        json=GREENHOUSE,
        headers={"if-none-match": f'"something-else", W/{etag.removeprefix("W/")}'},
    )
    assert cached.status_code == 304 and cached.content == b""
    assert cached.headers["etag"] == etag
    assert calls == []
    fresh = client.post(
        "/v1/weights?format=safetensors", json=GREENHOUSE, headers={"if-none-match": '"nope"'}
    )
    assert fresh.status_code == 200 and fresh.content == first.content and calls


def test_weak_etag_only_when_bytes_may_vary_by_platform(client: TestClient) -> None:
    # GREENHOUSE has recurrent weights, planned as orthogonal: `reproducible: platform`.
    plan = build_plan(GREENHOUSE)
    platform = [t.tensor for t in plan.tensors if t.reproducible == "platform"]
    exact = [t.tensor for t in plan.tensors if t.reproducible == "exact"]
    assert platform and exact
    whole = client.post("/v1/weights?format=npz", json=GREENHOUSE).headers["etag"]
    assert whole.startswith('W/"')
    one = client.post(f"/v1/weights?format=npz&tensor={platform[0]}", json=GREENHOUSE)
    assert one.headers["etag"].startswith('W/"')
    other = client.post(f"/v1/weights?format=npz&tensor={exact[0]}", json=GREENHOUSE)
    assert other.headers["etag"].startswith('"')
    cached = client.post(
        "/v1/weights?format=npz", json=GREENHOUSE, headers={"if-none-match": whole}
    )
    assert cached.status_code == 304


def test_catalog(client: TestClient) -> None:
    got = client.get("/v1/catalog")
    assert got.status_code == 200
    assert isinstance(got.json(), dict) and got.json()
    cached = client.get("/v1/catalog", headers={"if-none-match": got.headers["etag"]})
    assert cached.status_code == 304 and cached.content == b""


def test_request_id_echo(client: TestClient) -> None:
    mine = client.get("/healthz", headers={"x-request-id": "nightly-run.42"})
    assert mine.headers["x-request-id"] == "nightly-run.42"
    for bad in ("has space", "x" * 200, "semi;colon", ""):
        got = client.get("/healthz", headers={"x-request-id": bad})
        rid = got.headers["x-request-id"]
        assert rid != bad and len(rid) == 32 and int(rid, 16) >= 0
    a, b = client.get("/healthz"), client.get("/healthz")
    assert a.headers["x-request-id"] != b.headers["x-request-id"]
    # Errors carry the id too.
    assert client.get("/nowhere", headers={"x-request-id": "r-1"}).headers["x-request-id"] == "r-1"


def test_access_log_one_structured_line(
    client: TestClient, caplog: pytest.LogCaptureFixture
) -> None:
    caplog.set_level(logging.INFO, logger="seedbed.access")
    got = client.post("/v1/plan", json=GREENHOUSE, headers={"x-request-id": "log-check-7"})
    lines = [
        r
        for r in caplog.records
        if r.name == "seedbed.access"
        and getattr(r, "fields", {}).get("request_id") == "log-check-7"
    ]
    assert len(lines) == 1
    fields = lines[0].fields  # type: ignore[attr-defined]
    assert fields["method"] == "POST" and fields["path"] == "/v1/plan"
    assert fields["status"] == 200 and fields["bytes"] == len(got.content)
    assert fields["duration_ms"] >= 0
    from seedbed.web.logs import JsonLineFormatter

    rendered = json.loads(JsonLineFormatter().format(lines[0]))
    assert rendered["request_id"] == "log-check-7" and rendered["status"] == 200


def _samples(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for family in text_string_to_metric_families(text):
        for s in family.samples:
            out[(s.name, tuple(sorted(s.labels.items())))] = s.value
    return out


def test_metrics_counters_move(client: TestClient) -> None:
    before = _samples(client.get("/metrics").text)
    client.post("/v1/weights?format=npz", json=GREENHOUSE)
    client.get("/nowhere")
    after = _samples(client.get("/metrics").text)

    def delta(name: str, **labels: str) -> float:
        key = (name, tuple(sorted(labels.items())))
        return after.get(key, 0.0) - before.get(key, 0.0)

    assert (
        delta("seedbed_http_requests_total", route="/v1/weights", method="POST", status="200") == 1
    )
    assert delta("seedbed_http_requests_total", route="unmatched", method="GET", status="404") == 1
    assert (
        delta("seedbed_weight_values_served_total", format="npz")
        == build_plan(GREENHOUSE).total_count
    )
    assert delta("seedbed_http_request_duration_seconds_count", route="/v1/weights") == 1
    assert delta("seedbed_http_response_body_bytes_total", route="/v1/weights") > 0


def test_two_apps_do_not_share_metrics() -> None:
    with TestClient(create_app(Settings())) as a, TestClient(create_app(Settings())) as b:
        a.get("/healthz")
        a.get("/healthz")
        count_b = _samples(b.get("/metrics").text).get(
            (
                "seedbed_http_requests_total",
                (("method", "GET"), ("route", "/healthz"), ("status", "200")),
            ),
            0.0,
        )
        assert count_b == 0


def test_unexpected_error_is_a_500_in_the_common_shape(
    caplog: pytest.LogCaptureFixture,
) -> None:
    app = create_app(Settings())

    async def explode() -> None:
        raise RuntimeError("deliberate failure for the test")

    app.add_api_route("/test-explode", explode, methods=["GET"])
    caplog.set_level(logging.ERROR, logger="seedbed.errors")
    with TestClient(app) as c:
        got = c.get("/test-explode", headers={"x-request-id": "boom-1"})
        assert got.status_code == 500
        err = got.json()["error"]
        assert err["code"] == "internal_error" and "boom-1" in err["message"]
        assert "deliberate" not in got.text  # internals stay in the log
        assert c.get("/healthz").status_code == 200  # and the service carries on
    logged = [r for r in caplog.records if getattr(r, "fields", {}).get("request_id") == "boom-1"]
    assert logged and logged[0].exc_info is not None
