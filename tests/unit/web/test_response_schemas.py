"""Successful (and documented error) bodies conform to the response schemas of the app's own
OpenAPI document, and those schemas are not vacuous: a body missing a required field, or with
a field of the wrong type, fails them.

The validator is jsonschema's Draft 2020-12 (OpenAPI 3.1 schemas are JSON Schema 2020-12, per
the OpenAPI 3.1.0 specification, sec. 4.8.24 [from memory]); `$ref`s resolve against the whole
document, so `#/components/schemas/...` works as in any OpenAPI tool. The requests are invented
networks of our own.
"""

from __future__ import annotations

import copy
import io
import json
from collections.abc import Iterator
from pathlib import Path
from typing import Any

import jsonschema
import pytest
from fastapi.testclient import TestClient
from referencing import Registry as RefRegistry
from referencing import Resource
from referencing.jsonschema import DRAFT202012

from seedbed.registry import Registry, config_from_env, open_registry
from seedbed.registry.keys import create_key
from seedbed.web import Settings, create_app

DOC_URI = "urn:seedbed:openapi"
JSON = "application/json"

# Invented networks: a kiln-temperature regressor, a transposed-conv upsampler whose stride
# makes the fan an average (4.5), a recurrent parcel-route model, and two depth policies.
KILN = {
    "seed": 31337,
    "layers": [
        {"name": "probe.0", "kind": "dense", "n_in": 12, "n_out": 16, "activation": "relu"},
        {"name": "probe.1", "kind": "dense", "n_in": 16, "n_out": 16, "activation": "tanh"},
        {"name": "celsius", "kind": "dense", "n_in": 16, "n_out": 1, "role": "output"},
    ],
}
UPSAMPLER = {
    "seed": "mural-upscale",
    "dtype": "float16",
    "layout": "in_out",
    "layers": [
        {
            "name": "widen",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 5,
            "kernel": [3],
            "transposed": True,
            "stride": [2],
        },
        {"name": "settle", "kind": "norm", "dim": 5},
    ],
}
PARCELS = {
    "seed": 9,
    "dtype": "float64",
    "layers": [
        {"name": "depots", "kind": "embedding", "vocab": 50, "dim": 8},
        {"name": "route", "kind": "recurrent", "cell": "lstm", "n_in": 8, "hidden": 6},
        {
            "name": "eta",
            "kind": "dense",
            "n_in": 6,
            "n_out": 1,
            "role": "output",
            "init": {"method": "orthogonal"},
        },
    ],
}
FIXUP_STACK = {
    "seed": 4,
    "depth_policy": {"name": "fixup"},
    "layers": [
        {
            "name": "stem",
            "kind": "conv",
            "channels_in": 1,
            "channels_out": 4,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {
            "name": "res",
            "kind": "residual_conv_block",
            "channels": 4,
            "kernel": [3, 3],
            "repeat": 2,
        },
        {"name": "grade", "kind": "dense", "n_in": 4, "n_out": 3, "role": "output"},
    ],
}
DEEP_ENCODER = {
    "seed": 77,
    "depth_policy": {"name": "deepnorm", "architecture": "encoder"},
    "layers": [
        {
            "name": "enc",
            "kind": "transformer_block",
            "dim": 8,
            "heads": 2,
            "mlp_dim": 16,
            "repeat": 2,
        }
    ],
}
REQUESTS = {
    "kiln": KILN,
    "upsampler": UPSAMPLER,
    "parcels": PARCELS,
    "fixup": FIXUP_STACK,
    "deepnorm": DEEP_ENCODER,
}


@pytest.fixture(scope="module")
def data_dir(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Path]:
    path = tmp_path_factory.mktemp("response-schemas")
    with pytest.MonkeyPatch.context() as mp:
        mp.setenv("SEEDBED_DATA_DIR", str(path))
        mp.delenv("SEEDBED_DATABASE_URL", raising=False)
        yield path


@pytest.fixture(scope="module")
def registry(data_dir: Path) -> Iterator[Registry]:
    opened = open_registry(config_from_env({"SEEDBED_DATA_DIR": str(data_dir)}))
    yield opened
    opened.close()


@pytest.fixture(scope="module")
def client(registry: Registry) -> Iterator[TestClient]:
    app = create_app(Settings())
    with TestClient(app) as c:
        app.state.registry = registry
        yield c


@pytest.fixture(scope="module")
def document(client: TestClient) -> dict[str, Any]:
    doc: dict[str, Any] = client.app.openapi()  # type: ignore[attr-defined]
    return doc


def _pointer(*parts: str) -> str:
    return "/".join(p.replace("~", "~0").replace("/", "~1") for p in parts)


class Schema:
    """The schema at one place of the document, able to validate bodies."""

    def __init__(self, document: dict[str, Any], *parts: str) -> None:
        node: Any = document
        for p in parts:
            node = node[p]
        self.raw: dict[str, Any] = node
        resource = Resource.from_contents(document, default_specification=DRAFT202012)
        refs = RefRegistry().with_resource(DOC_URI, resource)
        self.validator = jsonschema.Draft202012Validator(
            {"$ref": f"{DOC_URI}#/{_pointer(*parts)}"}, registry=refs
        )
        self.resolved = self._resolve(document, node)

    @staticmethod
    def _resolve(document: dict[str, Any], node: dict[str, Any]) -> dict[str, Any]:
        while "$ref" in node:
            name = node["$ref"].rsplit("/", 1)[1]
            node = document["components"]["schemas"][name]
        return node

    def check(self, body: Any) -> None:
        errors = sorted(self.validator.iter_errors(body), key=str)
        assert not errors, "\n".join(f"{list(e.absolute_path)}: {e.message}" for e in errors[:5])

    def refuses(self, body: Any) -> bool:
        return not self.validator.is_valid(body)

    def check_required_matter(self, body: dict[str, Any]) -> None:
        """Every required top-level field is needed: without it the body fails."""
        required = self.resolved.get("required", [])
        assert required, "a schema with no required field accepts almost anything"
        for key in required:
            assert key in body, key
            smaller = {k: v for k, v in body.items() if k != key}
            assert self.refuses(smaller), f"a body without {key!r} still passes"


def response_schema(
    document: dict[str, Any], path: str, method: str, status: int, media: str = JSON
) -> Schema:
    return Schema(
        document, "paths", path, method, "responses", str(status), "content", media, "schema"
    )


def _publish_key(registry: Registry, name: str) -> dict[str, str]:
    return {"Authorization": "Bearer " + create_key(registry.engine, name).token}


# --- plan, weights, catalog ------------------------------------------------------------------


@pytest.mark.parametrize("name", sorted(REQUESTS))
def test_plan_bodies_conform(client: TestClient, document: dict[str, Any], name: str) -> None:
    schema = response_schema(document, "/v1/plan", "post", 200)
    got = client.post("/v1/plan", json=REQUESTS[name])
    assert got.status_code == 200, got.text
    body = got.json()
    schema.check(body)
    schema.check_required_matter(body)


def test_plan_entry_schema_is_exact_about_its_fields(
    client: TestClient, document: dict[str, Any]
) -> None:
    schema = response_schema(document, "/v1/plan", "post", 200)
    body = client.post("/v1/plan", json=UPSAMPLER).json()
    widen = body["tensors"][0]
    # The fan of a strided transposed conv is an average: the schema must take 4.5.
    assert widen["fan_in"] == 4.5
    fixed = (
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
    )
    for key in fixed:
        broken = copy.deepcopy(body)
        del broken["tensors"][0][key]
        assert schema.refuses(broken), f"a plan entry without {key!r} still passes"
    for key, wrong in (
        ("fan_in", "4.5"),
        ("reproducible", "mostly"),
        ("dtype", "int8"),
        ("shape", [3.5]),
        ("bound", "none"),
        ("references", "Glorot"),
    ):
        broken = copy.deepcopy(body)
        broken["tensors"][0][key] = wrong
        assert schema.refuses(broken), f"{key}={wrong!r} still passes"
    # Nullable fields take null; open-ended extra keys are allowed.
    loose = copy.deepcopy(body)
    loose["tensors"][0].update(gain=None, std=None, fan_in=None, extra_note="later field")
    schema.check(loose)


@pytest.mark.parametrize("name", sorted(REQUESTS))
def test_json_weights_bodies_conform(
    client: TestClient, document: dict[str, Any], name: str
) -> None:
    schema = response_schema(document, "/v1/weights", "post", 200)
    got = client.post("/v1/weights", params={"format": "json"}, json=REQUESTS[name])
    assert got.status_code == 200, got.text
    body = got.json()
    schema.check(body)
    schema.check_required_matter(body)
    if "depth_policy" in REQUESTS[name]:
        assert body["depth_policy"]["name"] == REQUESTS[name]["depth_policy"]["name"]
    broken = copy.deepcopy(body)
    broken["tensors"][0]["sha256"] = "not-a-digest"
    assert schema.refuses(broken)
    del broken["tensors"][0]["sha256"]
    assert schema.refuses(broken)


def test_json_weights_block_conforms(client: TestClient, document: dict[str, Any]) -> None:
    schema = response_schema(document, "/v1/weights", "post", 200)
    got = client.post(
        "/v1/weights",
        params={"format": "json", "tensor": "probe.1.weight", "rows": "2:9"},
        json=KILN,
    )
    assert got.status_code == 200, got.text
    body = got.json()
    schema.check(body)
    assert body["selection"] == {"tensor": "probe.1.weight", "rows": [2, 9]}
    broken = copy.deepcopy(body)
    broken["selection"]["rows"] = [2]
    assert schema.refuses(broken)
    broken = copy.deepcopy(body)
    broken["tensors"][0]["rows"] = None  # optional, but never null when present
    assert schema.refuses(broken)


def test_catalog_conforms(client: TestClient, document: dict[str, Any]) -> None:
    schema = response_schema(document, "/v1/catalog", "get", 200)
    body = client.get("/v1/catalog").json()
    schema.check(body)
    schema.check_required_matter(body)
    broken = copy.deepcopy(body)
    del broken["activations"][0]["gain"]
    assert schema.refuses(broken)


# --- operations --------------------------------------------------------------------------------


def test_liveness_conforms(client: TestClient, document: dict[str, Any]) -> None:
    schema = response_schema(document, "/healthz", "get", 200)
    body = client.get("/healthz").json()
    schema.check(body)
    schema.check_required_matter(body)
    assert schema.refuses({"status": "dead"})


def test_readiness_conforms_ready_and_not(client: TestClient, document: dict[str, Any]) -> None:
    ready = response_schema(document, "/readyz", "get", 200)
    got = client.get("/readyz")
    assert got.status_code == 200, got.text
    ready.check(got.json())
    ready.check_required_matter(got.json())
    not_ready = response_schema(document, "/readyz", "get", 503)
    # A reference value this machine cannot match: the self-check must report not ready.
    with TestClient(
        create_app(Settings(), reference_digests={"float32-out_in/head.bias": "0" * 64})
    ) as other:
        got = other.get("/readyz")
    assert got.status_code == 503, got.text
    not_ready.check(got.json())
    not_ready.check_required_matter(got.json())
    assert ready.refuses(got.json())  # a not-ready body is not a ready one


# --- diagnose and audit ----------------------------------------------------------------------


@pytest.mark.parametrize(
    "body",
    [
        {"request": KILN, "batch": 16},
        {
            "request": FIXUP_STACK,
            "batch": 4,
            "alternatives": [
                {"label": "all zero", "init": {"method": "constant", "value": 0.0}},
                {"label": "tiny", "init": {"method": "symmetric_uniform", "bound": 1e-4}},
            ],
        },
    ],
    ids=["kiln", "fixup-with-alternatives"],
)
def test_diagnosis_conforms(
    client: TestClient, document: dict[str, Any], body: dict[str, Any]
) -> None:
    schema = response_schema(document, "/v1/diagnose", "post", 200)
    got = client.post("/v1/diagnose", json=body)
    assert got.status_code == 200, got.text
    doc = got.json()
    schema.check(doc)
    schema.check_required_matter(doc)
    broken = copy.deepcopy(doc)
    broken["runs"][0]["verdict"] = "fine"
    assert schema.refuses(broken)
    broken = copy.deepcopy(doc)
    del broken["runs"][0]["layers"][0]["gradient_std"]
    assert schema.refuses(broken)


def test_audit_reports_conform(client: TestClient, document: dict[str, Any]) -> None:
    schema = response_schema(document, "/v1/audit", "post", 200)
    for fmt in ("npz", "safetensors"):
        file = client.post("/v1/weights", params={"format": fmt}, json=PARCELS).content
        raw = client.post(
            "/v1/audit", content=file, headers={"Content-Type": "application/octet-stream"}
        )
        assert raw.status_code == 200, raw.text
        schema.check(raw.json())
        schema.check_required_matter(raw.json())
        form = client.post(
            "/v1/audit",
            files={
                "file": (f"w.{fmt}", io.BytesIO(file), "application/octet-stream"),
                "request": (None, json.dumps(KILN), JSON),  # another network: findings to report
            },
        )
        assert form.status_code == 200, form.text
        schema.check(form.json())
        assert form.json()["findings"]


# --- recipes, and the documented errors ------------------------------------------------------


def test_recipe_bodies_conform(
    client: TestClient, document: dict[str, Any], registry: Registry
) -> None:
    auth = _publish_key(registry, "glaze-lab")
    published = client.post(
        "/v1/recipes",
        headers=auth,
        json={"name": "kiln-probe", "request": KILN, "description": "firing-curve baseline"},
    )
    assert published.status_code == 201, published.text
    # The same request again reuses version 1 (200); a changed one makes version 2.
    again = client.post("/v1/recipes", headers=auth, json={"name": "kiln-probe", "request": KILN})
    client.post(
        "/v1/recipes", headers=auth, json={"name": "kiln-probe", "request": {**KILN, "seed": 2}}
    )
    client.post("/v1/recipes", headers=auth, json={"name": "deep-enc", "request": DEEP_ENCODER})
    cases = [
        ("/v1/recipes", "post", 201, published),
        ("/v1/recipes", "post", 200, again),
        ("/v1/recipes/{name}/{version}", "get", 200, client.get("/v1/recipes/kiln-probe/latest")),
        ("/v1/recipes", "get", 200, client.get("/v1/recipes", params={"limit": 1})),
        ("/v1/recipes/{name}", "get", 200, client.get("/v1/recipes/kiln-probe")),
        ("/v1/recipes/{name}/{version}", "get", 200, client.get("/v1/recipes/kiln-probe/2")),
        ("/v1/recipes/{name}/{version}", "get", 200, client.get("/v1/recipes/deep-enc/1")),
        (
            "/v1/recipes/{name}/{version}/weights",
            "get",
            200,
            client.get("/v1/recipes/deep-enc/1/weights?format=json"),
        ),
    ]
    for path, method, status, got in cases:
        assert got.status_code == status, (path, got.text)
        schema = response_schema(document, path, method, status)
        schema.check(got.json())
        schema.check_required_matter(got.json())
    page = client.get("/v1/recipes", params={"limit": 1}).json()
    assert page["next_after"] == "deep-enc"  # a second page exists: a string, not null
    version_schema = response_schema(document, "/v1/recipes/{name}/{version}", "get", 200)
    stored = client.get("/v1/recipes/kiln-probe/1").json()
    broken = copy.deepcopy(stored)
    del broken["plan"]["tensors"][0]["std"]
    assert version_schema.refuses(broken)
    broken = copy.deepcopy(stored)
    broken["links"]["mirror"] = "/elsewhere"  # links are a closed set
    assert version_schema.refuses(broken)


def test_documented_errors_use_the_common_shape(
    client: TestClient, document: dict[str, Any], registry: Registry
) -> None:
    cases = [
        ("/v1/recipes/{name}", "get", 404, client.get("/v1/recipes/no-such-kiln")),
        ("/v1/recipes/{name}/{version}", "get", 404, client.get("/v1/recipes/kiln-probe/999")),
        (
            "/v1/recipes/{name}/{version}/weights",
            "get",
            404,
            client.get("/v1/recipes/no-such-kiln/1/weights"),
        ),
        (
            "/v1/recipes",
            "post",
            401,
            client.post("/v1/recipes", json={"name": "x", "request": KILN}),
        ),
        ("/v1/plan", "post", 422, client.post("/v1/plan", json={"seed": 1, "layers": []})),
    ]
    for path, method, status, got in cases:
        assert got.status_code == status, (path, got.text)
        schema = response_schema(document, path, method, status)
        schema.check(got.json())
        schema.check_required_matter(got.json())
    # 404 (unknown path) and 405 (known path, other method) are shared responses.
    responses = document["components"]["responses"]
    for name, got in (
        ("NotFound", client.get("/v1/kilns")),
        ("MethodNotAllowed", client.delete("/v1/plan")),
    ):
        assert got.status_code == (404 if name == "NotFound" else 405)
        schema = Schema(document, "components", "responses", name, "content", JSON, "schema")
        schema.check(got.json())
        assert schema.refuses({"error": {"status": got.status_code}})
    assert "Allow" in responses["MethodNotAllowed"]["headers"]


def test_every_json_success_has_a_schema(document: dict[str, Any]) -> None:
    """No 2xx JSON response of a GET/POST operation is left as an empty schema."""
    for path, item in document["paths"].items():
        for method, op in item.items():
            if method == "head":
                continue  # a HEAD answer has no body to describe
            for status, response in op["responses"].items():
                if not status.startswith("2"):
                    continue
                for media, content in response.get("content", {}).items():
                    if media == JSON:
                        schema = content.get("schema", {})
                        assert "$ref" in schema, (path, method, status, schema)
