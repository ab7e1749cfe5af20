"""deterministic_log against mpmath: the measured bound is below 0.8 ulp; we assert < 1 ulp."""

from __future__ import annotations

import math

import numpy as np
import pytest

from conftest import require_oracle
from seedbed_client.generator import deterministic_log
from seedbed_client.generator.logarithm import LN2_HI, LN2_LO


def _max_ulp_error(x: np.ndarray) -> float:
    mpmath = require_oracle("mpmath")
    y = deterministic_log(x)
    worst = 0.0
    with mpmath.workprec(160):
        for xi, yi in zip(x.tolist(), y.tolist(), strict=True):
            exact = mpmath.log(mpmath.mpf(xi))
            if exact == 0:
                assert yi == 0.0
                continue
            err = abs(mpmath.mpf(yi) - exact) / math.ulp(float(exact))
            worst = max(worst, float(err))
    return worst


def test_within_one_ulp_over_the_whole_range() -> None:
    rng = np.random.default_rng(11)
    x = np.exp(rng.uniform(-744.0, 709.0, 3000))
    assert _max_ulp_error(x) < 1.0


def test_within_one_ulp_near_one_and_in_the_normal_tail_range() -> None:
    rng = np.random.default_rng(12)
    x = np.concatenate(
        [
            rng.uniform(0.5, 2.0, 3000),  # where log(m) and e*ln2 partly cancel
            1.0 + rng.uniform(-1e-6, 1e-6, 500),
            rng.uniform(2.0**-53, 0.075, 2000),  # what AS 241's tail asks for
        ]
    )
    assert _max_ulp_error(x) < 1.0


def test_subnormals_and_edges() -> None:
    x = np.array([5e-324, 1e-310, 2.2250738585072014e-308, 1.7976931348623157e308, 1.0, 2.0, 0.5])
    assert _max_ulp_error(x) < 1.0
    assert deterministic_log(np.array([1.0]))[0] == 0.0


def test_powers_of_two_within_half_an_ulp() -> None:
    # log(2**k) = k*LN2_HI + k*LN2_LO with the first product exact: one final rounding.
    mpmath = require_oracle("mpmath")
    k = np.arange(-1074, 1024)
    got = deterministic_log(np.ldexp(1.0, k))
    with mpmath.workprec(160):
        for ki, gi in zip(k.tolist(), got.tolist(), strict=True):
            if ki == 0:
                assert gi == 0.0
                continue
            exact = ki * mpmath.log(2)
            assert abs(mpmath.mpf(gi) - exact) <= 0.5 * math.ulp(float(exact))


def test_ln2_split_constants() -> None:
    mpmath = require_oracle("mpmath")
    with mpmath.workprec(200):
        ln2 = mpmath.log(2)
        assert float(mpmath.floor(ln2 * 2**32) / 2**32) == LN2_HI  # 32 significant bits
        assert float(ln2 - mpmath.mpf(LN2_HI)) == LN2_LO
    mantissa, _ = math.frexp(LN2_HI)
    assert (mantissa * 2**32).is_integer()


@pytest.mark.parametrize("bad", [0.0, -1.0, float("inf"), float("nan")])
def test_domain_errors(bad) -> None:
    with pytest.raises(ValueError, match="x must"):
        deterministic_log(np.array([1.0, bad]))
