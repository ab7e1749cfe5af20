"""Verdicts on networks whose fate is known from published analysis.

Outside references:
- He, Zhang, Ren & Sun (2015), eq. 10: with Var[w] = 2/n a ReLU layer keeps the second moment
  of its input, so a deep ReLU MLP keeps its activation scale; with other variances the
  second moment is multiplied by n Var[w] / 2 per layer (the same derivation), which predicts
  the decay of +-0.01 uniform weights (Var[w] = 0.01^2 / 3, a uniform's variance).
- Hanin & Rolnick (2018): at width 1024 and depth 50 the finite-width drift of the scale is
  small (sum of 1/width = 0.049), which is why [0.5, 2] is a fair band here.
- Constant weights make every unit of a layer compute the same function and get the same
  update (common practice, from memory; e.g. Goodfellow, Bengio & Courville 2016, sec. 8.4).
- Sigmoid's slope is at most 1/4 (calculus), so gradients through a sigmoid stack shrink while
  the forward scale is held by the gain (the classic vanishing-gradient case, Glorot & Bengio
  2010, sec. 3 [from memory]).
- Fixup (Zhang et al. 2019) and SkipInit (De & Smith 2020) start residual networks with zero
  branch ends or zero gates by design; that must not read as symmetric or vanishing.
"""

from __future__ import annotations

import itertools
import json
import math
from typing import Any

import pytest

from seedbed.core.diagnostics import diagnose, diagnosis_document

WIDTH, DEPTH = 1024, 50
BOUND = 0.01


def _mlp(width: int, depth: int, act: str = "relu", **extra: Any) -> list[dict[str, Any]]:
    return [
        {
            "name": f"h{i}",
            "kind": "dense",
            "n_in": width,
            "n_out": width,
            "activation": act,
            **extra,
        }
        for i in range(depth)
    ]


@pytest.fixture(scope="module")
def deep_relu() -> dict[str, Any]:
    body = {
        "request": {"seed": "deep-relu-check", "layers": _mlp(WIDTH, DEPTH)},
        "alternatives": [
            {"label": "uniform 0.01", "init": {"method": "symmetric_uniform", "bound": BOUND}},
            {"label": "all constant", "init": {"method": "constant", "value": 0.02}},
        ],
        "batch": 64,
    }
    return diagnosis_document(diagnose(body))


def test_recommended_deep_relu_keeps_its_scale(deep_relu: dict[str, Any]) -> None:
    run = deep_relu["runs"][0]
    assert run["label"] == "recommended" and run["verdict"] == "stable"
    first = run["layers"][0]["activation_std"]
    ratios = [layer["activation_std"] / first for layer in run["layers"]]
    assert len(ratios) == DEPTH
    assert all(0.5 <= r <= 2.0 for r in ratios), (min(ratios), max(ratios))
    assert deep_relu["finite_width"]["sum_inverse_width"] == pytest.approx(DEPTH / WIDTH)


def test_tiny_uniform_vanishes_within_ten_layers(deep_relu: dict[str, Any]) -> None:
    run = deep_relu["runs"][1]
    layers = run["layers"]
    first = layers[0]["activation_std"]
    ratios = [layer["activation_std"] / first for layer in layers[:10]]
    assert min(ratios) < 1e-3
    assert run["verdict"] == "vanishing" and run["failed_quantity"] == "activation_std"
    assert run["failed_index"] < 10 and run["failed_at"] == f"h{run['failed_index']}"
    # He et al. 2015's derivation: each layer multiplies the std by sqrt(n Var[w] / 2)
    predicted = math.sqrt(WIDTH * BOUND**2 / 3 / 2)
    for below, above in itertools.pairwise(layers[1:9]):
        assert above["activation_std"] / below["activation_std"] == pytest.approx(
            predicted, rel=0.1
        )


def test_all_constant_is_symmetric_at_the_first_hidden_layer(deep_relu: dict[str, Any]) -> None:
    run = deep_relu["runs"][2]
    assert run["verdict"] == "symmetric" and run["failed_at"] == "h0"
    first = run["layers"][0]
    assert first["twin_fraction"] == 1.0 and first["locked_twin_fraction"] == 1.0
    assert first["twin_group_count"] == 1 and first["twin_group_sizes"] == [WIDTH]
    assert first["twin_units"][0] == list(range(16))  # listed indices are capped
    assert run["mean_field"] == []  # constant weights are outside the theory's assumptions


def test_the_document_is_strict_json(deep_relu: dict[str, Any]) -> None:
    json.dumps(deep_relu, allow_nan=False)
    assert "Hanin & Rolnick 2018" in deep_relu["notice"]
    assert "not that training will succeed" in deep_relu["notice"]


def _run(request: dict[str, Any], batch: int = 32) -> dict[str, Any]:
    run: dict[str, Any] = diagnosis_document(diagnose({"request": request, "batch": batch}))[
        "runs"
    ][0]
    return run


def test_large_gain_explodes_and_overflow_is_reported_as_null() -> None:
    layers = _mlp(32, 60, init={"method": "he", "gain": 1e5})
    run = _run({"seed": 1, "dtype": "float64", "layers": layers})
    # per layer the std grows by gain * sqrt(1/2) ~ 7e4: past 1e3 at the second layer
    assert run["verdict"] == "exploding" and run["failed_at"] == "h1"
    assert run["failed_quantity"] == "activation_std" and run["failed_ratio"] > 1e3
    assert any(layer["non_finite"] and layer["activation_std"] is None for layer in run["layers"])


def test_sigmoid_stack_vanishes_in_the_gradients_only() -> None:
    run = _run({"seed": 2, "layers": _mlp(64, 24, "sigmoid")})
    first = run["layers"][0]["activation_std"]
    assert all(0.3 < layer["activation_std"] / first < 3 for layer in run["layers"])
    assert run["verdict"] == "vanishing" and run["failed_quantity"] == "gradient_std"
    assert run["failed_ratio"] < 1e-3


def test_fixup_resnet_is_not_symmetric_nor_vanishing() -> None:
    layers = [
        {
            "name": "stem",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 16,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {
            "name": "res",
            "kind": "residual_conv_block",
            "channels": 16,
            "kernel": [3, 3],
            "repeat": 4,
        },
        {
            "name": "cls",
            "kind": "conv",
            "channels_in": 16,
            "channels_out": 10,
            "kernel": [1, 1],
            "role": "output",
        },
    ]
    run = _run({"seed": 4, "layers": layers, "depth_policy": {"name": "fixup"}}, batch=8)
    assert run["verdict"] == "stable", run["reason"]
    ends = [layer for layer in run["layers"] if layer["branch"] and layer["main_path"]]
    assert ends and all(layer["twin_fraction"] == 1.0 for layer in ends)  # zero rows ...
    assert all(layer["locked_twin_fraction"] == 0.0 for layer in ends)  # ... not locked
    assert any("all-zero weights" in note for note in run["verdict_notes"])


def test_skip_gate_transformer_is_stable() -> None:
    layers = [
        {"name": "tok", "kind": "embedding", "vocab": 64, "dim": 32},
        {
            "name": "enc",
            "kind": "transformer_block",
            "dim": 32,
            "heads": 4,
            "mlp_dim": 64,
            "repeat": 3,
        },
        {"name": "head", "kind": "dense", "n_in": 32, "n_out": 64, "role": "output"},
    ]
    run = _run({"seed": 5, "layers": layers, "depth_policy": {"name": "skip_gate"}}, batch=4)
    assert run["verdict"] == "stable", run["reason"]
    inner = [layer for layer in run["layers"] if layer["branch"] and not layer["main_path"]]
    assert inner and all(layer["gradient_std"] == 0.0 for layer in inner)  # gates at 0
    assert all(layer["activation_ratio"] is None for layer in inner)
