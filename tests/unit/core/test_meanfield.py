"""Mean-field figures against quadrature done here with mpmath and scipy, and published facts.

Outside references:
- Poole, Lahiri, Raghu, Sohl-Dickstein & Ganguli (2016), "Exponential expressivity in deep
  neural networks through transient chaos", NeurIPS: the length map q -> sigma_w^2
  E[phi(sqrt(q) z)^2] + sigma_b^2 (eq. 3 [from memory]), chi_1 = sigma_w^2
  E[phi'(sqrt(q*) z)^2] (eq. 7 [from memory]); for tanh at sigma_b^2 = 0 the order-to-chaos
  transition is at sigma_w^2 = 1 (stated in the paper's phase diagram [from memory]).
- Schoenholz, Gilmer, Ganguli & Sohl-Dickstein (2017), "Deep Information Propagation", ICLR:
  xi_q = -1/log(L'(q*)), xi_c = -1/log(chi_c) (eqs. 5 and 9 [from memory]); checked here against
  numerical derivatives and double integrals computed with scipy, not against our formulas.
- He et al. (2015), eq. 10: sigma_w^2 = 2 keeps ReLU activations' second moment fixed, i.e.
  the ReLU critical point (closed form).
- Cho & Saul (2009), "Kernel Methods for Deep Learning", NeurIPS: the arc-cosine kernel
  E[relu(u1) relu(u2)] = q / (2 pi) (sqrt(1 - c^2) + (pi - arccos c) c) (degree 1 [from memory]).
"""

from __future__ import annotations

import math
from collections.abc import Callable

import pytest

from conftest import require_oracle
from seedbed.core import meanfield
from seedbed.core.meanfield import (
    critical_sigma_w2,
    length_map,
    mean_field,
    rationale_sentence,
)

mpmath = require_oracle("mpmath")
integrate = require_oracle("scipy.integrate")
optimize = require_oracle("scipy.optimize")
special = require_oracle("scipy.special")


# --- independent definitions (mpmath and scipy, not seedbed's) -------------------------------


def _mp_phi(name: str) -> Callable[[object], object]:
    lam = mpmath.mpf("1.0507009873554804934193349852946")
    alpha = mpmath.mpf("1.6732632423543772848170429916717")
    return {
        "tanh": mpmath.tanh,
        "relu": lambda x: x if x > 0 else mpmath.mpf(0),
        "gelu": lambda x: x * mpmath.ncdf(x),
        "elu": lambda x: x if x > 0 else mpmath.expm1(x),
        "selu": lambda x: lam * (x if x > 0 else alpha * mpmath.expm1(x)),
        "sigmoid": lambda x: 1 / (1 + mpmath.exp(-x)),
        "softplus": lambda x: mpmath.log1p(mpmath.exp(x)),
        "silu": lambda x: x / (1 + mpmath.exp(-x)),
    }[name]


def _sp_phi(name: str) -> Callable[[float], float]:
    return {
        "tanh": math.tanh,
        "relu": lambda x: max(x, 0.0),
        "gelu": lambda x: x * special.ndtr(x),
        "sigmoid": lambda x: float(special.expit(x)),
    }[name]


def _sp_slope(name: str) -> Callable[[float], float]:
    return {
        "tanh": lambda x: 1.0 - math.tanh(x) ** 2,
        "relu": lambda x: 1.0 if x > 0 else 0.0,
        "gelu": lambda x: special.ndtr(x) + x * math.exp(-x * x / 2) / math.sqrt(2 * math.pi),
        "sigmoid": lambda x: float(special.expit(x) * (1 - special.expit(x))),
    }[name]


def _gauss(f: Callable[[float], float]) -> float:
    """E[f(z)], z ~ N(0, 1), with scipy's adaptive quadrature (split at 0 for kinks)."""
    pdf = 1 / math.sqrt(2 * math.pi)
    left = integrate.quad(
        lambda z: f(z) * math.exp(-z * z / 2) * pdf, -40, 0, limit=200, epsabs=1e-14, epsrel=1e-13
    )[0]
    right = integrate.quad(
        lambda z: f(z) * math.exp(-z * z / 2) * pdf, 0, 40, limit=200, epsabs=1e-14, epsrel=1e-13
    )[0]
    return left + right


def _sp_length(name: str, sw2: float, sb2: float, q: float) -> float:
    phi = _sp_phi(name)
    s = math.sqrt(q)
    return sw2 * _gauss(lambda z: phi(s * z) ** 2) + sb2


def _sp_fixed_point(name: str, sw2: float, sb2: float) -> float:
    return float(
        optimize.brentq(
            lambda q: _sp_length(name, sw2, sb2, q) - q, 1e-6, 50.0, xtol=1e-15, rtol=1e-14
        )
    )


def _sp_chi(name: str, sw2: float, q: float) -> float:
    slope = _sp_slope(name)
    s = math.sqrt(q)
    return sw2 * _gauss(lambda z: slope(s * z) ** 2)


# --- the length map ---------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "q"),
    [
        ("tanh", 0.05),
        ("tanh", 400.0),
        ("relu", 1.0),
        ("gelu", 0.05),
        ("gelu", 7.3),
        ("elu", 1.0),
        ("selu", 7.3),
        ("sigmoid", 400.0),
        ("softplus", 1.0),
        ("silu", 7.3),
    ],
)
def test_length_map_matches_mpmath_quadrature(name: str, q: float) -> None:
    phi = _mp_phi(name)
    with mpmath.workdps(20):
        s = mpmath.sqrt(mpmath.mpf(q))

        def integrand(z: object) -> object:
            return phi(s * z) ** 2 * mpmath.npdf(z)

        breaks = [-mpmath.inf, -1 / s, 0, 1 / s, mpmath.inf]  # kink at 0, curvature at x ~ 1
        expected = 1.7 * mpmath.quad(integrand, breaks) + 0.2
    got = length_map(name, 1.7, 0.2, q)
    assert got == pytest.approx(float(expected), rel=1e-11)


# --- fixed point and chi_1 -----------------------------------------------------------------


@pytest.mark.parametrize(
    ("name", "sw2", "sb2"),
    [
        ("tanh", 1.5, 0.05),
        ("tanh", 2.5, 0.3),
        ("sigmoid", 4.0, 0.1),
        ("gelu", 1.5, 0.2),
    ],
)
def test_fixed_point_and_chi_1_agree_with_scipy(name: str, sw2: float, sb2: float) -> None:
    fig = mean_field(name, sw2, sb2)
    q_ref = _sp_fixed_point(name, sw2, sb2)
    assert fig.fixed_point == "attracting"
    assert fig.q_star == pytest.approx(q_ref, rel=1e-9)
    assert fig.chi_1 == pytest.approx(_sp_chi(name, sw2, q_ref), rel=1e-9)


def test_relu_closed_forms() -> None:
    # L(q) = sigma_w^2 q / 2 + sigma_b^2, so q* = sigma_b^2 / (1 - sigma_w^2 / 2); chi_1 =
    # sigma_w^2 / 2; the critical point is He et al.'s sigma_w^2 = 2 (eq. 10).
    fig = mean_field("relu", 1.2, 0.3)
    assert fig.q_star == pytest.approx(0.3 / (1 - 0.6), rel=1e-14)
    assert fig.chi_1 == pytest.approx(0.6, rel=1e-14)
    assert fig.phase == "ordered"
    assert critical_sigma_w2("relu", 0.0) == 2.0
    at_he = mean_field("relu", 2.0, 0.0)
    assert at_he.phase == "critical" and at_he.fixed_point == "neutral"
    assert at_he.q_star == 1.0 and at_he.xi_c is None  # every length is a fixed point
    above = mean_field("relu", 2.5, 0.0)
    assert above.q_star is None and above.phase == "unbounded"
    # leaky ReLU, slope a: E[phi^2] = (1 + a^2)/2, critical 2/(1 + a^2) (He et al. eq. 15)
    assert critical_sigma_w2("leaky_relu", 0.0, 0.2) == pytest.approx(2 / 1.04, rel=1e-14)


def test_tanh_transition_is_exactly_one_at_zero_bias() -> None:
    # Poole et al. 2016: for tanh with sigma_b = 0, order below sigma_w^2 = 1, chaos above.
    assert critical_sigma_w2("tanh", 0.0) == 1.0
    below = mean_field("tanh", 0.9, 0.0)
    assert below.q_star == 0.0 and below.phase == "ordered"
    assert below.chi_1 == pytest.approx(0.9, rel=1e-12)  # q* = 0: chi_1 = sigma_w^2 tanh'(0)^2
    above = mean_field("tanh", 1.3, 0.0)
    assert above.q_star is not None and above.q_star > 0
    assert above.phase == "chaotic" and above.chi_1 is not None and above.chi_1 > 1


@pytest.mark.parametrize("sb2", [0.01, 0.05, 0.3])
def test_tanh_critical_line_has_chi_1_of_one(sb2: float) -> None:
    crit = critical_sigma_w2("tanh", sb2)
    assert crit is not None and crit > 1
    q_ref = _sp_fixed_point("tanh", crit, sb2)
    assert _sp_chi("tanh", crit, q_ref) == pytest.approx(1.0, abs=1e-8)


# --- depth scales ---------------------------------------------------------------------------


def test_xi_q_is_the_slope_of_the_length_map() -> None:
    name, sw2, sb2 = "tanh", 1.5, 0.05
    fig = mean_field(name, sw2, sb2)
    assert fig.q_star is not None and fig.xi_q is not None
    h = 1e-4
    slope = (
        _sp_length(name, sw2, sb2, fig.q_star + h) - _sp_length(name, sw2, sb2, fig.q_star - h)
    ) / (2 * h)
    assert fig.length_slope == pytest.approx(slope, rel=1e-6)
    assert fig.xi_q == pytest.approx(-1 / math.log(slope), rel=1e-5)
    # ordered phase: c* = 1 and chi_c = chi_1 (Schoenholz et al. 2017)
    assert fig.phase == "ordered" and fig.c_star == 1.0
    assert fig.xi_c == pytest.approx(-1 / math.log(fig.chi_1 or 0), rel=1e-12)


def _sp_pair(f: Callable[[float], float], g: Callable[[float], float], q: float, c: float) -> float:
    s = math.sqrt(q)
    r = math.sqrt(1 - c * c)
    pdf = 1 / (2 * math.pi)

    def inner(z2: float, z1: float) -> float:
        return f(s * z1) * g(s * (c * z1 + r * z2)) * math.exp(-(z1 * z1 + z2 * z2) / 2) * pdf

    return float(integrate.dblquad(inner, -12, 12, -12, 12, epsabs=1e-12, epsrel=1e-11)[0])


def test_chaotic_phase_correlation_fixed_point_and_xi_c() -> None:
    name, sw2, sb2 = "tanh", 3.0, 0.1
    fig = mean_field(name, sw2, sb2)
    assert fig.phase == "chaotic" and fig.q_star is not None and fig.c_star is not None
    assert 0 < fig.c_star < 1
    phi, slope = _sp_phi(name), _sp_slope(name)
    mapped = (sw2 * _sp_pair(phi, phi, fig.q_star, fig.c_star) + sb2) / fig.q_star
    assert mapped == pytest.approx(fig.c_star, abs=1e-7)
    chi_c = sw2 * _sp_pair(slope, slope, fig.q_star, fig.c_star)
    assert fig.xi_c == pytest.approx(-1 / math.log(chi_c), rel=1e-5)


@pytest.mark.parametrize("c", [-0.6, 0.0, 0.35, 0.9, 0.999])
def test_pair_expectation_matches_the_arc_cosine_kernel(c: float) -> None:
    # Cho & Saul 2009 degree-1 arc-cosine kernel; _pair_expectation is what c* and chi_c use.
    q = 2.3
    relu = meanfield._Act("relu", None).phi
    expected = q / (2 * math.pi) * (math.sqrt(1 - c * c) + (math.pi - math.acos(c)) * c)
    assert meanfield._pair_expectation(relu, relu, q, c) == pytest.approx(expected, rel=1e-10)


# --- interface ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: mean_field("tanh", 0.0, 0.0), "sigma_w2"),
        (lambda: mean_field("tanh", 1.0, -0.1), "sigma_b2"),
        (lambda: mean_field("tanh", float("nan"), 0.0), "sigma_w2"),
        (lambda: mean_field("tanh", 1.0, 0.0, start=0.0), "start"),
        (lambda: mean_field("swish", 1.0, 0.0), "activation"),
        (lambda: mean_field("softmax", 1.0, 0.0), "activation"),
        (lambda: mean_field("leaky_relu", 1.0, 0.0, param=3.0), "activation_param"),
        (lambda: length_map("tanh", 1.0, 0.0, -1.0), "q"),
    ],
)
def test_bad_arguments_name_the_field(call: Callable[[], object], field: str) -> None:
    with pytest.raises(ValueError, match=field):
        call()


def test_rationale_sentence_states_the_numbers_and_sources() -> None:
    fig = mean_field("tanh", 1.5, 0.05)
    text = rationale_sentence(fig)
    assert "Poole et al. 2016" in text and "Schoenholz et al. 2017" in text
    assert f"{fig.q_star:.4g}" in text and f"{fig.chi_1:.4g}" in text and "ordered" in text
    assert "Infinite-width" in text


def test_document_form_is_json_ready() -> None:
    entry = mean_field("gelu", 2.0, 0.0).as_dict()
    assert entry["phase"] in ("ordered", "critical", "chaotic", "unbounded")
    assert entry["references"] == ["Poole et al. 2016", "Schoenholz et al. 2017"]
    assert all(isinstance(v, (str, float, int, list, type(None))) for v in entry.values())
