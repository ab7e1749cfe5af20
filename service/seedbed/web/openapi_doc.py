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


def error_responses(*statuses: int) -> dict[int | str, dict[str, Any]]:
    text = {
        400: "Malformed JSON, NaN/Infinity, duplicate keys or an empty body.",
        404: "No such endpoint.",
        405: "Method not allowed on this path.",
        413: "Too large: the body, the request's element counts, or a JSON response.",
        415: "Content-Type is not application/json.",
        422: "The request or a query parameter is not valid; every problem is listed.",
    }
    return {s: {"model": ErrorDoc, "description": text[s]} for s in statuses}


def _request_schema() -> tuple[dict[str, Any], dict[str, Any]]:
    """(schema of the request body, other component schemas it refers to)."""
    from seedbed.core.spec import NetworkRequest

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
            app.openapi_schema = doc
        return app.openapi_schema

    app.openapi = build  # type: ignore[method-assign]
