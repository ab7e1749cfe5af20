"""A table of bad inputs: each must give a 4xx in the one error shape, with the expected code
and field, and a message that says what is allowed. Nothing here may produce a 500."""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import pytest
from fastapi.testclient import TestClient

from seedbed.core.request.limits import Limits
from seedbed.web import Settings, create_app

# Small limits so the size refusals are cheap to provoke.
LIMITS = Limits(max_layers=6, max_tensor_elements=10_000, max_request_elements=30_000)
SETTINGS = Settings(max_body_bytes=8192, max_json_response_bytes=20_000, limits=LIMITS)

# An invented two-layer network for a bee-hive acoustic monitor.
HIVE: dict[str, Any] = {
    "seed": 5,
    "layers": [
        {"name": "buzz", "kind": "dense", "n_in": 16, "n_out": 8, "activation": "relu"},
        {"name": "queen", "kind": "dense", "n_in": 8, "n_out": 2, "activation": "linear"},
    ],
}
JSON_HEADERS = {"content-type": "application/json"}


def layer(**changes: Any) -> dict[str, Any]:
    return {**HIVE, "layers": [{**HIVE["layers"][0], **changes}]}


@dataclass
class Bad:
    id: str
    status: int
    code: str
    field: str
    body: Any = None  # a dict/list is sent as JSON; bytes are sent as they are
    raw: bytes | None = None
    query: str = ""
    method: str = "POST"
    path: str = "/v1/weights"
    headers: dict[str, str] = field(default_factory=lambda: dict(JSON_HEADERS))


def chunked(data: bytes) -> Iterator[bytes]:
    # A generator body makes the client send it without Content-Length (chunked).
    for i in range(0, len(data), 1000):
        yield data[i : i + 1000]


BIG = json.dumps({**HIVE, "padding": "x" * 9000}).encode()

CASES = [
    # --- the body as bytes ---
    Bad("malformed-json", 400, "invalid_json", "(body)", raw=b'{"seed": 5, "layers": ['),
    Bad("trailing-garbage", 400, "invalid_json", "(body)", raw=b'{"seed": 5} extra'),
    Bad("empty-body", 400, "invalid_json", "(body)", raw=b""),
    Bad(
        "nan",
        400,
        "non_finite_number",
        "(body)",
        raw=b'{"seed": 5, "layers": [{"name": "a", "kind": "dense", "n_in": NaN, "n_out": 2}]}',
    ),
    Bad("infinity", 400, "non_finite_number", "(body)", raw=b'{"seed": Infinity, "layers": []}'),
    Bad("minus-infinity", 400, "non_finite_number", "(body)", raw=b'{"seed": -Infinity}'),
    Bad("duplicate-json-key", 400, "duplicate_key", "(body)", raw=b'{"seed": 5, "seed": 6}'),
    Bad("not-utf8", 400, "invalid_json", "(body)", raw=b'{"seed": "\xff\xfe"}'),
    Bad("deep-nesting", 400, "invalid_json", "(body)", raw=b"[" * 1500 + b"]" * 1500),
    Bad(
        "huge-integer-literal",
        400,
        "invalid_json",
        "(body)",
        raw=b'{"seed": ' + b"9" * 5000 + b"}",
        headers={**JSON_HEADERS},
    ),
    Bad(
        "text-plain",
        415,
        "unsupported_media_type",
        "content-type",
        body=HIVE,
        headers={"content-type": "text/plain"},
    ),
    Bad(
        "form-encoded",
        415,
        "unsupported_media_type",
        "content-type",
        raw=b"seed=5",
        headers={"content-type": "application/x-www-form-urlencoded"},
    ),
    Bad("no-content-type", 415, "unsupported_media_type", "content-type", raw=b"{}", headers={}),
    Bad("body-too-large", 413, "body_too_large", "(body)", raw=BIG),
    # --- the request, as the core sees it ---
    Bad("body-is-a-list", 422, "invalid_type", "(body)", body=[HIVE]),
    Bad("missing-layers", 422, "missing_field", "layers", body={"seed": 5}),
    Bad("empty-layers", 422, "invalid_value", "layers", body={**HIVE, "layers": []}),
    Bad("unknown-top-field", 422, "unknown_field", "colour", body={**HIVE, "colour": "red"}),
    Bad("negative-seed", 422, "invalid_value", "seed", body={**HIVE, "seed": -1}),
    Bad("seed-too-big", 422, "invalid_value", "seed", body={**HIVE, "seed": 2**63}),
    Bad("bool-seed", 422, "invalid_type", "seed", body={**HIVE, "seed": True}),
    Bad("long-string-seed", 422, "invalid_value", "seed", body={**HIVE, "seed": "s" * 129}),
    Bad("bad-dtype", 422, "invalid_value", "dtype", body={**HIVE, "dtype": "int8"}),
    Bad("bad-layout", 422, "invalid_value", "layout", body={**HIVE, "layout": "sideways"}),
    Bad("unknown-kind", 422, "invalid_value", "layers[0].kind", body=layer(kind="pooling")),
    Bad("zero-size", 422, "invalid_value", "layers[0].n_in", body=layer(n_in=0)),
    Bad("string-size", 422, "invalid_type", "layers[0].n_in", body=layer(n_in="16")),
    Bad("float-size", 422, "invalid_type", "layers[0].n_out", body=layer(n_out=8.5)),
    Bad(
        "unknown-activation",
        422,
        "invalid_value",
        "layers[0].activation",
        body=layer(activation="sparkle"),
    ),
    Bad(
        "duplicate-layer-names",
        422,
        "duplicate_name",
        "layers[1].name",
        body={**HIVE, "layers": [HIVE["layers"][0], {**HIVE["layers"][1], "name": "buzz"}]},
    ),
    Bad(
        "too-many-layers",
        413,
        "too_large",
        "layers",
        body={**HIVE, "layers": [{**HIVE["layers"][0], "name": f"l{i}"} for i in range(7)]},
    ),
    Bad("tensor-too-large", 413, "too_large", "layers[0]", body=layer(n_in=200, n_out=100)),
    Bad(
        "request-too-large",
        413,
        "too_large",
        "layers",
        body={
            **HIVE,
            "layers": [
                {**HIVE["layers"][0], "name": f"l{i}", "n_in": 100 if i else 90, "n_out": 100}
                for i in range(4)
            ],
        },
    ),
    # --- query parameters ---
    Bad("bad-format", 422, "not_allowed", "format", body=HIVE, query="?format=xml"),
    Bad("rows-without-tensor", 422, "needs_tensor", "rows", body=HIVE, query="?rows=0:2"),
    Bad("unknown-tensor", 422, "unknown_tensor", "tensor", body=HIVE, query="?tensor=drone.weight"),
    Bad(
        "rows-reversed",
        422,
        "out_of_range",
        "rows",
        body=HIVE,
        query="?tensor=buzz.weight&rows=5:2",
    ),
    Bad(
        "rows-not-numbers",
        422,
        "invalid_value",
        "rows",
        body=HIVE,
        query="?tensor=buzz.weight&rows=a:b",
    ),
    Bad(
        "rows-past-the-end",
        422,
        "out_of_range",
        "rows",
        body=HIVE,
        query="?tensor=buzz.weight&rows=0:999999",
    ),
    Bad(
        "rows-no-colon", 422, "invalid_value", "rows", body=HIVE, query="?tensor=buzz.weight&rows=3"
    ),
    Bad(
        "rows-negative",
        422,
        "invalid_value",
        "rows",
        body=HIVE,
        query="?tensor=buzz.weight&rows=-1:2",
    ),
    Bad(
        "json-too-large",
        413,
        "json_too_large",
        "format",
        query="?format=json",
        body={**HIVE, "layers": [{**HIVE["layers"][0], "n_in": 90, "n_out": 100}]},
    ),
    # --- routing ---
    Bad("unknown-path", 404, "not_found", "(path)", method="GET", path="/v2/weights"),
    Bad("wrong-method", 405, "method_not_allowed", "(method)", method="GET", path="/v1/plan"),
    Bad("delete-health", 405, "method_not_allowed", "(method)", method="DELETE", path="/healthz"),
]


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(SETTINGS)) as c:
        yield c


def test_the_table_is_big_enough() -> None:
    assert len(CASES) >= 30
    assert len({c.id for c in CASES}) == len(CASES)


def _send(client: TestClient, case: Bad) -> Any:
    content: Any = case.raw
    if content is None and case.body is not None:
        content = json.dumps(case.body).encode()
    return client.request(
        case.method, case.path + case.query, content=content, headers=case.headers
    )


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_input(client: TestClient, case: Bad) -> None:
    got = _send(client, case)
    assert got.status_code == case.status, got.text
    err = got.json()["error"]
    assert set(err) == {"status", "code", "field", "message", "problems"}
    assert err["status"] == case.status
    codes = {(p["code"], p["field"]) for p in err["problems"]}
    assert (case.code, case.field) in codes, err
    assert err["message"] and all(p["message"] for p in err["problems"])
    assert "https://errors.pydantic.dev" not in got.text


def test_size_messages_carry_the_numbers(client: TestClient) -> None:
    case = next(c for c in CASES if c.id == "tensor-too-large")
    message = _send(client, case).json()["error"]["message"]
    assert "20000" in message and "10000" in message
    case = next(c for c in CASES if c.id == "json-too-large")
    message = _send(client, case).json()["error"]["message"]
    assert "20000" in message and "npz" in message and "safetensors" in message


def test_chunked_body_is_cut_at_the_limit(client: TestClient) -> None:
    got = client.post("/v1/plan", content=chunked(BIG), headers=JSON_HEADERS)
    assert got.status_code == 413
    assert got.json()["error"]["code"] == "body_too_large"


def test_declared_length_refused_before_reading(client: TestClient) -> None:
    # The declared length alone is enough: the short body that follows is never needed.
    got = client.post(
        "/v1/plan",
        content=b"{}",
        headers={**JSON_HEADERS, "content-length": "999999999"},
    )
    assert got.status_code == 413 and got.json()["error"]["code"] == "body_too_large"
    assert "999999999" in got.json()["error"]["message"]


def test_several_problems_are_all_listed(client: TestClient) -> None:
    body = {**HIVE, "dtype": "int8", "layout": "sideways"}
    err = client.post("/v1/plan", json=body).json()["error"]
    assert {p["field"] for p in err["problems"]} >= {"dtype", "layout"}
    assert "more problem" in err["message"]


def test_plan_endpoint_uses_the_same_checks(client: TestClient) -> None:
    for case in CASES:
        if case.path != "/v1/weights" or case.query or case.id == "json-too-large":
            continue
        got = client.request("POST", "/v1/plan", content=_send_content(case), headers=case.headers)
        assert got.status_code == case.status, (case.id, got.text)


def _send_content(case: Bad) -> bytes | None:
    if case.raw is not None:
        return case.raw
    return None if case.body is None else json.dumps(case.body).encode()
