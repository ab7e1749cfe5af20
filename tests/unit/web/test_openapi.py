"""The committed openapi/openapi.json must be the document the app serves."""

from __future__ import annotations

import json
from pathlib import Path

from seedbed.core.plan import build_plan
from seedbed.web.openapi_export import DEFAULT_PATH, REGENERATE, current_document, render

COMMITTED = Path(__file__).resolve().parents[3] / "openapi" / "openapi.json"


def test_committed_document_is_current() -> None:
    assert DEFAULT_PATH == COMMITTED
    on_disk = COMMITTED.read_text(encoding="utf-8") if COMMITTED.exists() else "<missing>"
    assert on_disk == render(current_document()), (
        f"openapi/openapi.json is out of date; regenerate it with `{REGENERATE}` "
        "(from the repository root, with the venv's python) and commit the result"
    )


def test_operation_ids_and_examples() -> None:
    doc = current_document()
    ids = []
    for path, item in doc["paths"].items():
        for method, op in item.items():
            assert "operationId" in op, (path, method)
            ids.append(op["operationId"])
            body = op.get("requestBody")
            if body is not None:
                # Every body documents at least one worked example (JSON bodies, and the form
                # of the audit upload; raw binary uploads cannot carry one).
                examples = [m.get("examples") for m in body["content"].values()]
                assert any(examples), (path, method)
    assert len(ids) == len(set(ids))
    assert {
        "draftPlan",
        "generateWeights",
        "describeCatalog",
        "probeLiveness",
        "probeReadiness",
        "scrapeMetrics",
    } <= set(ids)
    assert "/v1/audit" in doc["paths"]


def test_examples_are_valid_requests() -> None:
    # Every documented example must be accepted by the core as it is.
    doc = current_document()
    body = doc["paths"]["/v1/weights"]["post"]["requestBody"]
    for name, example in body["content"]["application/json"]["examples"].items():
        plan = build_plan(json.loads(json.dumps(example["value"])))
        assert plan.tensors, name


def test_request_schema_is_included() -> None:
    doc = current_document()
    ref = doc["paths"]["/v1/plan"]["post"]["requestBody"]["content"]["application/json"]["schema"][
        "$ref"
    ]
    name = ref.rsplit("/", 1)[1]
    assert name in doc["components"]["schemas"]
    for ref_name in _refs(doc):
        assert ref_name in doc["components"]["schemas"], ref_name


def _refs(node: object) -> set[str]:
    found: set[str] = set()
    if isinstance(node, dict):
        for k, v in node.items():
            if k == "$ref" and isinstance(v, str):
                found.add(v.rsplit("/", 1)[1])
            else:
                found |= _refs(v)
    elif isinstance(node, list):
        for v in node:
            found |= _refs(v)
    return found
