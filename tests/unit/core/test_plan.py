"""The recommendation: published formulas checked against their sources, and the warnings."""

from __future__ import annotations

import math

import pytest
from scipy import integrate, stats

from seedbed.core.plan import build_plan, plan_document
from seedbed.core.request.problems import RequestRejected

REQUIRED_ENTRY_KEYS = {  # docs/service.md: what each plan entry holds at least
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
}


def plan_of(*layers: dict, **top: object):
    return build_plan({"seed": 11, "layers": list(layers), **top})


def dense(name: str, n_in: int, n_out: int, **extra: object) -> dict:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, **extra}


def second_moment(phi) -> float:
    """E[phi(z)^2], z ~ N(0,1), by scipy's adaptive quadrature (independent of the core)."""
    value, _ = integrate.quad(lambda z: phi(z) ** 2 * stats.norm.pdf(z), -40, 40, limit=200)
    return value


def test_relu_layer_gets_he_normal_std_sqrt_2_over_fan_in() -> None:
    # He et al. 2015, eq. 10: std = sqrt(2 / n_l), n_l = fan-in.
    t = plan_of(dense("hidden", 784, 256, activation="relu")).tensor("hidden.weight")
    assert (t.method, t.distribution) == ("he", "normal")
    assert t.std == pytest.approx(math.sqrt(2 / 784), rel=1e-15)
    assert "784" in t.rationale and "He et al. 2015" in t.rationale


def test_leaky_relu_uses_he_eq_15() -> None:
    # He et al. 2015, eq. 15: std = sqrt(2 / ((1 + a^2) n)).
    p = plan_of(dense("h", 300, 100, activation="leaky_relu", activation_param=0.2))
    t = p.tensor("h.weight")
    assert t.std == pytest.approx(math.sqrt(2 / ((1 + 0.2**2) * 300)), rel=1e-14)


def test_tanh_layer_gets_glorot_uniform_times_second_moment_gain() -> None:
    # Glorot & Bengio 2010, eq. 16: bound sqrt(6 / (n_in + n_out)); times the tanh gain
    # 1/sqrt(E[tanh(z)^2]) computed here independently with scipy.integrate.quad.
    t = plan_of(dense("h", 400, 200, activation="tanh")).tensor("h.weight")
    gain = 1 / math.sqrt(second_moment(math.tanh))
    assert (t.method, t.distribution) == ("glorot", "uniform")
    assert t.gain == pytest.approx(gain, rel=1e-10)
    assert t.bound == pytest.approx(gain * math.sqrt(6 / 600), rel=1e-10)
    assert t.std == pytest.approx(t.bound / math.sqrt(3), rel=1e-14)  # std of U(-b, b)


def test_selu_layer_gets_lecun_normal() -> None:
    # Klambauer et al. 2017: SELU networks use N(0, 1/n) weights (LeCun et al. 1998 scaling).
    t = plan_of(dense("h", 512, 512, activation="selu")).tensor("h.weight")
    assert (t.method, t.distribution) == ("lecun", "normal")
    assert t.std == pytest.approx(1 / math.sqrt(512), rel=1e-15)


def test_output_layer_glorot_gain_one_and_prior_bias() -> None:
    # Lin et al. 2017, sec. 4.1: pi = 0.01 gives b = -log((1 - pi) / pi) = -4.59512.
    p = plan_of(dense("head", 64, 3, activation="sigmoid", role="output", class_prior=0.01))
    w, b = p.tensor("head.weight"), p.tensor("head.bias")
    assert (w.method, w.gain) == ("glorot", 1.0)
    assert w.bound == pytest.approx(math.sqrt(6 / 67), rel=1e-15)
    assert b.value == pytest.approx(-4.59512, abs=5e-6)
    assert "Lin et al. 2017" in b.rationale


def test_lstm_forget_block_bias_follows_the_callers_gate_order() -> None:
    # Gers et al. 2000; Jozefowicz et al. 2015: forget-gate bias 1, others 0.
    p = plan_of(
        {
            "name": "cell",
            "kind": "recurrent",
            "cell": "lstm",
            "n_in": 8,
            "hidden": 5,
            "gate_order": ["cell", "forget", "input", "output"],
        }
    )
    assert p.tensor("cell.bias").block_values == (0.0, 1.0, 0.0, 0.0)
    rec = p.tensor("cell.recurrent_weight")
    assert (rec.method, rec.reproducible, rec.gate_blocks) == ("orthogonal", "platform", 4)


def test_simple_relu_cell_gets_identity_recurrence() -> None:
    # Le, Jaitly & Hinton 2015: identity recurrent matrix for ReLU RNNs.
    p = plan_of(
        {
            "name": "r",
            "kind": "recurrent",
            "cell": "simple",
            "n_in": 8,
            "hidden": 6,
            "activation": "relu",
        }
    )
    assert p.tensor("r.recurrent_weight").method == "identity"


def test_embedding_rows_have_unit_variance() -> None:
    p = plan_of({"name": "vocab", "kind": "embedding", "vocab": 100, "dim": 32})
    t = p.tensor("vocab.weight")
    assert (t.fan_in, t.std) == (1, 1.0)


def test_every_entry_has_the_design_fields() -> None:
    doc = plan_document(
        plan_of(dense("a", 4, 4, activation="relu"), {"name": "n", "kind": "norm", "dim": 4})
    )
    for entry in doc["tensors"]:
        assert set(entry) >= REQUIRED_ENTRY_KEYS
        assert entry["rationale"]
    assert doc["totals"] == {"tensors": 4, "values": 16 + 4 + 4 + 4, "bytes": 4 * 28}


def test_constant_hidden_override_warns_about_symmetry() -> None:
    t = plan_of(dense("h", 10, 10, activation="relu", init={"method": "constant", "value": 0.1}))
    w = t.tensor("h.weight")
    assert w.method == "constant" and w.value == 0.1
    assert any("symmetry is never broken" in x for x in w.warnings)


def test_tiny_symmetric_uniform_stack_warns_about_vanishing() -> None:
    layers = [
        dense(
            f"l{i}",
            256,
            256,
            activation="relu",
            init={"method": "symmetric_uniform", "bound": 0.01},
        )
        for i in range(5)
    ]
    warnings = plan_of(*layers).warnings
    assert any("vanish" in w and "l1" in w for w in warnings), warnings


def test_recommended_stack_has_no_drift_warning() -> None:
    layers = [dense(f"l{i}", 256, 256, activation="relu") for i in range(30)]
    assert plan_of(*layers).warnings == ()


def test_sigmoid_stack_warns() -> None:
    layers = [dense(f"s{i}", 32, 32, activation="sigmoid") for i in range(5)]
    assert any("5 consecutive sigmoid layers" in w for w in plan_of(*layers).warnings)


def test_transposed_conv_warns_about_fan_direction() -> None:
    t = plan_of(
        {
            "name": "up",
            "kind": "conv",
            "channels_in": 64,
            "channels_out": 32,
            "kernel": [4, 4],
            "transposed": True,
            "stride": [2, 2],
            "activation": "relu",
        }
    ).tensor("up.weight")
    assert t.fan_in == 64 * 16 // 4 and t.fan_out == 32 * 16
    assert any("other direction" in w for w in t.warnings)


def test_identity_on_rectangular_weight_is_refused_with_the_field() -> None:
    with pytest.raises(RequestRejected) as err:
        plan_of(dense("a", 3, 3), dense("b", 3, 5, init={"method": "identity"}))
    (problem,) = err.value.problems
    assert problem.field == "layers[1].init.method"
    assert "orthogonal" in problem.message


def test_explicit_std_override_reports_ratio_to_recommendation() -> None:
    t = plan_of(
        dense(
            "h",
            100,
            100,
            activation="relu",
            init={"method": "he", "std": 0.02, "distribution": "truncated_normal"},
        )
    )
    w = t.tensor("h.weight")
    assert w.std == pytest.approx(0.02, rel=1e-15)
    # truncation at 2 sigma: sigma = std / factor; factor from scipy.stats.truncnorm
    factor = stats.truncnorm(-2, 2).std()
    assert w.bound == pytest.approx(2 * 0.02 / factor, rel=1e-12)
    assert "0.141421 times the recommended std" in w.rationale


def test_derived_scale_beyond_the_dtype_is_refused_with_the_field() -> None:
    with pytest.raises(RequestRejected) as err:
        plan_of(
            dense("a", 8, 8, activation="relu", init={"method": "he", "gain": 1e6}), dtype="float16"
        )
    (problem,) = err.value.problems
    assert problem.field == "layers[0].init" and "65504" in problem.message


def test_scale_below_the_dtype_precision_warns() -> None:
    t = plan_of(dense("a", 8, 8, init={"method": "glorot", "gain": 1e-6}), dtype="float16")
    assert any("subnormal" in w for w in t.tensor("a.weight").warnings)


def test_norm_scale_override_with_explicit_std() -> None:
    p = plan_of(
        {
            "name": "n",
            "kind": "norm",
            "dim": 16,
            "init": {"method": "he", "distribution": "normal", "std": 0.1},
        }
    )
    t = p.tensor("n.scale")
    assert (t.sampler, t.std) == ("normal", 0.1)
    assert p.tensor("n.shift").value == 0.0


def test_tanh_rationale_places_the_scale_against_the_edge_of_chaos() -> None:
    # Poole et al. 2016: sigma_w^2 = fan_in * std^2; chi_1 = sigma_w^2 E[phi'(sqrt(q*) z)^2],
    # recomputed here with scipy quadrature at the q* the rationale states.
    from scipy import optimize

    t = plan_of(dense("h", 256, 256, activation="tanh")).tensor("h.weight")
    sigma_w2 = 256 * t.std**2
    assert f"sigma_w^2 = {sigma_w2:.4g}" in t.rationale

    def length(q: float) -> float:
        return sigma_w2 * second_moment(lambda z: math.tanh(math.sqrt(q) * z))

    q_star = optimize.brentq(lambda q: length(q) - q, 0.1, 10.0)
    chi_1 = sigma_w2 * second_moment(lambda z: 1 / math.cosh(math.sqrt(q_star) * z) ** 2)
    assert f"chi_1 = {chi_1:.4g}" in t.rationale
    assert "edge of chaos" in t.rationale and "Poole et al. 2016" in t.rationale
