"""Every endpoint of the running service, spoken to over loopback HTTP."""

from __future__ import annotations

import math
import re
import time

import httpx
import pytest

from .networks import greenhouse_controller, harbor_crane_monitor

GET_ROUTES = ["/healthz", "/readyz", "/metrics", "/v1/catalog"]


def _metric(text: str, name: str, **labels: str) -> float:
    """Sum of the samples of `name` whose labels include `labels` (Prometheus text format)."""
    total = 0.0
    found = False
    for line in text.splitlines():
        if line.startswith("#") or not line.startswith(name):
            continue
        match = re.fullmatch(r"([A-Za-z_:][A-Za-z0-9_:]*)(\{(.*)\})? (\S+)( \S+)?", line)
        if match is None or match.group(1) != name:
            continue
        have = dict(
            re.findall(r'([A-Za-z_][A-Za-z0-9_]*)="((?:[^"\\]|\\.)*)"', match.group(3) or "")
        )
        if all(have.get(k) == v for k, v in labels.items()):
            total += float(match.group(4))
            found = True
    assert found, f"no sample of {name} with {labels} in /metrics"
    return total


def test_healthz_answers_alive(client: httpx.Client) -> None:
    r = client.get("/healthz")
    assert r.status_code == 200
    assert r.json()["status"] == "alive"
    assert r.headers["content-type"].startswith("application/json")


def test_readyz_reports_the_self_check(client: httpx.Client) -> None:
    r = client.get("/readyz")
    assert r.status_code == 200, r.text
    body = r.json()
    assert body["status"] == "ready"
    assert body["tensors_checked"] > 0 and body["mismatches"] == []
    # The algorithm it proved is the one the weights endpoint reports.
    plan = client.post("/v1/plan", json=greenhouse_controller())
    assert body["algorithm"] == plan.json()["algorithm"] == plan.headers["x-seedbed-algorithm"]


def test_catalog_lists_methods_with_sources(client: httpx.Client) -> None:
    r = client.get("/v1/catalog")
    assert r.status_code == 200
    text = r.text
    doc = r.json()
    assert isinstance(doc, dict) and doc
    # The published methods docs/service.md names must be there with their sources.
    for method in ("glorot", "he", "lecun", "orthogonal"):
        assert method in text, f"catalog does not mention {method}"
    for author in ("Glorot", "He", "Saxe"):
        assert author in text, f"catalog cites no work by {author}"
    for activation in ("relu", "tanh", "selu", "sigmoid"):
        assert activation in text


def test_plan_describes_every_tensor_without_values(client: httpx.Client) -> None:
    request = harbor_crane_monitor()
    r = client.post("/v1/plan", json=request)
    assert r.status_code == 200, r.text
    doc = r.json()
    names = [t["tensor"] for t in doc["tensors"]]
    assert "timeline.recurrent_weight" in names and "focus.query.weight" in names
    assert "operator.weight" in names and "focus.norm.scale" in names
    for entry in doc["tensors"]:
        assert "data" not in entry and "sha256" not in entry
        for key in (
            "layer",
            "shape",
            "dtype",
            "method",
            "fan_in",
            "fan_out",
            "gain",
            "std",
            "bound",
            "reproducible",
            "rationale",
            "references",
        ):
            assert key in entry, f"{entry['tensor']}: plan entry lacks {key}"
    dense = next(t for t in doc["tensors"] if t["tensor"] == "alarm.weight")
    assert dense["shape"] == [3, 24]  # out_in: (n_out, n_in), as docs/architecture.md fixes it
    conv = next(t for t in doc["tensors"] if t["tensor"] == "trace.grouped.weight")
    assert conv["shape"] == [16, 4, 3]  # (out, in/groups, kernel)


def test_plan_for_a_relu_layer_states_the_he_scale(client: httpx.Client) -> None:
    # He et al. 2015, eq. 10 [from memory]: std = sqrt(2 / fan_in) for a layer followed by ReLU.
    r = client.post("/v1/plan", json=greenhouse_controller())
    entry = next(t for t in r.json()["tensors"] if t["tensor"] == "sensors.0.weight")
    assert entry["method"] == "he" and entry["fan_in"] == 24
    assert math.isclose(entry["std"], math.sqrt(2 / 24), rel_tol=1e-12)
    assert "He" in " ".join(entry["references"])


def test_in_out_layout_transposes_the_plan_shapes(client: httpx.Client) -> None:
    r = client.post("/v1/plan", json=greenhouse_controller(layout="in_out"))
    entry = next(t for t in r.json()["tensors"] if t["tensor"] == "setpoints.weight")
    assert entry["shape"] == [40, 6]


@pytest.mark.parametrize("path", GET_ROUTES)
def test_head_gives_the_get_headers_without_a_body(client: httpx.Client, path: str) -> None:
    got = client.get(path)
    head = client.head(path)
    assert head.status_code == got.status_code
    assert head.content == b""
    assert head.headers["content-type"] == got.headers["content-type"]
    if path != "/metrics":  # the metrics text changes between two scrapes; its length may too
        assert head.headers["content-length"] == got.headers["content-length"]
    assert head.headers.get("etag") == got.headers.get("etag")


def test_request_id_is_echoed_or_made_up(client: httpx.Client) -> None:
    mine = client.get("/healthz", headers={"X-Request-ID": "e2e-probe.0042"})
    assert mine.headers["x-request-id"] == "e2e-probe.0042"
    made = client.get("/healthz", headers={"X-Request-ID": "not ok\tid"})
    assert made.headers["x-request-id"] not in ("", "not ok\tid")


def test_unknown_path_and_method_use_the_error_shape(client: httpx.Client) -> None:
    missing = client.get("/v1/no-such-thing")
    assert missing.status_code == 404
    assert missing.json()["error"]["status"] == 404
    wrong = client.delete("/v1/plan")
    assert wrong.status_code == 405
    assert "POST" in wrong.headers["allow"]
    err = wrong.json()["error"]
    assert err["status"] == 405 and "POST" in err["message"]


def test_metrics_count_requests_bytes_and_values(client: httpx.Client) -> None:
    scrape = client.get("/metrics")
    assert scrape.status_code == 200
    assert scrape.headers["content-type"].startswith("text/plain")
    before = _settled_metrics(client)
    request = greenhouse_controller()
    body = client.post("/v1/weights", params={"format": "npz"}, json=request)
    body.raise_for_status()
    after = _settled_metrics(client)
    ok = {"route": "/v1/weights", "method": "POST", "status": "200"}
    requests_name = "seedbed_http_requests_total"
    assert _metric(after, requests_name, **ok) == _metric_or_zero(before, requests_name, **ok) + 1
    sent = "seedbed_http_response_body_bytes_total"
    route = {"route": "/v1/weights"}
    grew = _metric(after, sent, **route) - _metric_or_zero(before, sent, **route)
    assert grew == len(body.content)
    values = "seedbed_weight_values_served_total"
    fmt = {"format": "npz"}
    total = 2966  # greenhouse_controller: 8 tensors, 2966 values (shapes in networks.py)
    assert _metric(after, values, **fmt) - _metric_or_zero(before, values, **fmt) == total


def _settled_metrics(client: httpx.Client, timeout: float = 5.0) -> str:
    """/metrics once every earlier request is booked. The bookkeeping runs after a response's
    last byte is handed to the socket, so a client that has read the whole body can scrape a
    moment before it lands; the in-flight gauge (which counts the scrape itself) says when."""
    deadline = time.monotonic() + timeout
    while True:
        text = client.get("/metrics").text
        if _metric(text, "seedbed_http_requests_in_flight") <= 1 or time.monotonic() > deadline:
            return text
        time.sleep(0.02)


def _metric_or_zero(text: str, name: str, **labels: str) -> float:
    try:
        return _metric(text, name, **labels)
    except AssertionError:
        return 0.0
