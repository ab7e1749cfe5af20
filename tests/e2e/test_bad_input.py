"""Bad requests over the wire: each is refused with a 4xx in the one error shape, naming the field,
and the service keeps answering afterwards."""

from __future__ import annotations

import dataclasses
import json
import socket
from collections.abc import Iterator
from dataclasses import dataclass
from typing import Any

import httpx
import pytest

from .networks import greenhouse_controller, single_dense

JSON = {"Content-Type": "application/json"}
# The service's default limits (seedbed_client.wire_facts): 1 MiB bodies, 4096 layers, 2**28
# elements per tensor, 64 MiB JSON responses.
MAX_BODY = 1 << 20


@dataclass(frozen=True)
class Bad:
    label: str
    status: int
    field: str
    code: str | None = None
    path: str = "/v1/weights"
    params: dict[str, str] = dataclasses.field(default_factory=dict)
    body: Any = None  # a JSON-ready object, sent with json=
    raw: bytes | None = None  # or exact bytes
    headers: dict[str, str] = dataclasses.field(default_factory=lambda: dict(JSON))


def _layer(**changes: Any) -> dict[str, Any]:
    base = {"name": "probe", "kind": "dense", "n_in": 8, "n_out": 4, "activation": "relu"}
    return {"seed": 1, "layers": [{**base, **changes}]}


def _padded(size: int) -> bytes:
    # A valid request made large by a long (ignored-or-refused) string: only the size matters.
    head = (
        b'{"seed": 1, "layers": [{"name": "x", "kind": "dense", "n_in": 2, "n_out": 2}], "pad": "'
    )
    return head + b"p" * (size - len(head) - 2) + b'"}'


GREEN = greenhouse_controller()
CASES: list[Bad] = [
    Bad("malformed json", 400, "(body)", "invalid_json", raw=b'{"seed": 1, "layers": ['),
    Bad("trailing garbage", 400, "(body)", "invalid_json", raw=b'{"seed": 1}}'),
    Bad("empty body", 400, "(body)", "invalid_json", raw=b""),
    Bad(
        "NaN literal",
        400,
        "(body)",
        "non_finite_number",
        raw=b'{"seed": 1, "layers": [{"name": "a", "kind": "dense", "n_in": 4, "n_out": 3,'
        b' "activation": "leaky_relu", "activation_param": NaN}]}',
    ),
    Bad(
        "Infinity literal",
        400,
        "(body)",
        "non_finite_number",
        raw=b'{"seed": 1, "layers": [{"name": "a", "kind": "dense", "n_in": 4, "n_out": 3,'
        b' "init": {"method": "constant", "value": -Infinity}}]}',
    ),
    Bad(
        "duplicate key", 400, "(body)", "duplicate_key", raw=b'{"seed": 1, "seed": 2, "layers": []}'
    ),
    Bad("not utf-8", 400, "(body)", "invalid_json", raw=b'{"seed": "\xff\xfe"}'),
    Bad("nested too deep", 400, "(body)", "invalid_json", raw=b"[" * 200_000 + b"]" * 200_000),
    Bad(
        "integer with 5000 digits",
        400,
        "(body)",
        "invalid_json",
        raw=b'{"seed": 1, "layers": [{"name": "a", "kind": "dense", "n_in": '
        + b"9" * 5000
        + b', "n_out": 3}]}',
    ),
    Bad(
        "wrong content type",
        415,
        "content-type",
        "unsupported_media_type",
        raw=json.dumps(GREEN).encode(),
        headers={"Content-Type": "text/plain"},
    ),
    Bad(
        "body over the limit (Content-Length)",
        413,
        "(body)",
        "body_too_large",
        raw=_padded(MAX_BODY + 4096),
    ),
    Bad("top level is a list", 422, "(body)", path="/v1/plan", body=[GREEN]),
    Bad("layers missing", 422, "layers", path="/v1/plan", body={"seed": 1}),
    Bad("no layers", 422, "layers", path="/v1/plan", body={"seed": 1, "layers": []}),
    Bad(
        "too many layers",
        413,
        "layers",
        "too_large",
        path="/v1/plan",
        body={
            "seed": 1,
            "layers": [{"name": f"l{i}", "kind": "norm", "dim": 2} for i in range(5000)],
        },
    ),
    Bad("negative seed", 422, "seed", path="/v1/plan", body={**GREEN, "seed": -1}),
    Bad("boolean seed", 422, "seed", path="/v1/plan", body={**GREEN, "seed": True}),
    Bad("seed too big", 422, "seed", path="/v1/plan", body={**GREEN, "seed": 2**63}),
    Bad("unknown dtype", 422, "dtype", path="/v1/plan", body={**GREEN, "dtype": "int8"}),
    Bad("unknown layout", 422, "layout", path="/v1/plan", body={**GREEN, "layout": "cols"}),
    Bad("unknown kind", 422, "layers[0].kind", path="/v1/plan", body=_layer(kind="pool")),
    Bad(
        "unknown activation",
        422,
        "layers[0].activation",
        path="/v1/plan",
        body=_layer(activation="swishy"),
    ),
    Bad("zero width", 422, "layers[0].n_out", path="/v1/plan", body=_layer(n_out=0)),
    Bad("string width", 422, "layers[0].n_in", path="/v1/plan", body=_layer(n_in="8")),
    Bad("unknown layer field", 422, "layers[0].colour", path="/v1/plan", body=_layer(colour="red")),
    Bad(
        "duplicate layer names",
        422,
        "layers[1].name",
        path="/v1/plan",
        body={"seed": 1, "layers": [_layer()["layers"][0], _layer()["layers"][0]]},
    ),
    Bad(
        "unknown init method",
        422,
        "layers[0].init.method",
        path="/v1/plan",
        body=_layer(init={"method": "lucky"}),
    ),
    Bad(
        "tensor over the element limit",
        413,
        "layers[0]",
        "too_large",
        body=single_dense(32768, 32768),
    ),
    Bad(
        "request over the element limit",
        413,
        "layers",
        "too_large",
        body={
            "seed": 1,
            "layers": [
                {"name": f"wide{i}", "kind": "dense", "n_in": 16384, "n_out": 16384, "bias": False}
                for i in range(5)
            ],
        },
    ),
    Bad(
        "orthogonal too large",
        413,
        "layers[0].init.method",
        "too_large",
        path="/v1/plan",
        body=_layer(n_in=9000, n_out=9000, init={"method": "orthogonal"}),
    ),
    Bad(
        "json response too large",
        413,
        "format",
        "json_too_large",
        params={"format": "json"},
        body=single_dense(8192, 4096),
    ),
    Bad("bad format", 422, "format", params={"format": "hdf5"}, body=GREEN),
    Bad(
        "unknown tensor",
        422,
        "tensor",
        "unknown_tensor",
        params={"tensor": "sensors.9.weight"},
        body=GREEN,
    ),
    Bad("rows without tensor", 422, "rows", params={"rows": "0:2"}, body=GREEN),
    Bad(
        "rows reversed",
        422,
        "rows",
        params={"tensor": "sensors.0.weight", "rows": "5:2"},
        body=GREEN,
    ),
    Bad(
        "rows empty", 422, "rows", params={"tensor": "sensors.0.weight", "rows": "2:2"}, body=GREEN
    ),
    Bad(
        "rows not numbers",
        422,
        "rows",
        params={"tensor": "sensors.0.weight", "rows": "a:b"},
        body=GREEN,
    ),
    Bad(
        "rows past the end",
        422,
        "rows",
        params={"tensor": "sensors.0.weight", "rows": "0:999999"},
        body=GREEN,
    ),
    Bad(
        "rows negative",
        422,
        "rows",
        params={"tensor": "sensors.0.weight", "rows": "-1:2"},
        body=GREEN,
    ),
    Bad(
        "rows one number",
        422,
        "rows",
        params={"tensor": "sensors.0.weight", "rows": "3"},
        body=GREEN,
    ),
]


def _send(client: httpx.Client, case: Bad) -> httpx.Response:
    if case.raw is not None:
        return client.post(case.path, params=case.params, content=case.raw, headers=case.headers)
    return client.post(case.path, params=case.params, json=case.body, headers=case.headers)


def _check_error(r: httpx.Response, status: int, field: str, code: str | None) -> None:
    assert r.status_code == status, f"want {status}, got {r.status_code}: {r.text[:500]}"
    assert r.headers["content-type"].startswith("application/json")
    err = r.json()["error"]
    assert err["status"] == status
    assert err["field"] == field, f"want field {field!r}: {err}"
    if code is not None:
        assert err["code"] == code, err
    assert isinstance(err["message"], str) and len(err["message"]) > 10
    assert err["problems"] and all(set(p) == {"field", "code", "message"} for p in err["problems"])


@pytest.mark.parametrize("case", CASES, ids=[c.label for c in CASES])
def test_bad_request_is_refused_naming_the_field(client: httpx.Client, case: Bad) -> None:
    r = _send(client, case)
    _check_error(r, case.status, case.field, case.code)
    assert client.get("/healthz").status_code == 200


def test_limit_messages_carry_the_numbers(client: httpx.Client) -> None:
    r = client.post("/v1/weights", json=single_dense(32768, 32768))
    message = r.json()["error"]["message"]
    assert str(32768 * 32768) in message and str(1 << 28) in message
    r = client.post("/v1/plan", json={"seed": 1, "layers": [{"kind": "norm"}] * 5000})
    message = r.json()["error"]["message"]
    assert "5000" in message and "4096" in message


def test_chunked_body_over_the_limit_is_cut_off(client: httpx.Client) -> None:
    def pieces() -> Iterator[bytes]:
        yield b'{"seed": 1, "layers": [], "pad": "'
        # 1.25 MiB in 64 KiB pieces, no Content-Length: chunked encoding. Only a little past
        # the limit, so what the server leaves unread fits in the socket buffers.
        for _ in range(20):
            yield b"q" * (64 << 10)
        yield b'"}'

    request = client.build_request("POST", "/v1/plan", content=pieces(), headers=JSON)
    assert "content-length" not in request.headers
    assert request.headers.get("transfer-encoding") == "chunked"
    try:
        r = client.send(request)
    except httpx.TransportError as exc:
        pytest.fail(f"the service dropped the connection instead of answering 413: {exc!r}")
    _check_error(r, 413, "(body)", "body_too_large")
    assert client.get("/healthz").status_code == 200


def test_declared_length_over_the_limit_is_refused_before_reading(
    client: httpx.Client,
) -> None:
    # Declare 64 MiB and send only a few bytes. HTTP clients refuse to send a body shorter than
    # its Content-Length, so this goes over a plain socket. A server that waited for the body
    # would never answer (the socket timeout fails the test); one that checks the header first
    # answers 413 at once.
    url = client.base_url
    body = b'{"seed": 1}'
    head = (
        f"POST /v1/plan HTTP/1.1\r\nHost: {url.host}:{url.port}\r\n"
        f"Content-Type: application/json\r\nContent-Length: {64 << 20}\r\n\r\n"
    ).encode("ascii")
    with socket.create_connection((str(url.host), int(url.port or 80)), timeout=10.0) as sock:
        sock.sendall(head + body)
        received = b""
        try:
            while b"\r\n\r\n" not in received or not _complete(received):
                piece = sock.recv(65536)
                if not piece:
                    break
                received += piece
        except TimeoutError:
            pytest.fail(f"no answer within 10 s to a declared 64 MiB body; got {received!r}")
    status_line, _, rest = received.partition(b"\r\n")
    assert status_line.split()[1] == b"413", received[:500]
    payload = json.loads(rest.partition(b"\r\n\r\n")[2])
    assert payload["error"]["field"] == "(body)"
    assert payload["error"]["code"] == "body_too_large"
    assert client.get("/healthz").status_code == 200


def _complete(response: bytes) -> bool:
    head, _, body = response.partition(b"\r\n\r\n")
    for line in head.split(b"\r\n")[1:]:
        name, _, value = line.partition(b":")
        if name.strip().lower() == b"content-length":
            return len(body) >= int(value)
    return False
