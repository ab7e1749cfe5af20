"""Invented example networks the compose view offers as starting points."""

from __future__ import annotations

from typing import Any

from seedbed.web.openapi_doc import EXAMPLES

# The README's tour network: a small model reading soil-moisture sensor traces.
MOISTURE_ALARM: dict[str, Any] = {
    "seed": "greenhouse/moisture/v1",
    "dtype": "float32",
    "layers": [
        {"name": "sense", "kind": "dense", "n_in": 64, "n_out": 128, "activation": "relu"},
        {"name": "mix", "kind": "dense", "n_in": 128, "n_out": 128, "activation": "tanh"},
        {
            "name": "alarm",
            "kind": "dense",
            "n_in": 128,
            "n_out": 1,
            "activation": "sigmoid",
            "role": "output",
            "class_prior": 0.02,
        },
    ],
}

# A deeper stack, so the std-per-layer chart and the signal view have a depth to show.
BEEHIVE_ACOUSTICS: dict[str, Any] = {
    "seed": "apiary/hum-detector/2",
    "dtype": "float32",
    "layers": [
        {"name": "hum.0", "kind": "dense", "n_in": 96, "n_out": 160, "activation": "relu"},
        *(
            {"name": f"hum.{i}", "kind": "dense", "n_in": 160, "n_out": 160, "activation": "relu"}
            for i in range(1, 8)
        ),
        {
            "name": "queen_present",
            "kind": "dense",
            "n_in": 160,
            "n_out": 2,
            "activation": "linear",
            "role": "output",
        },
    ],
}

# A transformer stack written as a block shorthand, with a depth policy: the plan gains the
# policy's rationale and the multipliers the training script must apply.
HARBOUR_RADIO: dict[str, Any] = {
    "seed": "harbour-radio/small",
    "layers": [
        {"name": "tokens", "kind": "embedding", "vocab": 2000, "dim": 128},
        {
            "name": "enc",
            "kind": "transformer_block",
            "dim": 128,
            "heads": 4,
            "mlp_dim": 512,
            "norm": "pre",
            "repeat": 6,
        },
        {"name": "final_norm", "kind": "norm", "dim": 128},
        {
            "name": "next_token",
            "kind": "dense",
            "n_in": 128,
            "n_out": 2000,
            "bias": False,
            "role": "output",
        },
    ],
    "depth_policy": {"name": "scaled_residual"},
}


def workbench_examples() -> list[tuple[str, str, dict[str, Any]]]:
    """(key, one-line summary, request) for every example, the tour network first."""
    out: list[tuple[str, str, dict[str, Any]]] = [
        (
            "moisture-alarm",
            "Soil-moisture alarm from sensor traces (the README tour)",
            MOISTURE_ALARM,
        ),
        (
            "beehive-acoustics",
            "A nine-layer ReLU stack listening for a queen bee",
            BEEHIVE_ACOUSTICS,
        ),
        (
            "harbour-radio",
            "A six-block transformer for harbour radio logs, depth policy on",
            HARBOUR_RADIO,
        ),
    ]
    out.extend((key, str(ex["summary"]), ex["value"]) for key, ex in EXAMPLES.items())
    return out
