"""The AS 241 inverse normal CDF and the +-2 truncation constants, against outside oracles."""

from __future__ import annotations

from decimal import Decimal

import numpy as np
import pytest

from conftest import require_oracle
from seedbed_client.generator import (
    TRUNCATION_MASS,
    TRUNCATION_STD_FACTOR,
    normal_quantile,
)
from seedbed_client.generator import normal_inverse as ni
from seedbed_client.generator.unit import open_probability


def _mantissa_sum(coeffs: tuple[float, ...]) -> Decimal:
    total = Decimal(0)
    for c in coeffs:
        d = Decimal(repr(c))
        while d >= 10:
            d /= 10
        while d < 1:
            d *= 10
        total += d
    return total


@pytest.mark.parametrize(
    ("groups", "published"),
    [
        ((ni.AS241_A, ni.AS241_B[1:]), "55.8831928806149014439"),
        ((ni.AS241_C, ni.AS241_D[1:]), "49.33206503301610289036"),
        ((ni.AS241_E, ni.AS241_F[1:]), "47.52583317549289671629"),
    ],
)
def test_coefficients_match_the_published_hash_sums(groups, published) -> None:
    # Wichura (1988), AS 241: the listing prints, for each region, the sum of the decimal
    # mantissas of its coefficients as a transcription check. Our float literals, read back
    # by repr (shortest round-trip), must add up to it within float64 precision.
    total = _mantissa_sum(groups[0]) + _mantissa_sum(groups[1])
    assert abs(total - Decimal(published)) < Decimal("1e-13")


def test_matches_scipy_ndtri_to_1e_14_relative() -> None:
    special = require_oracle("scipy.special")
    dense = np.linspace(1e-12, 1 - 1e-12, 400_001)
    tails = np.logspace(-12, np.log10(0.5), 100_001)
    p = np.concatenate([dense, tails, 1.0 - tails])
    z = normal_quantile(p)
    ref = special.ndtri(p)  # Cephes, an independent algorithm
    nonzero = ref != 0
    rel = np.abs(z[nonzero] - ref[nonzero]) / np.abs(ref[nonzero])
    assert rel.max() <= 1e-14, f"max relative error {rel.max():.3e}"
    assert np.all(z[~nonzero] == 0.0)


def test_far_tail_branch_matches_scipy() -> None:
    special = require_oracle("scipy.special")
    # r = sqrt(-log p) > 5 needs p < exp(-25): AS 241's third region.
    p = np.logspace(-300, -11, 2001)
    z = normal_quantile(p)
    rel = np.abs(z - special.ndtri(p)) / np.abs(special.ndtri(p))
    assert rel.max() <= 1e-14


def test_against_mpmath_at_a_few_points() -> None:
    mpmath = require_oracle("mpmath")
    points = [1e-300, 1e-20, 2.0**-53, 1e-9, 0.0227501319481792, 0.07, 0.3, 0.8, 0.975, 1 - 1e-9]
    z = normal_quantile(np.array(points))
    with mpmath.workdps(40):
        for p, got in zip(points, z.tolist(), strict=True):
            # Solve Phi(x) = p at 40 digits, starting from the float64 answer.
            exact = mpmath.findroot(lambda x, p=p: mpmath.ncdf(x) - mpmath.mpf(p), mpmath.mpf(got))
            assert abs(got - exact) / abs(exact) < 2e-15, (p, got, exact)
    assert normal_quantile(np.array([0.5]))[0] == 0.0


def test_exact_symmetry_on_the_generator_grid() -> None:
    raw = np.random.default_rng(7).integers(0, 2**64, size=20_000, dtype=np.uint64)
    p = open_probability(raw)
    assert np.all((p > 0) & (p < 1))
    assert np.array_equal(normal_quantile(1.0 - p), -normal_quantile(p))


def test_extreme_grid_points() -> None:
    special = require_oracle("scipy.special")
    p = np.array([2.0**-53, 3 * 2.0**-53, 1 - 2.0**-53])
    z = normal_quantile(p)
    assert np.allclose(z, special.ndtri(p), rtol=1e-14, atol=0)
    assert z[0] == -z[2]


@pytest.mark.parametrize("bad", [0.0, 1.0, -0.5, 1.5, float("nan")])
def test_outside_the_open_interval_is_refused(bad) -> None:
    with pytest.raises(ValueError, match="p must"):
        normal_quantile(np.array([0.5, bad]))


def test_truncation_constants_against_scipy() -> None:
    stats = require_oracle("scipy.stats")
    special = require_oracle("scipy.special")
    # Standard result: the variance of N(0,1) restricted to [-2, 2] is
    # 1 - 4 phi(2) / (Phi(2) - Phi(-2)); scipy integrates its own truncated normal.
    assert pytest.approx(stats.truncnorm(-2, 2).std(), rel=1e-14) == TRUNCATION_STD_FACTOR
    assert pytest.approx(0.8796256610342398, rel=1e-15) == TRUNCATION_STD_FACTOR
    assert pytest.approx(special.ndtr(2.0) - special.ndtr(-2.0), rel=1e-15) == TRUNCATION_MASS


def test_truncation_constants_are_correctly_rounded() -> None:
    mpmath = require_oracle("mpmath")
    with mpmath.workdps(60):
        mass = mpmath.ncdf(2) - mpmath.ncdf(-2)
        factor = mpmath.sqrt(1 - 4 * mpmath.npdf(2) / mass)
        # float(mpf) rounds to nearest: the constants must be exactly those doubles.
        assert float(mass) == TRUNCATION_MASS
        assert float(factor) == TRUNCATION_STD_FACTOR
