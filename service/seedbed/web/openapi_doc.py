"""Pieces of the OpenAPI document that FastAPI cannot infer: the request body (read by hand so
its size and strictness stay under our control), its examples, and the error responses."""

from __future__ import annotations

from typing import Any

from fastapi import FastAPI
from fastapi.openapi.utils import get_openapi

from seedbed.web.errors import ErrorDoc

REQUEST_SCHEMA_NAME = "NetworkRequest"

# Invented demo networks, one per example.
EXAMPLES: dict[str, dict[str, Any]] = {
    "vibration-classifier": {
        "summary": "A small classifier for pump vibration spectra",
        "value": {
            "seed": 20261201,
            "dtype": "float32",
            "layout": "out_in",
            "layers": [
                {
                    "name": "spectrum.0",
                    "kind": "dense",
                    "n_in": 512,
                    "n_out": 128,
                    "activation": "relu",
                },
                {
                    "name": "spectrum.1",
                    "kind": "dense",
                    "n_in": 128,
                    "n_out": 64,
                    "activation": "relu",
                },
                {
                    "name": "verdict",
                    "kind": "dense",
                    "n_in": 64,
                    "n_out": 5,
                    "activation": "linear",
                    "role": "output",
                },
            ],
        },
    },
    "leaf-scanner": {
        "summary": "A convolutional stem for leaf images, weights in (kernel..., in, out) order",
        "value": {
            "seed": "leaf-scanner/run-3",
            "dtype": "bfloat16",
            "layout": "in_out",
            "layers": [
                {
                    "name": "stem",
                    "kind": "conv",
                    "channels_in": 3,
                    "channels_out": 32,
                    "kernel": [5, 5],
                    "activation": "silu",
                },
                {
                    "name": "stage1",
                    "kind": "conv",
                    "channels_in": 32,
                    "channels_out": 32,
                    "kernel": [3, 3],
                    "groups": 4,
                    "activation": "silu",
                },
                {"name": "pool_norm", "kind": "norm", "dim": 32},
            ],
        },
    },
    "tide-forecaster": {
        "summary": "A recurrent tide-level forecaster with an attention read-out",
        "value": {
            "seed": 88,
            "dtype": "float64",
            "layers": [
                {"name": "gauge_codes", "kind": "embedding", "vocab": 300, "dim": 48},
                {"name": "tides", "kind": "recurrent", "cell": "lstm", "n_in": 48, "hidden": 96},
                {"name": "readout", "kind": "attention", "dim": 96, "heads": 4},
            ],
        },
    },
}


def request_body(summary: str) -> dict[str, Any]:
    return {
        "requestBody": {
            "required": True,
            "description": summary,
            "content": {
                "application/json": {
                    "schema": {"$ref": f"#/components/schemas/{REQUEST_SCHEMA_NAME}"},
                    "examples": EXAMPLES,
                }
            },
        }
    }


ERROR_TEXT: dict[int, str] = {
    400: "Malformed JSON, NaN/Infinity, duplicate keys or an empty body.",
    401: "Missing, malformed, unknown or revoked key.",
    404: "No such endpoint.",
    405: "Method not allowed on this path; the Allow header lists the methods that are.",
    409: "This server's generator differs from the one the recipe was published under.",
    413: "Too large: the body, the request's element counts, or a JSON response.",
    415: "Content-Type is not application/json.",
    422: "The request or a query parameter is not valid; every problem is listed.",
    503: "The registry database cannot be reached (Retry-After says when to try again).",
}


def error_responses(*statuses: int, **described: str) -> dict[int | str, dict[str, Any]]:
    """Responses in the common error shape; `described` replaces the usual text of a status,
    keyed `s404` and so on (for what a 404 means on a given path)."""
    out: dict[int | str, dict[str, Any]] = {}
    for s in statuses:
        out[s] = {"model": ErrorDoc, "description": described.get(f"s{s}", ERROR_TEXT[s])}
    return out


# Reusable responses for any path: an unknown path answers 404 and a known path asked with
# another method 405, both in the common shape (seedbed.web.errors). Operations that can
# answer 404 themselves (an unknown recipe) list it among their own responses.
SHARED_ERRORS: dict[str, dict[str, Any]] = {
    "NotFound": {
        "description": "No such endpoint, in the common error shape (field `(path)`, code "
        "`not_found`).",
        "content": {"application/json": {"schema": {"$ref": "#/components/schemas/ErrorDoc"}}},
    },
    "MethodNotAllowed": {
        "description": "The path exists but not with this method, in the common error shape "
        "(field `(method)`, code `method_not_allowed`); the Allow header lists "
        "the methods the path answers.",
        "headers": {
            "Allow": {"schema": {"type": "string"}, "description": "The methods this path answers."}
        },
        "content": {"application/json": {"schema": {"$ref": "#/components/schemas/ErrorDoc"}}},
    },
}


def _request_schema() -> tuple[dict[str, Any], dict[str, Any]]:
    """(schema of the request body, other component schemas it refers to)."""
    from seedbed.core.request.network import NetworkRequest

    schema = NetworkRequest.model_json_schema(
        ref_template="#/components/schemas/{model}", mode="validation"
    )
    defs = schema.pop("$defs", {})
    return schema, defs


def install_openapi(app: FastAPI) -> None:
    def build() -> dict[str, Any]:
        if app.openapi_schema is None:
            doc = get_openapi(
                title=app.title,
                version=app.version,
                description=app.description,
                routes=app.routes,
                tags=app.openapi_tags,
            )
            components = doc.setdefault("components", {}).setdefault("schemas", {})
            schema, defs = _request_schema()
            components.update(defs)
            components[REQUEST_SCHEMA_NAME] = schema
            doc["components"]["schemas"] = dict(sorted(components.items()))
            doc["components"]["responses"] = SHARED_ERRORS
            app.openapi_schema = doc
        return app.openapi_schema

    app.openapi = build  # type: ignore[method-assign]
