"""The truncated-normal constants the shared generator carries as float64 literals, recomputed
independently with mpmath (arbitrary precision) and with scipy as a second oracle."""

from __future__ import annotations

import mpmath
from scipy import stats

from seedbed_client.generator import truncation


def _mp_constants() -> tuple[float, float, float]:
    ctx = mpmath.mp.clone()
    ctx.dps = 60
    b = ctx.mpf(2)
    mass = ctx.erf(b / ctx.sqrt(2))  # Phi(2) - Phi(-2)
    density = ctx.exp(-b * b / 2) / ctx.sqrt(2 * ctx.pi)  # phi(2)
    # Variance of N(0,1) restricted to [-b, b]: 1 - 2 b phi(b) / (Phi(b) - Phi(-b))
    # (standard result for the truncated normal).
    factor = ctx.sqrt(1 - 2 * b * density / mass)
    return float(mass), float(factor), float((1 - mass) / 2)


def test_literals_equal_mpmath_rounded_once() -> None:
    mass, factor, tail = _mp_constants()
    assert mass == truncation.TRUNCATION_MASS
    assert factor == truncation.TRUNCATION_STD_FACTOR
    assert tail == truncation.TRUNCATION_LOWER_TAIL


def test_std_factor_agrees_with_scipy_truncnorm() -> None:
    # scipy's truncnorm is an independent implementation; agreement to 1e-14 relative.
    assert abs(stats.truncnorm(-2, 2).std() / truncation.TRUNCATION_STD_FACTOR - 1) < 1e-14
    # REFERENCES: the realised std is ~0.8796256610342398 times the untruncated one.
    assert abs(truncation.TRUNCATION_STD_FACTOR - 0.8796256610342398) < 1e-16
