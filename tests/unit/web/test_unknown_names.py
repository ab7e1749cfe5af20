"""Names the service does not define are refused with a suggestion, never silently ignored.

Checks: `?formt=npz` used to be dropped and JSON served; now every route refuses a query
parameter it does not declare (422 `unknown_parameter`), enum errors are told in the service's
words listing the allowed values, and body names get a did-you-mean. The synonym swish -> silu
is the published naming of x*sigmoid(x) (Ramachandran et al. 2017 "Swish"; Hendrycks & Gimpel
2016 "SiLU"); case-insensitive matching of ReLU is common practice.
"""

from __future__ import annotations

from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient

from seedbed.web import Settings, create_app

# An invented network: a beehive weight logger.
HIVE: dict[str, Any] = {
    "seed": "hive-scale/3",
    "layers": [
        {"name": "cells", "kind": "dense", "n_in": 12, "n_out": 16, "activation": "relu"},
        {"name": "honey", "kind": "dense", "n_in": 16, "n_out": 1, "role": "output"},
    ],
}


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def error(response: Any) -> dict[str, Any]:
    assert response.status_code == 422, response.text
    got: dict[str, Any] = response.json()["error"]
    return got


def test_a_mistyped_query_parameter_is_refused_with_a_suggestion(client: TestClient) -> None:
    got = error(client.post("/v1/weights?formt=npz", json=HIVE))
    assert (got["field"], got["code"]) == ("formt", "unknown_parameter")
    assert "did you mean 'format'?" in got["message"]
    assert "format, tensor, rows" in got["message"]


@pytest.mark.parametrize(
    ("method", "path"),
    [
        ("POST", "/v1/plan"),
        ("POST", "/v1/diagnose"),
        ("GET", "/v1/catalog"),
        ("GET", "/v1/recipes"),
        ("GET", "/healthz"),
    ],
)
def test_every_route_refuses_parameters_it_does_not_define(
    client: TestClient, method: str, path: str
) -> None:
    body = {"request": HIVE} if path == "/v1/diagnose" else HIVE
    got = error(client.request(method, path + "?seed=7", json=body if method == "POST" else None))
    assert (got["field"], got["code"]) == ("seed", "unknown_parameter")


def test_declared_parameters_still_work(client: TestClient) -> None:
    ok = client.post("/v1/weights?format=npz&tensor=cells.weight&rows=0:2", json=HIVE)
    assert ok.status_code == 200
    assert client.get("/v1/recipes?limit=5").status_code == 200


@pytest.mark.parametrize(
    ("url", "field", "allowed", "meant"),
    [
        ("/v1/weights?format=NPZ", "format", "json, npz, safetensors", "npz"),
        ("/v1/diagnose?chart=SVG", "chart", "svg, html", "svg"),
    ],
)
def test_enum_errors_are_in_our_words(
    client: TestClient, url: str, field: str, allowed: str, meant: str
) -> None:
    body = {"request": HIVE} if "diagnose" in url else HIVE
    got = error(client.post(url, json=body))
    assert got["field"] == field
    assert f"allowed values: {allowed}" in got["message"]
    assert f"did you mean {meant!r}?" in got["message"]
    assert "Input should" not in got["message"]


def layer_with(**fields: Any) -> dict[str, Any]:
    layer = {"name": "cells", "kind": "dense", "n_in": 12, "n_out": 16, **fields}
    return {"seed": 1, "layers": [layer]}


@pytest.mark.parametrize(
    ("body", "field", "meant"),
    [
        (layer_with(activation="ReLU"), "layers[0].activation", "relu"),
        (layer_with(activation="swish"), "layers[0].activation", "silu"),
        (layer_with(activaton="relu"), "layers[0].activaton", "activation"),
        ({**layer_with(), "dtyp": "float16"}, "dtyp", "dtype"),
        ({**layer_with(), "dtype": "Float16"}, "dtype", "float16"),
        (layer_with(kind="Dense"), "layers[0].kind", "dense"),
        (
            layer_with(init={"method": "he", "distributon": "normal"}),
            "layers[0].init.distributon",
            "distribution",
        ),
    ],
)
def test_body_names_get_a_did_you_mean(
    client: TestClient, body: dict[str, Any], field: str, meant: str
) -> None:
    for path in ("/v1/plan", "/v1/weights"):
        got = error(client.post(path, json=body))
        problem = next(p for p in got["problems"] if p["field"] == field)
        assert problem["message"].endswith(f"did you mean {meant!r}?")
    diagnosed = error(client.post("/v1/diagnose", json={"request": body}))
    assert any(
        p["field"] == f"request.{field}" and f"did you mean {meant!r}?" in p["message"]
        for p in diagnosed["problems"]
    )


def test_no_suggestion_when_nothing_is_close(client: TestClient) -> None:
    got = error(client.post("/v1/plan", json=layer_with(activation="quartic")))
    assert "did you mean" not in got["message"]


def test_an_empty_parameter_name_is_named_as_the_query(client: TestClient) -> None:
    # Found by schemathesis: "?=false" used to give an error whose field was empty.
    got = error(client.get("/v1/recipes?=false"))
    assert (got["field"], got["code"]) == ("(query)", "unknown_parameter")
