"""Invented demo networks the end-to-end tests and the service benchmark send over the wire."""

from __future__ import annotations

import copy
from typing import Any


def greenhouse_controller(dtype: str = "float32", layout: str = "out_in") -> dict[str, Any]:
    """A small controller mapping greenhouse sensor readings to vent and heater set-points."""
    return {
        "seed": "greenhouse/zone-7",
        "dtype": dtype,
        "layout": layout,
        "layers": [
            {"name": "sensors.0", "kind": "dense", "n_in": 24, "n_out": 40, "activation": "relu"},
            {"name": "sensors.1", "kind": "dense", "n_in": 40, "n_out": 40, "activation": "tanh"},
            {"name": "sensors.norm", "kind": "norm", "dim": 40},
            {
                "name": "setpoints",
                "kind": "dense",
                "n_in": 40,
                "n_out": 6,
                "activation": "linear",
                "role": "output",
            },
        ],
    }


def harbor_crane_monitor(dtype: str = "float32") -> dict[str, Any]:
    """Every layer kind once: a crane's load-cell traces (1-D conv), operator codes (embedding),
    a GRU over time and an attention read-out. Shapes are small; the point is coverage."""
    return {
        "seed": 4021,
        "dtype": dtype,
        "layers": [
            {
                "name": "trace.conv",
                "kind": "conv",
                "channels_in": 3,
                "channels_out": 16,
                "kernel": [5],
                "activation": "silu",
            },
            {
                "name": "trace.grouped",
                "kind": "conv",
                "channels_in": 16,
                "channels_out": 16,
                "kernel": [3],
                "groups": 4,
                "activation": "gelu",
            },
            {"name": "operator", "kind": "embedding", "vocab": 57, "dim": 16},
            {"name": "timeline", "kind": "recurrent", "cell": "gru", "n_in": 16, "hidden": 24},
            {"name": "focus", "kind": "attention", "dim": 24, "heads": 4},
            {"name": "focus.norm", "kind": "norm", "dim": 24},
            {
                "name": "alarm",
                "kind": "dense",
                "n_in": 24,
                "n_out": 3,
                "activation": "sigmoid",
                "role": "output",
            },
        ],
    }


def river_gauge_forecaster() -> dict[str, Any]:
    """Twelve layers (the service benchmark's plan request): an upstream-gauge encoder, an LSTM
    over the hydrograph, a residual block and a multi-horizon head."""
    layers: list[dict[str, Any]] = [
        {"name": "gauge.id", "kind": "embedding", "vocab": 420, "dim": 32},
        {
            "name": "rain.conv",
            "kind": "conv",
            "channels_in": 4,
            "channels_out": 32,
            "kernel": [7],
            "activation": "relu",
            "reads": [],  # the rain series: a second input of the network
        },
        {"name": "rain.norm", "kind": "norm", "dim": 32},
        # The two encodings side by side: 32 + 32 features.
        {
            "name": "merge",
            "kind": "dense",
            "n_in": 64,
            "n_out": 96,
            "activation": "gelu",
            "reads": ["gauge.id", "rain.norm"],
        },
        {"name": "hydrograph", "kind": "recurrent", "cell": "lstm", "n_in": 96, "hidden": 128},
        {"name": "context", "kind": "attention", "dim": 128, "heads": 8},
        {"name": "context.norm", "kind": "norm", "dim": 128},
        {"name": "block.up", "kind": "dense", "n_in": 128, "n_out": 512, "activation": "silu"},
        {
            "name": "block.down",
            "kind": "dense",
            "n_in": 512,
            "n_out": 128,
            "activation": "linear",
            "role": "residual_out",
        },
        {"name": "head.0", "kind": "dense", "n_in": 128, "n_out": 64, "activation": "elu"},
        {"name": "head.1", "kind": "dense", "n_in": 64, "n_out": 32, "activation": "tanh"},
        {
            "name": "horizons",
            "kind": "dense",
            "n_in": 32,
            "n_out": 12,
            "activation": "linear",
            "role": "output",
        },
    ]
    return {"seed": 20261202, "dtype": "float32", "layers": layers}


def single_dense(
    n_in: int, n_out: int, *, activation: str = "relu", seed: int = 7
) -> dict[str, Any]:
    """One bias-free dense layer: the simplest way to ask for an exact number of values."""
    return {
        "seed": seed,
        "dtype": "float32",
        "layers": [
            {
                "name": "bulk",
                "kind": "dense",
                "n_in": n_in,
                "n_out": n_out,
                "activation": activation,
                "bias": False,
            }
        ],
    }


def variant(request: dict[str, Any], **changes: Any) -> dict[str, Any]:
    out = copy.deepcopy(request)
    out.update(changes)
    return out
