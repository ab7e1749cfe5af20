"""Depth- and width-aware policies: constants against their papers' formulas, what each policy
does to the plan, and errors that name the field.

Outside sources: the formulas are recomputed here with mpmath or plain float arithmetic (not
the core's code path) and published values worked out by hand are checked beside them; drawn
values are checked statistically against the planned std.
"""

from __future__ import annotations

import json
import math
from typing import Any

import mpmath
import numpy as np
import pytest

from seedbed.core.plan import build_plan, plan_document
from seedbed.core.plan_types import Plan
from seedbed.core.render import render_rows
from seedbed.core.request.parse import parse
from seedbed.core.request.problems import RequestRejected


def dense(name: str, n_in: int, n_out: int, **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def soil_resnet(branches: int, per_branch: int, **top: Any) -> dict[str, Any]:
    """An invented residual MLP for soil-moisture readings: stem, branches, head."""
    layers = [dense("stem", 32, 64, activation="relu")]
    for i in range(branches):
        for j in range(per_branch):
            last = j == per_branch - 1
            layers.append(
                dense(
                    f"r{i}.l{j}",
                    64,
                    64,
                    branch=f"r{i}",
                    activation="linear" if last else "relu",
                    role="residual_out" if last else "hidden",
                )
            )
    layers.append(dense("moisture", 64, 3, role="output"))
    return {"seed": "soil/7", "layers": layers, **top}


def tide_lm(repeat: int, norm: str = "pre", **top: Any) -> dict[str, Any]:
    """An invented language model for tide-gauge logs, as a block shorthand."""
    return {
        "seed": "tide-lm/base",
        "layers": [
            {"name": "codes", "kind": "embedding", "vocab": 300, "dim": 64},
            {"name": "enc", "kind": "transformer_block", "dim": 64, "heads": 4, "mlp_dim": 256,
             "norm": norm, "repeat": repeat},
            dense("next_code", 64, 300, role="output"),
        ],
        **top,
    }  # fmt: skip


def rejected(body: dict[str, Any]) -> RequestRejected:
    with pytest.raises(RequestRejected) as info:
        build_plan(body)
    return info.value


def fields(err: RequestRejected) -> list[tuple[str, str]]:
    return [(p.field, p.code) for p in err.problems]


def glorot_std(fan_in: int, fan_out: int, gain: float = 1.0) -> float:
    # Glorot & Bengio 2010, eq. 12: variance 2/(fan_in+fan_out), times the gain squared.
    return gain * math.sqrt(2.0 / (fan_in + fan_out))


def check_sample_std(values: np.ndarray, expected: float) -> None:
    """The drawn values' std matches the planned one within 5 standard errors (the std of a
    normal sample of n values has relative standard error about 1/sqrt(2n))."""
    n = values.size
    assert float(np.std(values.astype(np.float64))) == pytest.approx(
        expected, rel=5 / math.sqrt(2 * n)
    )


def check_drawn(plan: Plan, name: str, expected: float) -> None:
    check_sample_std(render_rows(plan, plan.tensor(name)), expected)


# ---------------------------------------------------------------------------------------------
# Fixup (Zhang, Dauphin & Ma 2019)


def test_fixup_l8_m2_scales_by_0_353553() -> None:
    plan = build_plan(soil_resnet(8, 2, depth_policy={"name": "fixup"}))
    # Zhang et al. 2019, sec. 3 (the Fixup recipe) [from memory]: branch layers except the
    # last are scaled by L^(-1/(2m-2)); L = 8, m = 2 gives 8^(-1/2) = 0.353553.
    factor = 8 ** (-1 / 2)
    assert factor == pytest.approx(0.353553, abs=5e-7)
    he = math.sqrt(2 / 64)  # He et al. 2015, eq. 10
    for i in range(8):
        t = plan.tensor(f"r{i}.l0.weight")
        assert t.method == "he"
        assert t.std == pytest.approx(he * factor, rel=1e-14)
        assert t.gain == pytest.approx(math.sqrt(2) * factor, rel=1e-14)
        assert "0.353553" in t.rationale and "Zhang et al. 2019" in t.rationale
        assert any("Fixup" in r for r in t.references)
    drawn = np.concatenate(
        [render_rows(plan, plan.tensor(f"r{i}.l0.weight")).ravel() for i in range(8)]
    )
    check_sample_std(drawn, he * factor)


def test_fixup_zeroes_last_branch_layers_and_the_classifier_and_adds_scalars() -> None:
    plan = build_plan(soil_resnet(8, 2, depth_policy={"name": "fixup"}))
    for name in [f"r{i}.l1.weight" for i in range(8)] + ["moisture.weight"]:
        t = plan.tensor(name)
        assert (t.method, t.sampler, t.value) == ("constant", "constant", 0.0)
        assert "Zhang et al. 2019" in t.rationale
        assert not np.any(render_rows(plan, t))
    added = {t.tensor: t for t in plan.tensors if t.shape == (1,)}
    expected = {f"r{i}.multiplier" for i in range(8)}
    expected |= {f"r{i}.l0.offset" for i in range(8)} | {f"r{i}.l1.offset" for i in range(8)}
    expected |= {f"r{i}.l0.activation_offset" for i in range(8)}  # relu after the first layer
    assert set(added) == expected
    assert all(float(render_rows(plan, added[f"r{i}.multiplier"])[0]) == 1.0 for i in range(8))
    assert all(added[n].value == 0.0 for n in expected if "offset" in n)
    # the stem stays as recommended: He normal, unscaled
    assert plan.tensor("stem.weight").std == pytest.approx(math.sqrt(2 / 32), rel=1e-15)
    doc = plan_document(plan)
    assert doc["depth_policy"]["parameters"]["branches"] == 8
    assert any("multiplier" in w for w in doc["warnings"])


def test_fixup_three_layer_branches_use_the_fourth_root() -> None:
    # L = 4, m = 3: L^(-1/(2m-2)) = 4^(-1/4) = 1/sqrt(2) (Zhang et al. 2019 [from memory]).
    plan = build_plan(soil_resnet(4, 3, depth_policy={"name": "fixup"}))
    expected = float(mpmath.power(4, mpmath.mpf(-1) / 4))
    for name in ("r0.l0.weight", "r3.l1.weight"):
        assert plan.tensor(name).std == pytest.approx(math.sqrt(2 / 64) * expected, rel=1e-14)
    assert plan.tensor("r2.l2.weight").value == 0.0


def test_fixup_on_residual_conv_blocks() -> None:
    body = {"seed": 3, "layers": [
        {"name": "stem", "kind": "conv", "channels_in": 3, "channels_out": 16, "kernel": [3, 3],
         "activation": "relu"},
        {"name": "res", "kind": "residual_conv_block", "channels": 16, "kernel": [3, 3],
         "repeat": 8},
        {"name": "label", "kind": "dense", "n_in": 16, "n_out": 4, "role": "output"}],
        "depth_policy": {"name": "fixup"}}  # fmt: skip
    plan = build_plan(body)
    he = math.sqrt(2 / (16 * 9))  # He et al. 2015, eq. 10, fan-in = channels * kernel taps
    assert plan.tensor("res.3.conv1.weight").std == pytest.approx(he * 8**-0.5, rel=1e-14)
    assert plan.tensor("res.3.conv2.weight").value == 0.0
    assert plan.tensor("res.3.branch.multiplier").value == 1.0


def test_fixup_refuses_attention_branches_with_the_field() -> None:
    err = rejected(tide_lm(2, depth_policy={"name": "fixup"}))
    assert fields(err) == [("depth_policy.name", "not_allowed")]
    assert "t_fixup or deepnorm" in err.problems[0].message


# ---------------------------------------------------------------------------------------------
# SkipInit / ReZero gates


def test_skip_gate_adds_a_zero_gate_per_branch_and_changes_nothing_else() -> None:
    plain = build_plan(tide_lm(3))
    gated = build_plan(tide_lm(3, depth_policy={"name": "skip_gate"}))
    gates = [t for t in gated.tensors if t.tensor.endswith(".gate")]
    assert [t.tensor for t in gates] == [
        f"enc.{i}.{b}_branch.gate" for i in range(3) for b in ("attn", "mlp")
    ]
    for t in gates:
        assert (t.shape, t.sampler, t.value) == ((1,), "constant", 0.0)
        assert "De & Smith 2020" in t.rationale and "Bachlechner et al. 2020" in t.rationale
        assert render_rows(gated, t).tolist() == [0.0]
    rest = tuple(t for t in gated.tensors if not t.tensor.endswith(".gate"))
    assert rest == plain.tensors
    assert any("gate" in w for w in gated.warnings)


# ---------------------------------------------------------------------------------------------
# Scaled residual outputs (Radford et al. 2019, sec. 2.3)


def test_twelve_blocks_scale_residual_outputs_by_sqrt_24() -> None:
    plan = build_plan(tide_lm(12, depth_policy={"name": "scaled_residual"}))
    # Radford et al. 2019, sec. 2.3: residual-layer weights scaled by 1/sqrt(N), N the number
    # of residual layers: 12 blocks x 2 = 24. The 0.02 base std is common practice (
    # 0.02/sqrt(24) = 0.00408248).
    small = 0.02 / math.sqrt(24)
    assert small == pytest.approx(0.00408248, abs=5e-9)
    for name in ("enc.0.attn.output.weight", "enc.11.mlp_out.weight"):
        t = plan.tensor(name)
        assert (t.method, t.distribution, t.std) == ("scaled_residual", "normal", small)
        assert "sqrt(24)" in t.rationale and "Radford et al. 2019, sec. 2.3" in t.rationale
    for name in (
        "codes.weight",
        "enc.0.attn.query.weight",
        "enc.5.mlp_in.weight",
        "next_code.weight",
    ):
        t = plan.tensor(name)
        assert t.std == 0.02
        assert "common practice" in t.rationale
    check_drawn(plan, "enc.11.mlp_out.weight", small)
    assert plan.policy is not None and plan.policy["parameters"]["residual_layers"] == 24


def test_scaled_residual_parameters() -> None:
    plan = build_plan(
        tide_lm(
            2, depth_policy={"name": "scaled_residual", "base_std": 0.01, "residual_layers": 10}
        )
    )
    t = plan.tensor("enc.1.mlp_out.weight")
    assert t.std == 0.01 / math.sqrt(10)
    assert "common practice" not in plan.tensor("enc.0.mlp_in.weight").rationale
    # without branches, layers marked residual_out count
    body = {
        "seed": 1,
        "layers": [dense("a", 8, 8, role="residual_out"), dense("b", 8, 8, role="residual_out")],
        "depth_policy": {"name": "scaled_residual"},
    }
    assert build_plan(body).tensor("b.weight").std == 0.02 / math.sqrt(2)


# ---------------------------------------------------------------------------------------------
# DeepNorm (Wang et al. 2022)


def test_deepnorm_encoder_n6_alpha_and_beta() -> None:
    plan = build_plan(
        tide_lm(6, norm="post", depth_policy={"name": "deepnorm", "architecture": "encoder"})
    )
    # Wang et al. 2022 (DeepNet), encoder-only with N layers: alpha = (2N)^(1/4), beta =
    # (8N)^(-1/4) (the table beside the DeepNorm pseudocode; location [from memory]). N = 6
    # gives 1.861210 and 0.379918.
    alpha, beta = 12**0.25, 48**-0.25
    assert (alpha, beta) == (pytest.approx(1.861210, abs=5e-7), pytest.approx(0.379918, abs=5e-7))
    doc = plan_document(plan)
    (mult,) = doc["multipliers"]
    assert mult["name"] == "residual_alpha" and mult["value"] == pytest.approx(alpha, rel=2e-16)
    assert len(mult["applies_to"]) == 12
    assert doc["depth_policy"]["parameters"]["encoder_beta"] == pytest.approx(beta, rel=2e-16)
    # beta on feed-forward, value and output projections (Glorot normal); query and key gain 1
    for name, fans in (
        ("enc.0.attn.value.weight", (64, 64)),
        ("enc.0.attn.output.weight", (64, 64)),
        ("enc.5.mlp_in.weight", (64, 256)),
        ("enc.5.mlp_out.weight", (256, 64)),
    ):
        t = plan.tensor(name)
        assert (t.method, t.distribution) == ("glorot", "normal")
        assert t.std == pytest.approx(glorot_std(*fans, beta), rel=1e-14), name
        assert "0.379918" in t.rationale and "Wang et al. 2022" in t.rationale
    for name in ("enc.0.attn.query.weight", "enc.3.attn.key.weight"):
        t = plan.tensor(name)
        assert (t.gain, t.std) == (1.0, pytest.approx(glorot_std(64, 64), rel=1e-14))
    check_drawn(plan, "enc.5.mlp_in.weight", glorot_std(64, 256, beta))
    assert any("alpha = 1.86121" in w for w in plan.warnings)


def test_deepnorm_layer_count_from_the_caller_and_decoder_only() -> None:
    plan = build_plan(
        tide_lm(
            2,
            norm="post",
            depth_policy={"name": "deepnorm", "architecture": "decoder", "decoder_layers": 12},
        )
    )
    (mult,) = plan.multipliers
    assert mult["value"] == pytest.approx(24**0.25, rel=2e-16)  # (2N)^(1/4), N = 12
    assert plan.tensor("enc.0.mlp_in.weight").std == pytest.approx(
        glorot_std(64, 256, 96**-0.25), rel=1e-14
    )


def test_deepnorm_encoder_decoder_constants() -> None:
    layers = [
        {"name": "src", "kind": "transformer_block", "dim": 32, "heads": 4, "mlp_dim": 64,
         "norm": "post", "repeat": 2},
        {"name": "tgt", "kind": "transformer_block", "dim": 32, "heads": 4, "mlp_dim": 64,
         "norm": "post", "repeat": 3},
    ]  # fmt: skip
    policy = {"name": "deepnorm", "architecture": "encoder_decoder", "decoder_start": "tgt.0.attn"}
    plan = build_plan({"seed": 2, "layers": layers, "depth_policy": policy})
    n, m = 2, 3
    # Wang et al. 2022, encoder-decoder: encoder alpha = 0.81 (N^4 M)^(1/16), beta = 0.87
    # (N^4 M)^(-1/16); decoder alpha = (3M)^(1/4), beta = (12M)^(-1/4). Computed with mpmath.
    with mpmath.workdps(30):
        root = mpmath.root(n**4 * m, 16)
        enc_alpha, enc_beta = float(mpmath.mpf("0.81") * root), float(mpmath.mpf("0.87") / root)
        dec_alpha, dec_beta = float(mpmath.root(3 * m, 4)), float(1 / mpmath.root(12 * m, 4))
    by_group = {mm["group"]: mm for mm in plan.multipliers}
    assert by_group["encoder"]["value"] == pytest.approx(enc_alpha, rel=1e-15)
    assert by_group["decoder"]["value"] == pytest.approx(dec_alpha, rel=1e-15)
    assert by_group["encoder"]["applies_to"] == [
        f"src.{i}.{b}_branch" for i in range(2) for b in ("attn", "mlp")
    ]
    assert plan.tensor("src.1.attn.value.weight").std == pytest.approx(
        glorot_std(32, 32, enc_beta), rel=1e-14
    )
    assert plan.tensor("tgt.2.mlp_out.weight").std == pytest.approx(
        glorot_std(64, 32, dec_beta), rel=1e-14
    )


def test_deepnorm_on_pre_norm_blocks_warns() -> None:
    plan = build_plan(tide_lm(2, depth_policy={"name": "deepnorm", "architecture": "encoder"}))
    assert any("post-norm" in w for w in plan.warnings)


# ---------------------------------------------------------------------------------------------
# T-Fixup (Huang et al. 2020)


def test_t_fixup_encoder_decoder_factors() -> None:
    layers = [
        {"name": "src_tokens", "kind": "embedding", "vocab": 100, "dim": 32},
        {"name": "src", "kind": "transformer_block", "dim": 32, "heads": 4, "mlp_dim": 64,
         "norm": "post", "repeat": 3},
        {"name": "tgt", "kind": "transformer_block", "dim": 32, "heads": 4, "mlp_dim": 64,
         "norm": "post", "repeat": 3},
    ]  # fmt: skip
    policy = {"name": "t_fixup", "architecture": "encoder_decoder", "decoder_start": "tgt.0.attn"}
    plan = build_plan({"seed": 2, "layers": layers, "depth_policy": policy})
    # Huang et al. 2020, Algorithm 1 [from memory]: encoder value/output projections and MLP
    # weights x 0.67 N^(-1/4); decoder ones and the input embeddings x (9M)^(-1/4); embeddings
    # Gaussian with std d^(-1/2); Xavier (Glorot) elsewhere.
    enc, dec = 0.67 * 3**-0.25, (9 * 3) ** -0.25
    v = plan.tensor("src.2.attn.value.weight")
    assert (v.method, v.distribution) == ("glorot", "uniform")
    assert v.std == pytest.approx(glorot_std(32, 32) * enc, rel=1e-14)
    assert "[from memory]" in v.rationale and "Huang et al. 2020" in v.rationale
    assert plan.tensor("tgt.0.mlp_in.weight").std == pytest.approx(
        glorot_std(32, 64) * dec, rel=1e-14
    )
    assert plan.tensor("tgt.1.attn.query.weight").std == pytest.approx(
        glorot_std(32, 32), rel=1e-14
    )
    e = plan.tensor("src_tokens.weight")
    assert e.std == pytest.approx(32**-0.5 * dec, rel=1e-14)
    check_drawn(plan, "src_tokens.weight", e.std)
    assert any("warmup" in w for w in plan.warnings)


# ---------------------------------------------------------------------------------------------
# Width transfer (Yang et al. 2021)


def orchard_mlp(width: int, **top: Any) -> dict[str, Any]:
    """An invented orchard-yield regressor whose hidden width is being scaled up."""
    return {"seed": 9, "layers": [
        dense("features", 20, width, activation="relu"),
        dense("hidden.0", width, width, activation="relu"),
        dense("hidden.1", width, width, activation="relu"),
        dense("yield", width, 10, role="output")], **top}  # fmt: skip


def test_width_transfer_scales_the_output_layer_and_returns_multipliers() -> None:
    plain = build_plan(orchard_mlp(256))
    plan = build_plan(orchard_mlp(256, depth_policy={"name": "width_transfer", "base_width": 64}))
    # Yang et al. 2021, Table 3 [from memory]: output weights' variance 1/fan_in^2, i.e. the
    # standard variance times base/width at a base width where the two agree; input and hidden
    # weights keep 1/fan_in; Adam learning rate of hidden and output weights x base/width.
    shrink = 64 / 256
    out = plan.tensor("yield.weight")
    assert out.std == pytest.approx(plain.tensor("yield.weight").std * math.sqrt(shrink), rel=1e-15)
    assert "not exact constants" in out.rationale
    for name in ("features.weight", "hidden.0.weight", "hidden.1.weight"):
        assert plan.tensor(name).std == plain.tensor(name).std
        assert "Yang et al. 2021" in plan.tensor(name).rationale
    rates = {
        (m["optimizer"], m["group"]): m
        for m in plan.multipliers
        if m["name"] == "learning_rate_scale"
    }
    assert rates["adam", "hidden"]["value"] == shrink
    assert rates["adam", "hidden"]["applies_to"] == ["hidden.0.weight", "hidden.1.weight"]
    assert rates["adam", "output"]["value"] == shrink
    assert rates["adam", "input"]["value"] == 1.0
    assert rates["sgd", "input"]["value"] == 4.0
    assert "features.bias" in rates["adam", "vectors"]["applies_to"]
    doc = plan_document(plan)
    assert doc["depth_policy"]["parameters"]["width"] == 256  # the output layer's input width
    assert "not exact constants" in doc["depth_policy"]["text"]
    json.dumps(doc, allow_nan=False)


def test_width_transfer_with_an_explicit_width_and_attention() -> None:
    plan = build_plan(
        tide_lm(1, depth_policy={"name": "width_transfer", "base_width": 16, "width": 64})
    )
    names = {m["name"] for m in plan.multipliers}
    assert {"output_multiplier", "learning_rate_scale", "attention_logit_scale"} <= names
    assert plan.tensor("codes.weight").std == 1.0  # input layer unchanged


# ---------------------------------------------------------------------------------------------
# Errors name the field


@pytest.mark.parametrize(
    ("body", "expected"),
    [
        (tide_lm(1, depth_policy={"name": "rezero"}), ("depth_policy.name", "invalid_value")),
        (tide_lm(1, depth_policy={}), ("depth_policy.name", "missing_field")),
        (tide_lm(1, depth_policy="fixup"), ("depth_policy", "invalid_type")),
        (tide_lm(1, depth_policy={"name": "deepnorm"}),
         ("depth_policy.architecture", "missing_field")),
        (tide_lm(1, depth_policy={"name": "deepnorm", "architecture": "decoder_only"}),
         ("depth_policy.architecture", "invalid_value")),
        (tide_lm(1, depth_policy={"name": "deepnorm", "architecture": "encoder",
                                  "decoder_layers": 4}),
         ("depth_policy.decoder_layers", "not_allowed")),
        (tide_lm(1, depth_policy={"name": "t_fixup", "architecture": "encoder_decoder"}),
         ("depth_policy.decoder_start", "missing_field")),
        (tide_lm(1, depth_policy={"name": "t_fixup", "architecture": "encoder_decoder",
                                  "decoder_start": "nowhere"}),
         ("depth_policy.decoder_start", "invalid_value")),
        (tide_lm(1, depth_policy={"name": "deepnorm", "architecture": "encoder_decoder",
                                  "decoder_start": "enc.0.attn"}),
         ("depth_policy.decoder_start", "invalid_value")),  # inside a branch
        (tide_lm(1, depth_policy={"name": "deepnorm", "architecture": "encoder",
                                  "encoder_layers": 0}),
         ("depth_policy.encoder_layers", "invalid_value")),
        (tide_lm(1, depth_policy={"name": "width_transfer"}),
         ("depth_policy.base_width", "missing_field")),
        (tide_lm(1, depth_policy={"name": "width_transfer", "base_width": 64, "lr": 1}),
         ("depth_policy.lr", "unknown_field")),
        (tide_lm(1, depth_policy={"name": "scaled_residual", "base_std": -1}),
         ("depth_policy.base_std", "invalid_value")),
        (tide_lm(1, depth_policy={"name": "skip_gate", "gain": 1}),
         ("depth_policy.gain", "unknown_field")),
        ({"seed": 1, "layers": [dense("a", 4, 4)], "depth_policy": {"name": "skip_gate"}},
         ("depth_policy.name", "not_allowed")),
        ({"seed": 1, "layers": [dense("a", 4, 4)], "depth_policy": {"name": "scaled_residual"}},
         ("depth_policy.residual_layers", "missing_field")),
        ({"seed": 1, "layers": [dense("a", 4, 4)], "depth_policy": {"name": "deepnorm",
                                                                     "architecture": "encoder"}},
         ("depth_policy.encoder_layers", "missing_field")),
        ({"seed": 1, "layers": [dense("a", 4, 4)], "depth_policy": {"name": "width_transfer",
                                                                     "base_width": 4}},
         ("depth_policy.width", "missing_field")),
    ],
)  # fmt: skip
def test_policy_errors_name_the_field(body: dict[str, Any], expected: tuple[str, str]) -> None:
    with pytest.raises(RequestRejected) as info:
        parse(body)
    assert expected in fields(info.value), info.value.problems
    assert all(p.message for p in info.value.problems)


def test_policy_names_are_listed_in_the_error() -> None:
    with pytest.raises(RequestRejected) as info:
        parse(tide_lm(1, depth_policy={"name": "rezero"}))
    message = info.value.problems[0].message
    for name in ("fixup", "skip_gate", "scaled_residual", "deepnorm", "t_fixup", "width_transfer"):
        assert name in message


# ---------------------------------------------------------------------------------------------
# Interplay


def test_explicit_init_wins_over_the_policy_and_is_reported() -> None:
    body = soil_resnet(2, 2, depth_policy={"name": "fixup"})
    body["layers"][1]["init"] = {"method": "he", "std": 0.05}
    plan = build_plan(body)
    assert plan.tensor("r0.l0.weight").std == 0.05
    assert plan.tensor("r1.l0.weight").std != 0.05
    assert any("explicit init" in w and "'r0.l0'" in w for w in plan.warnings)


def test_policy_plans_are_deterministic_and_json_ready() -> None:
    for policy in (
        {"name": "skip_gate"},
        {"name": "scaled_residual"},
        {"name": "deepnorm", "architecture": "encoder"},
        {"name": "t_fixup", "architecture": "decoder"},
        {"name": "width_transfer", "base_width": 32},
    ):
        body = tide_lm(2, norm="post", depth_policy=policy)
        a, b = plan_document(build_plan(body)), plan_document(build_plan(body))
        assert json.dumps(a, sort_keys=True, allow_nan=False) == json.dumps(b, sort_keys=True)
        assert a["depth_policy"]["name"] == policy["name"]
        assert a["depth_policy"]["references"]


def test_policy_is_part_of_the_canonical_request() -> None:
    plain = build_plan(tide_lm(1))
    gated = build_plan(tide_lm(1, depth_policy={"name": "skip_gate"}))
    assert "depth_policy" not in plain.canonical_request
    assert gated.canonical_request["depth_policy"] == {"name": "skip_gate"}
