"""Residual branches and block shorthands: expansion names and counts, limits, misuse errors."""

from __future__ import annotations

import copy
import json
import math
import re
from pathlib import Path
from typing import Any

import numpy as np
import pytest

from seedbed.core.plan import build_plan, plan_document
from seedbed.core.render import render_rows
from seedbed.core.request.blocks import ResidualConvBlock, TransformerBlock, block_layer_dicts
from seedbed.core.request.branches import branches_of
from seedbed.core.request.layers import LAYER_MODELS, DenseLayer
from seedbed.core.request.limits import Limits
from seedbed.core.request.network import NetworkRequest, canonical_request
from seedbed.core.request.parse import parse
from seedbed.core.request.policy_models import POLICY_MODELS
from seedbed.core.request.problems import RequestRejected

# An invented 48-block pre-norm language model for tide-gauge logs, in a few lines of JSON.
TIDE_LM: dict[str, Any] = {
    "seed": "tide-lm/base",
    "layers": [
        {"name": "codes", "kind": "embedding", "vocab": 512, "dim": 64},
        {"name": "enc", "kind": "transformer_block", "dim": 64, "heads": 4, "mlp_dim": 256,
         "norm": "pre", "repeat": 48},
        {"name": "final_norm", "kind": "norm", "dim": 64},
        {"name": "next_code", "kind": "dense", "n_in": 64, "n_out": 512, "role": "output"},
    ],
}  # fmt: skip


def dense(name: str, n_in: int = 16, n_out: int = 16, **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def block(**extra: Any) -> dict[str, Any]:
    return {"name": "enc", "kind": "transformer_block", "dim": 16, "heads": 2, "mlp_dim": 32,
            **extra}  # fmt: skip


def conv_block(**extra: Any) -> dict[str, Any]:
    return {"name": "res", "kind": "residual_conv_block", "channels": 8, "kernel": [3, 3],
            **extra}  # fmt: skip


def rejected(body: object, limits: Limits | None = None) -> RequestRejected:
    with pytest.raises(RequestRejected) as info:
        parse(body, limits)
    return info.value


def fields(err: RequestRejected) -> list[tuple[str, str]]:
    return [(p.field, p.code) for p in err.problems]


# ---------------------------------------------------------------------------------------------
# Expansion


def test_48_block_transformer_expands_to_documented_names_and_count() -> None:
    request = parse(TIDE_LM).request
    names = [layer.name for layer in request.layers]
    assert len(names) == 1 + 48 * 5 + 2
    parts = ["attn_norm", "attn", "mlp_norm", "mlp_in", "mlp_out"]
    assert names[1:6] == [f"enc.0.{p}" for p in parts]
    assert names[-3] == "enc.47.mlp_out"
    assert len(set(names)) == len(names)
    branches = branches_of(request)
    assert len(branches) == 96
    assert [b.name for b in branches[:2]] == ["enc.0.attn_branch", "enc.0.mlp_branch"]
    assert branches[-1].name == "enc.47.mlp_branch"
    first_attn, first_mlp = branches[0], branches[1]
    # pre-norm: each norm opens its branch; the attention / mlp_out layer closes it
    assert [request.layers[k].name for k in first_attn.indices] == ["enc.0.attn_norm", "enc.0.attn"]
    assert [request.layers[k].name for k in first_mlp.indices] == [
        "enc.0.mlp_norm",
        "enc.0.mlp_in",
        "enc.0.mlp_out",
    ]
    assert request.layers[first_attn.last_map or 0].role == "residual_out"
    assert request.layers[first_mlp.last_map or 0].name == "enc.0.mlp_out"
    mlp_in = request.layers[4]
    assert (mlp_in.kind, mlp_in.activation, mlp_in.block) == ("dense", "gelu", "enc")
    assert (mlp_in.n_in, mlp_in.n_out) == (64, 256)  # type: ignore[union-attr]


def test_expansion_is_visible_in_the_plan_document() -> None:
    doc = plan_document(build_plan(TIDE_LM))
    layers = doc["layers"]
    assert len(layers) == 243
    assert layers[2] == {"name": "enc.0.attn", "kind": "attention",
                         "branch": "enc.0.attn_branch", "activation": "linear",
                         "role": "residual_out", "block": "enc"}  # fmt: skip
    assert layers[0]["block"] is None and layers[0]["branch"] is None
    assert "enc.47.mlp_out.weight" in {t["tensor"] for t in doc["tensors"]}
    assert doc["depth_policy"] is None and doc["multipliers"] == []


def test_post_norm_puts_the_norms_after_the_addition() -> None:
    request = parse({"seed": 1, "layers": [block(norm="post")]}).request
    summary = [(layer.name, layer.branch) for layer in request.layers]
    assert summary == [
        ("enc.0.attn", "enc.0.attn_branch"),
        ("enc.0.attn_norm", None),
        ("enc.0.mlp_in", "enc.0.mlp_branch"),
        ("enc.0.mlp_out", "enc.0.mlp_branch"),
        ("enc.0.mlp_norm", None),
    ]


@pytest.mark.parametrize(
    ("norm", "expected"),
    [
        (None, [("conv1", "relu"), ("conv2", "linear")]),
        ("post", [("conv1", "linear"), ("norm1", "relu"), ("conv2", "linear"),
                  ("norm2", "linear")]),
        ("pre", [("norm1", "relu"), ("conv1", "linear"), ("norm2", "relu"),
                 ("conv2", "linear")]),
    ],
)  # fmt: skip
def test_residual_conv_block_variants(norm: str | None, expected: list[tuple[str, str]]) -> None:
    body = conv_block(repeat=3) if norm is None else conv_block(repeat=3, norm=norm)
    request = parse({"seed": 1, "layers": [body]}).request
    got = [(layer.name, layer.activation) for layer in request.layers[: len(expected)]]
    assert got == [(f"res.0.{part}", act) for part, act in expected]
    assert len(request.layers) == 3 * len(expected)
    assert [b.name for b in branches_of(request)] == [
        "res.0.branch",
        "res.1.branch",
        "res.2.branch",
    ]
    convs = [layer for layer in request.layers if layer.kind == "conv"]
    assert all(c.channels_in == c.channels_out == 8 for c in convs)  # type: ignore[union-attr]
    assert [c.role for c in convs[:2]] == ["hidden", "residual_out"]


def test_shorthand_means_the_same_as_its_expansion_written_out() -> None:
    # The canonical form (the ETag's basis) and every tensor's bytes are those of the expanded
    # layers written by hand: the shorthand is notation, not a different network.
    short = {"seed": 5, "layers": [block(repeat=2, activation="leaky_relu")]}
    written = {
        "seed": 5,
        "layers": block_layer_dicts(
            TransformerBlock.model_validate(block(repeat=2, activation="leaky_relu"))
        ),
    }
    assert canonical_request(parse(short).request) == canonical_request(parse(written).request)
    a, b = build_plan(short), build_plan(written)
    assert a.tensors == b.tensors
    t = a.tensor("enc.1.mlp_in.weight")
    assert np.array_equal(render_rows(a, t), render_rows(b, b.tensor("enc.1.mlp_in.weight")))
    assert parse(short).request.layers[3].activation_param == 0.01  # leaky_relu default slope


def test_canonical_form_round_trips_with_branches() -> None:
    request = parse(TIDE_LM).request
    again = parse(canonical_request(request)).request
    assert again == request


def test_requests_without_structure_keep_their_canonical_form() -> None:
    # Golden digests and ETags of existing requests must not move: absent new fields stay out.
    canon = canonical_request(parse({"seed": 1, "layers": [dense("a")]}).request)
    assert set(canon) == {"seed", "dtype", "layout", "layers"}
    assert "branch" not in canon["layers"][0] and "block" not in canon["layers"][0]


def test_validating_the_model_directly_also_expands() -> None:
    request = NetworkRequest.model_validate({"seed": 1, "layers": [block(repeat=2)]})
    assert len(request.layers) == 10
    assert all(layer.kind in LAYER_MODELS for layer in request.layers)


# ---------------------------------------------------------------------------------------------
# The layer limit counts the expanded layers, from the shorthand's numbers


def test_a_repeat_of_a_billion_is_refused_before_validation(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    def no_validation(*args: Any, **kwargs: Any) -> Any:
        raise AssertionError("validation must not run: the count alone decides")

    monkeypatch.setattr(NetworkRequest, "model_validate", no_validation)
    err = rejected({"seed": 1, "layers": [block(repeat=10**9)]})
    assert fields(err) == [("layers[0].repeat", "too_large")]
    assert "5000000000 layers" in err.problems[0].message and "4096" in err.problems[0].message
    assert err.too_large


def test_expanded_count_boundary() -> None:
    limits = Limits(max_layers=10)
    parse({"seed": 1, "layers": [block(repeat=2)]}, limits)  # exactly 10
    err = rejected({"seed": 1, "layers": [block(repeat=2), dense("head")]}, limits)
    assert fields(err) == [("layers", "too_large")]
    assert "11 layers" in err.problems[0].message
    err = rejected({"seed": 1, "layers": [conv_block(repeat=3, norm="post")]}, limits)
    assert fields(err) == [("layers[0].repeat", "too_large")]  # 12 layers from one block


def test_model_validation_checks_the_expanded_count_too() -> None:
    with pytest.raises(Exception, match="expand to 15 layers"):
        NetworkRequest.model_validate(
            {"seed": 1, "layers": [block(repeat=3)]}, context={"limits": Limits(max_layers=14)}
        )


def test_a_huge_repeat_is_named_without_printing_it() -> None:
    err = rejected({"seed": 1, "layers": [block(repeat=10**40)]})
    assert fields(err) == [("layers[0].repeat", "too_large")]
    assert "10^40" in err.problems[0].message


def test_expanded_names_must_fit_the_name_limit() -> None:
    err = rejected({"seed": 1, "layers": [block(name="n" * 120, repeat=12)]})
    (p,) = err.problems
    assert (p.field, p.code) == ("layers[0].name", "invalid_value")
    assert "shorten the block name" in p.message


# ---------------------------------------------------------------------------------------------
# Block fields


@pytest.mark.parametrize(
    ("change", "field", "code"),
    [
        ({"heads": 3}, "layers[1].heads", "invalid_value"),
        ({"norm": "middle"}, "layers[1].norm", "invalid_value"),
        ({"activation": "softmax"}, "layers[1].activation", "not_allowed"),
        ({"activation": "swish"}, "layers[1].activation", "invalid_value"),
        ({"activation_param": 0.3}, "layers[1].activation_param", "not_allowed"),
        ({"repeat": 0}, "layers[1].repeat", "invalid_value"),
        ({"repeat": "4"}, "layers[1].repeat", "invalid_type"),
        ({"branch": "x"}, "layers[1].branch", "unknown_field"),
        ({"mlp_dim": None}, "layers[1].mlp_dim", "invalid_type"),
    ],
)
def test_block_field_errors_point_at_the_block(
    change: dict[str, Any], field: str, code: str
) -> None:
    err = rejected({"seed": 1, "layers": [dense("stem"), {**block(), **change}]})
    assert (field, code) in fields(err), fields(err)


def test_errors_after_a_block_keep_the_written_index() -> None:
    # The dense layer is layers[1] as written, though it is the 11th layer after expansion.
    err = rejected(
        {"seed": 1, "layers": [block(repeat=2), dense("head", bias=False, bias_init=None, n_out=0)]}
    )
    assert fields(err) == [("layers[1].n_out", "invalid_value")]
    err = rejected(
        {
            "seed": 1,
            "layers": [block(repeat=2), dense("head", init={"method": "he", "std": 1e300})],
            "dtype": "float32",
        }
    )
    assert fields(err) == [("layers[1].init.std", "invalid_value")]


def test_a_name_clash_with_an_expanded_layer_names_both() -> None:
    err = rejected({"seed": 1, "layers": [block(repeat=2), dense("enc.1.mlp_in")]})
    (p,) = err.problems
    assert (p.field, p.code) == ("layers[1].name", "duplicate_name")
    assert "layers[0] (its layer 'enc.1.mlp_in')" in p.message


def test_two_blocks_with_one_name_are_reported_once_per_block() -> None:
    err = rejected({"seed": 1, "layers": [block(repeat=2), block()]})
    names = [p for p in err.problems if p.code == "duplicate_name"]
    assert len(names) == 1 and names[0].field == "layers[1].name"
    assert "expanded from layers[1]" in names[0].message and "more like it" in names[0].message


def test_sizes_of_expanded_layers_are_limited_at_the_block() -> None:
    err = rejected({"seed": 1, "layers": [dense("stem", 8, 32768), block(dim=32768, heads=1)]})
    assert ("layers[1]", "too_large") in fields(err)
    assert "enc.0.attn.query.weight" in err.problems[0].message


# ---------------------------------------------------------------------------------------------
# Branches written by hand


def test_branch_misuse_is_refused_with_the_field() -> None:
    cases: list[tuple[list[dict[str, Any]], tuple[str, str], str]] = [
        ([dense("a", branch="b"), dense("c"), dense("d", branch="b")],
         ("layers[2].branch", "invalid_value"), "already ended at layers[0]"),
        ([dense("a", branch="c"), dense("c")],
         ("layers[0].branch", "invalid_value"), "also the name of layers[1]"),
        ([dense("a", branch="b", role="output")],
         ("layers[0].role", "not_allowed"), "output layer cannot be inside"),
        ([dense("a", branch=".b")], ("layers[0].branch", "invalid_value"), "starting with"),
        ([dense("a", branch="x" * 200)], ("layers[0].branch", "invalid_value"), "128"),
        ([dense("a", branch=7)], ("layers[0].branch", "invalid_type"), "1 to 128 characters"),
    ]  # fmt: skip
    for layers, where, text in cases:
        err = rejected({"seed": 1, "layers": layers})
        assert where in fields(err), (layers, fields(err))
        assert any(text in p.message for p in err.problems), err.problems


@pytest.mark.parametrize(
    ("layers", "field", "numbers"),
    [
        ([dense("a", 16, 32, branch="b"), dense("z", 32, 8, branch="b")],
         "layers[1].n_out", ("16 features", "output 8")),
        ([{"name": "c", "kind": "conv", "channels_in": 8, "channels_out": 4, "kernel": [3],
           "branch": "b"}], "layers[0].channels_out", ("8 features", "output 4")),
        ([dense("a", 16, 16, branch="b"), {"name": "m", "kind": "attention", "dim": 32,
                                           "heads": 4, "branch": "b"}],
         "layers[1].dim", ("16 features", "output 32")),
    ],
)  # fmt: skip
def test_branch_width_mismatch_names_the_output_field(
    layers: list[dict[str, Any]], field: str, numbers: tuple[str, str]
) -> None:
    err = rejected({"seed": 1, "layers": layers})
    (p,) = err.problems
    assert (p.field, p.code) == (field, "invalid_value")
    assert all(n in p.message for n in numbers), p.message


def test_matching_branches_are_accepted_and_found() -> None:
    layers = [dense("stem", 8, 16, activation="relu")]
    for i in range(3):
        layers += [
            dense(f"b{i}.up", 16, 64, activation="relu", branch=f"r{i}"),
            dense(f"b{i}.down", 64, 16, role="residual_out", branch=f"r{i}"),
        ]
    layers.append(dense("head", 16, 2, role="output"))
    request = parse({"seed": 1, "layers": layers}).request
    found = [(b.name, b.start, b.stop, b.maps) for b in branches_of(request)]
    assert found == [("r0", 1, 3, (1, 2)), ("r1", 3, 5, (3, 4)), ("r2", 5, 7, (5, 6))]


def test_an_embedding_cannot_sit_in_a_branch() -> None:
    # It reads token ids, not the branch's input, so its output cannot be added back to it.
    err = rejected(
        {
            "seed": 1,
            "layers": [{"name": "e", "kind": "embedding", "vocab": 10, "dim": 4, "branch": "b"}],
        }
    )
    assert ("layers[0].branch", "not_allowed") in fields(err)


def test_branches_keep_the_drift_estimate_to_the_trunk() -> None:
    # Tiny explicit weights inside 30 branches do not shrink the trunk's signal: the branch
    # adds to it. The same layers outside branches do (plan warning from the drift estimate).
    def body(with_branches: bool) -> dict[str, Any]:
        layers = []
        for i in range(30):
            extra = {"branch": f"r{i}"} if with_branches else {}
            layers.append(
                dense(f"l{i}", activation="relu", init={"method": "he", "std": 0.01}, **extra)
            )
        return {"seed": 1, "layers": layers}

    assert not any("shrinks" in w for w in build_plan(body(True)).warnings)
    assert any("shrinks" in w for w in build_plan(body(False)).warnings)


def test_body_is_not_mutated() -> None:
    body = copy.deepcopy(TIDE_LM)
    parse(body)
    assert body == TIDE_LM


@pytest.mark.parametrize("kind", [{}, [], None, 3, True])
def test_any_json_kind_is_refused_cleanly(kind: object) -> None:
    # Found by the schema fuzz test: an unhashable kind must be a 422, not a crash.
    err = rejected({"seed": 1, "layers": [block(repeat=2), {**block(name="b"), "kind": kind}]})
    assert fields(err)[0][0] == "layers[1].kind"


@pytest.mark.parametrize("name", [{}, [], None, 3])
def test_any_json_policy_name_is_refused_cleanly(name: object) -> None:
    err = rejected({"seed": 1, "layers": [block()], "depth_policy": {"name": name}})
    assert fields(err) == [("depth_policy.name", "invalid_value")]


def test_the_example_in_the_depth_guide_is_valid_and_as_described() -> None:
    text = (Path(__file__).resolve().parents[4] / "docs" / "depth.md").read_text()
    blocks = re.findall(r"```json\n(.*?)```", text, flags=re.S)
    assert blocks
    for raw in blocks:
        body = json.loads(raw)
        request = parse(body).request
        plan = build_plan(body)
        assert len(request.layers) == 243  # as the guide says: 1 + 48 x 5 + 2
        assert len(branches_of(request)) == 96
        assert plan.tensor("enc.47.mlp_out.weight").std == 0.02 / math.sqrt(96)


def test_new_models_explain_every_field_and_examples_are_valid() -> None:
    # The models feed the OpenAPI document: every field needs a description and an example.
    for model in (
        TransformerBlock,
        ResidualConvBlock,
        *POLICY_MODELS.values(),
        NetworkRequest,
        DenseLayer,
    ):
        for name, info in model.model_fields.items():
            assert info.description and info.examples, f"{model.__name__}.{name}"
    for example in NetworkRequest.model_json_schema()["examples"]:
        build_plan(example)
    convnet = {"seed": 1, "layers": [conv_block(repeat=4), dense("head", 8, 2, role="output")]}
    for policy in NetworkRequest.model_fields["depth_policy"].examples or []:
        body = convnet if policy["name"] == "fixup" else TIDE_LM
        parse({**body, "depth_policy": policy})
