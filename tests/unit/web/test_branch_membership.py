"""A layer that cannot sit in a residual branch is refused the same way on every endpoint, and
whatever /v1/plan accepts, /v1/diagnose answers without a server error.

The embedding-in-a-branch request used to crash /v1/diagnose (a broadcast error in the residual
sum) while /v1/plan and /v1/weights answered 200. Outside reference: an embedding maps token
ids to vectors, so its input is not a vector that its output could be added to (common
practice); a residual sum needs equal shapes (He et al. 2016, eq. 1: y = F(x) + x).
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from typing import Any

import pytest
from fastapi.testclient import TestClient
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seedbed.core.diagnostics import DiagnosticLimits, diagnose
from seedbed.core.plan import build_plan
from seedbed.core.request.problems import RequestRejected
from seedbed.web import Settings, create_app

EMBEDDING_IN_BRANCH: dict[str, Any] = {
    "seed": 1,
    "layers": [{"name": "e", "kind": "embedding", "vocab": 100, "dim": 512, "branch": "b"}],
}


@pytest.fixture(scope="module")
def client() -> Iterator[TestClient]:
    with TestClient(create_app(Settings())) as c:
        yield c


def test_every_endpoint_refuses_an_embedding_in_a_branch(client: TestClient) -> None:
    answers = {
        "plan": client.post("/v1/plan", json=EMBEDDING_IN_BRANCH),
        "weights": client.post("/v1/weights", json=EMBEDDING_IN_BRANCH),
        "diagnose": client.post("/v1/diagnose", json={"request": EMBEDDING_IN_BRANCH}),
        "audit": client.post(
            "/v1/audit",
            files={
                "file": ("w.npz", b"PK\x05\x06" + bytes(18), "application/zip"),
                "request": (None, json.dumps(EMBEDDING_IN_BRANCH), "application/json"),
            },
        ),
        "recipes": client.post(
            "/v1/recipes",
            json={"name": "branchy", "request": EMBEDDING_IN_BRANCH},
            headers={"Authorization": "Bearer not-a-key"},
        ),
    }
    prefix = {
        "plan": "",
        "weights": "",
        "diagnose": "request.",
        "audit": "request.",
        "recipes": "request.",
    }
    for name, got in answers.items():
        if name == "recipes" and got.status_code == 401:
            continue  # the key is checked first; the same validation is tested in-process below
        assert got.status_code == 422, (name, got.text)
        fields = {(p["field"], p["code"]) for p in got.json()["error"]["problems"]}
        assert (f"{prefix[name]}layers[0].branch", "not_allowed") in fields, (name, fields)


def test_recipe_validation_refuses_it_too() -> None:
    from seedbed.core.request.limits import Limits
    from seedbed.registry.prepare import validate_body

    with pytest.raises(RequestRejected) as err:
        validate_body({"name": "branchy", "request": EMBEDDING_IN_BRANCH}, Limits())
    assert ("request.layers[0].branch", "not_allowed") in {
        (p.field, p.code) for p in err.value.problems
    }


# --- the property: plan accepts => diagnose never fails with anything but a refusal ----------

_WIDTHS = st.sampled_from([2, 3, 4])
_ACTIVATIONS = st.sampled_from(["linear", "relu", "tanh", "gelu", "sigmoid"])


@st.composite
def _layer(draw: st.DrawFn, name: str, first: bool) -> dict[str, Any]:
    # Diagnostics read token ids only into a first-layer embedding: draw that case often.
    kinds = ["embedding"] * 3 if first else []
    kind = draw(
        st.sampled_from(
            [*kinds, "dense", "dense", "conv", "embedding", "attention", "norm", "recurrent"]
        )
    )
    a, b = draw(_WIDTHS), draw(_WIDTHS)
    layer: dict[str, Any] = {"name": name, "kind": kind}
    if kind == "dense":
        layer.update(n_in=a, n_out=b, activation=draw(_ACTIVATIONS))
    elif kind == "conv":
        layer.update(
            channels_in=a,
            channels_out=b,
            kernel=[draw(st.sampled_from([1, 3]))] * draw(st.integers(1, 2)),
            activation=draw(_ACTIVATIONS),
        )
    elif kind == "embedding":
        layer.update(vocab=draw(st.integers(2, 9)), dim=a)
    elif kind == "attention":
        layer.update(dim=a * 2, heads=2)
    elif kind == "norm":
        layer.update(dim=a)
    else:
        layer.update(cell="gru", n_in=a, hidden=b)
    if draw(st.integers(0, 2)) == 0:
        layer["branch"] = draw(st.sampled_from(["r0", "r1"]))
    return layer


@st.composite
def _request(draw: st.DrawFn) -> dict[str, Any]:
    count = draw(st.integers(1, 5))
    layers = [draw(_layer(f"l{i}", i == 0)) for i in range(count)]
    body: dict[str, Any] = {"seed": draw(st.integers(0, 99)), "layers": layers}
    if draw(st.integers(0, 4)) == 0:
        body["widths"] = "unchecked"
    if count > 1 and draw(st.integers(0, 4)) == 0:
        layers[-1]["reads"] = [layers[0]["name"]]
    return body


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(_request())
def test_whatever_plan_accepts_diagnose_answers_without_crashing(body: dict[str, Any]) -> None:
    try:
        build_plan(body)
    except RequestRejected:
        return
    try:
        diagnose({"request": body, "batch": 4}, diagnostic_limits=DiagnosticLimits())
    except RequestRejected as err:
        assert err.problems  # a refusal with its reasons is an answer, not a crash


def test_the_property_over_http_on_examples_that_used_to_crash(client: TestClient) -> None:
    for body in (
        EMBEDDING_IN_BRANCH,
        {
            "seed": 2,
            "layers": [
                {"name": "a", "kind": "dense", "n_in": 4, "n_out": 4},
                {"name": "e", "kind": "embedding", "vocab": 5, "dim": 4, "branch": "r"},
            ],
        },
    ):
        got = client.post("/v1/diagnose", json={"request": body})
        assert got.status_code < 500, got.text
