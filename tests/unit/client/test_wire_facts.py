"""The wire facts module: standard library only, the service's vocabulary and limits, and the
client's local refusals agreeing with the service's (every request the client refuses before
sending, the service refuses with the same codes)."""

from __future__ import annotations

import ast
import dataclasses
import sys
from pathlib import Path
from typing import Any, get_args

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seedbed.core.request import problems as service_problems
from seedbed.core.request import vocabulary
from seedbed.core.request.blocks import BLOCK_MODELS
from seedbed.core.request.layers import LAYER_MODELS
from seedbed.core.request.limits import Limits
from seedbed.core.request.parse import parse
from seedbed.core.request.policy_models import POLICY_MODELS
from seedbed.core.request.problems import RequestRejected
from seedbed.web.routes.weights import WeightsFormat
from seedbed_client import wire, wire_facts
from seedbed_client.limits import RequestLimits, limit_problems


def test_wire_facts_imports_only_the_standard_library() -> None:
    tree = ast.parse(Path(wire_facts.__file__).read_text(encoding="utf-8"))
    imported = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            imported |= {a.name.split(".")[0] for a in node.names}
        elif isinstance(node, ast.ImportFrom) and node.module:
            imported.add(node.module.split(".")[0])
    assert imported, "the walker found no import at all"
    assert imported <= set(sys.stdlib_module_names) | {"__future__"}


def test_the_service_vocabulary_is_the_wire_facts() -> None:
    assert get_args(vocabulary.DType) == wire_facts.DTYPES
    assert get_args(vocabulary.Layout) == wire_facts.LAYOUTS
    assert get_args(vocabulary.Role) == wire_facts.ROLES
    assert get_args(vocabulary.Cell) == wire_facts.CELLS
    assert get_args(vocabulary.WeightMethod) == wire_facts.WEIGHT_METHODS
    assert get_args(vocabulary.Distribution) == wire_facts.DISTRIBUTIONS
    assert get_args(vocabulary.Fan) == wire_facts.FANS
    assert tuple(LAYER_MODELS) == wire_facts.LAYER_KINDS
    assert tuple(BLOCK_MODELS) == wire_facts.BLOCK_KINDS
    assert tuple(POLICY_MODELS) == wire_facts.POLICY_NAMES
    assert get_args(service_problems.ProblemCode) == wire_facts.PROBLEM_CODES
    assert get_args(WeightsFormat) == wire_facts.FORMATS == wire.FORMATS


def test_the_client_limits_are_the_service_limits() -> None:
    assert dataclasses.asdict(RequestLimits()) == dataclasses.asdict(Limits())


def _refusal(body: dict[str, Any]) -> RequestRejected:
    with pytest.raises(RequestRejected) as info:
        parse(body)
    return info.value


def test_a_block_repeated_a_thousand_times_is_refused_on_both_sides_alike() -> None:
    # 1,000 copies of a 5-layer transformer block expand to 5,000 layers, over the default 4,096.
    body = {
        "seed": 1,
        "layers": [
            {"name": "tower", "kind": "transformer_block", "dim": 64, "heads": 4, "mlp_dim": 256,
             "repeat": 1000},
        ],
    }  # fmt: skip
    local = limit_problems(body, RequestLimits())
    service = _refusal(body).problems
    assert [(p.field, p.code, p.message) for p in local] == [
        (p.field, p.code, p.message) for p in service
    ]
    assert local[0].field == "layers[0].repeat" and local[0].code == "too_large"


# --- the property -------------------------------------------------------------------------------

SIZES = st.one_of(st.integers(1, 64), st.integers(1, 1 << 20), st.integers(1, wire_facts.MAX_SIZE))


@st.composite
def layer(draw: st.DrawFn, index: int) -> dict[str, Any]:
    name = draw(st.sampled_from(["l", "layer-" + "x" * 60, "n" * 130])) + f"{index}"
    kind = draw(st.sampled_from(["dense", "conv", "embedding", "recurrent", "attention", "norm",
                                 "transformer_block", "residual_conv_block"]))  # fmt: skip
    if kind == "dense":
        return {"name": name, "kind": kind, "n_in": draw(SIZES), "n_out": draw(SIZES)}
    if kind == "conv":
        kernel = draw(st.lists(st.integers(1, 7), min_size=1, max_size=3))
        return {"name": name, "kind": kind, "channels_in": draw(SIZES),
                "channels_out": draw(SIZES), "kernel": kernel}  # fmt: skip
    if kind == "embedding":
        return {"name": name, "kind": kind, "vocab": draw(SIZES), "dim": draw(SIZES)}
    if kind == "recurrent":
        cell = draw(st.sampled_from(wire_facts.CELLS))
        out = {"name": name, "kind": kind, "cell": cell, "n_in": draw(SIZES),
               "hidden": draw(SIZES)}  # fmt: skip
        if draw(st.booleans()):
            out["init"] = {"method": draw(st.sampled_from(["orthogonal", "glorot"]))}
        return out
    if kind in ("attention", "norm"):
        return {"name": name, "kind": kind, "dim": draw(SIZES)} | (
            {"heads": 1} if kind == "attention" else {}
        )
    repeat = draw(st.one_of(st.integers(1, 4), st.integers(1, 3000)))
    if kind == "transformer_block":
        dim = draw(st.sampled_from([8, 64, 1 << 14, 1 << 16]))
        return {"name": name, "kind": kind, "dim": dim, "heads": 1,
                "mlp_dim": draw(SIZES), "repeat": repeat}  # fmt: skip
    out = {"name": name, "kind": kind, "channels": draw(SIZES), "kernel": [3], "repeat": repeat}
    if draw(st.booleans()):
        out["norm"] = draw(st.sampled_from(["pre", "post"]))
    return out


@st.composite
def request_body(draw: st.DrawFn) -> dict[str, Any]:
    count = draw(st.one_of(st.integers(1, 4), st.integers(4090, 4100)))
    if count > 8:
        # Long layer lists: plain small dense layers, so only the count can be at fault.
        layers = [{"name": f"d{i}", "kind": "dense", "n_in": 2, "n_out": 2} for i in range(count)]
    else:
        layers = [draw(layer(i)) for i in range(count)]
    return {"seed": 1, "layers": layers}


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(request_body())
def test_every_local_refusal_is_a_service_refusal_with_the_same_codes(
    body: dict[str, Any],
) -> None:
    local = limit_problems(body, RequestLimits())
    if not local:
        return
    service = _refusal(body).problems
    assert {p.code for p in local} <= {p.code for p in service}
