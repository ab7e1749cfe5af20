"""Published scale rules, checked with worked examples computed independently (mpmath, scipy)."""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Any

import mpmath
import pytest
from scipy import special, stats

from seedbed.core.scales import (
    distribution_for_bound,
    distribution_for_std,
    glorot_scale,
    he_scale,
    lecun_scale,
    prior_bias,
    realise,
    select_fan,
    symmetric_uniform_scale,
    truncated_sigma_for_std,
    uniform_bound_for_std,
)
from seedbed_client.generator import TRUNCATION_BOUND, TRUNCATION_STD_FACTOR


def _mp(formula: Callable[[], Any]) -> float:
    """Evaluate a formula at 50 digits with mpmath, rounded once: an independent reference."""
    with mpmath.workdps(50):
        return float(formula())


def _sqrt_ratio(num: float, den: float) -> float:
    return _mp(lambda: mpmath.sqrt(mpmath.mpf(num) / mpmath.mpf(den)))


# --- Glorot & Bengio 2010 ----------------------------------------------------------------------


def test_glorot_worked_example_784_to_256() -> None:
    # Glorot & Bengio 2010, eq. 16: W ~ U[-sqrt(6)/sqrt(n_j + n_j+1), +...]; eq. 12: variance
    # 2/(n_j + n_j+1). Worked example: a 784 -> 256 layer.
    s = glorot_scale(784, 256)
    assert s.uniform_bound == pytest.approx(_sqrt_ratio(6, 1040), rel=2e-16)
    assert round(s.uniform_bound, 6) == 0.075955
    assert s.std == pytest.approx(_sqrt_ratio(2, 1040), rel=2e-16)
    assert s.fan == 520  # the mean fan the rule divides by
    assert "eq. 16" in s.text and "eq. 12" in s.text and "0.07595545" in s.text


def test_glorot_gain_multiplies_std_and_bound() -> None:
    plain, scaled = glorot_scale(300, 100), glorot_scale(300, 100, gain=1.5925)
    assert scaled.std == pytest.approx(1.5925 * plain.std, rel=1e-15)
    assert scaled.uniform_bound == pytest.approx(1.5925 * plain.uniform_bound, rel=1e-15)


def test_glorot_bound_and_std_describe_one_uniform() -> None:
    # the eq. 16 bound and the eq. 12 variance are the same distribution: U(-b, b) has std b/sqrt 3
    s = glorot_scale(784, 256)
    assert stats.uniform(loc=-s.uniform_bound, scale=2 * s.uniform_bound).std() == pytest.approx(
        s.std, rel=1e-15
    )


# --- He et al. 2015 ----------------------------------------------------------------------------


def test_he_forward_eq10() -> None:
    # He et al. 2015, eq. 10: std = sqrt(2/n_l), n_l = k^2 c (fan_in). A 3x3 conv with 64 input
    # channels: n_l = 576, std = sqrt(2/576) = 0.0589256...
    s = he_scale(576, 1152)
    assert s.std == pytest.approx(_sqrt_ratio(2, 576), rel=2e-16)
    assert round(s.std, 7) == 0.0589256
    assert s.fan == 576 and "eq. 10" in s.text


def test_he_backward_eq14_uses_fan_out() -> None:
    # He et al. 2015, eq. 14: std = sqrt(2/n_hat_l), n_hat_l = k^2 d (fan_out).
    s = he_scale(576, 1152, fan="out")
    assert s.std == pytest.approx(_sqrt_ratio(2, 1152), rel=2e-16)
    assert s.fan == 1152 and "eq. 14" in s.text


def test_he_mean_fan_and_leaky_gain() -> None:
    # the mean option: n = (fan_in + fan_out)/2; with the leaky gain sqrt(2/(1+a^2)) this is
    # He et al. 2015 eq. 15 with a = 0.2
    gain = math.sqrt(2 / (1 + 0.2**2))
    s = he_scale(100, 300, gain=gain, fan="mean")
    assert s.fan == 200
    assert s.std == pytest.approx(
        _mp(lambda: mpmath.sqrt(2 / ((1 + mpmath.mpf("0.2") ** 2) * 200))), rel=1e-15
    )


def test_select_fan() -> None:
    assert select_fan(100, 300, "in") == 100
    assert select_fan(100, 300, "out") == 300
    assert select_fan(100, 301, "mean") == 200.5
    assert select_fan(7.5, 3, "mean") == 5.25  # fractional fans from strided convs are fine


# --- LeCun et al. 1998, symmetric uniform ------------------------------------------------------


def test_lecun_std_is_one_over_sqrt_fan_in() -> None:
    # LeCun et al. 1998, sec. 4.6 [from memory]: std = 1/sqrt(fan_in) (m^(-1/2)).
    s = lecun_scale(400)
    assert s.std == 1 / 20  # sqrt(400) = 20 exactly, then one correctly rounded division
    assert lecun_scale(784).std == _sqrt_ratio(1, 784)
    assert lecun_scale(1000).std == pytest.approx(_sqrt_ratio(1, 1000), rel=2e-16)
    assert "[from memory]" in s.text


def test_symmetric_uniform_default_is_glorot_eq1_heuristic() -> None:
    # Glorot & Bengio 2010, eq. 1: W ~ U[-1/sqrt(n), 1/sqrt(n)], n the size of the previous layer.
    s = symmetric_uniform_scale(256)
    assert s.uniform_bound == 1 / 16
    assert s.std == pytest.approx(stats.uniform(loc=-1 / 16, scale=1 / 8).std(), rel=1e-15)
    assert "eq. 1" in s.text
    given = symmetric_uniform_scale(256, bound=0.3)
    assert given.uniform_bound == 0.3 and given.references == ()


# --- distributions for a target std -----------------------------------------------------------


@pytest.mark.parametrize("std", [0.02, 0.0505, 1.0, 3.7])
def test_uniform_bound_for_std_matches_scipy(std: float) -> None:
    b = uniform_bound_for_std(std)
    assert stats.uniform(loc=-b, scale=2 * b).std() == pytest.approx(std, rel=1e-15)
    r = distribution_for_std(std, "uniform")
    assert (r.sampler_scale, r.bound) == (b, b)
    assert r.std == pytest.approx(std, rel=1e-15)


def test_truncation_factor_matches_scipy_truncnorm() -> None:
    # standard result: N(0,1) truncated to [-2, 2] has std sqrt(1 - 4 phi(2)/(Phi(2)-Phi(-2)))
    assert TRUNCATION_BOUND == 2.0
    assert pytest.approx(stats.truncnorm(-2, 2).std(), rel=1e-14) == TRUNCATION_STD_FACTOR
    assert round(TRUNCATION_STD_FACTOR, 10) == 0.8796256610


@pytest.mark.parametrize("std", [0.02, 0.0505, 1.0])
def test_truncated_sigma_realises_the_target_std(std: float) -> None:
    sigma = truncated_sigma_for_std(std)
    realised = stats.truncnorm(-2, 2, scale=sigma).std()
    assert realised == pytest.approx(std, rel=1e-14)
    r = distribution_for_std(std, "truncated_normal")
    assert r.sampler_scale == sigma
    assert r.bound == 2 * sigma
    assert r.std == pytest.approx(std, rel=1e-15)


def test_normal_and_bound_based_parameters() -> None:
    r = distribution_for_std(0.1, "normal")
    assert (r.sampler_scale, r.std, r.bound) == (0.1, 0.1, None)
    u = distribution_for_bound(0.3, "uniform")
    assert (u.sampler_scale, u.bound) == (0.3, 0.3)
    t = distribution_for_bound(0.3, "truncated_normal")
    assert t.sampler_scale == 0.15 and t.bound == 0.3
    assert t.std == pytest.approx(stats.truncnorm(-2, 2, scale=0.15).std(), rel=1e-14)


def test_realise_keeps_the_rules_own_uniform_bound() -> None:
    s = glorot_scale(784, 256)
    assert realise(s, "uniform").bound == s.uniform_bound
    assert realise(s, "normal").sampler_scale == s.std


# --- prior bias, Lin et al. 2017 --------------------------------------------------------------


def test_prior_bias_lin_2017() -> None:
    # Lin et al. 2017, sec. 4.1: b = -log((1-pi)/pi), pi = 0.01 gives -4.59512.
    b = prior_bias(0.01)
    assert round(b.value, 5) == -4.59512
    assert b.value == pytest.approx(float(special.logit(0.01)), rel=1e-15)
    assert b.value == _mp(lambda: mpmath.log(mpmath.mpf(0.01) / (1 - mpmath.mpf(0.01))))
    assert "sec. 4.1" in b.text


def test_prior_bias_symmetry_and_half() -> None:
    assert prior_bias(0.5).value == 0.0
    assert prior_bias(0.25).value == -prior_bias(0.75).value  # both round the same |log 3|


# --- bad inputs ------------------------------------------------------------------------------


@pytest.mark.parametrize(
    ("call", "field"),
    [
        (lambda: glorot_scale(0, 10), "fan_in"),
        (lambda: glorot_scale(10, -1), "fan_out"),
        (lambda: glorot_scale(10, 10, gain=0.0), "gain"),
        (lambda: he_scale(10, 10, gain=math.nan), "gain"),
        (lambda: he_scale(10, 10, fan="both"), "fan"),
        (lambda: lecun_scale(math.inf), "fan_in"),
        (lambda: lecun_scale(True), "fan_in"),
        (lambda: symmetric_uniform_scale(10, bound=-0.1), "bound"),
        (lambda: uniform_bound_for_std(0.0), "std"),
        (lambda: distribution_for_std(0.1, "gaussian"), "distribution"),
        (lambda: distribution_for_bound(0.1, "normal"), "bound"),
        (lambda: prior_bias(0.0), "prior"),
        (lambda: prior_bias(1.0), "prior"),
        (lambda: prior_bias(math.nan), "prior"),
        (lambda: prior_bias("0.1"), "prior"),
    ],
)
def test_bad_arguments_name_the_field(call: object, field: str) -> None:
    with pytest.raises(ValueError, match=rf"^{field} "):
        call()  # type: ignore[operator]


def test_choice_errors_list_allowed_values() -> None:
    with pytest.raises(ValueError, match="in, out, mean"):
        select_fan(1, 2, "average")
    with pytest.raises(ValueError, match="uniform, normal, truncated_normal"):
        distribution_for_std(1.0, "laplace")
    with pytest.raises(ValueError, match="strictly between 0 and 1"):
        prior_bias(1.5)
