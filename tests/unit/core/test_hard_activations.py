"""hard_swish and hard_sigmoid: values against torch CPU, gains against independent integrators.

Both are from Howard et al. (2019), "Searching for MobileNetV3", ICCV: h-swish(x) =
x * ReLU6(x + 3) / 6 and h-sigmoid(x) = ReLU6(x + 3) / 6 (slope 1/6); the ONNX HardSigmoid
operator (opset 6) writes max(0, min(1, alpha * x + beta)) with default alpha 0.2.
"""

from __future__ import annotations

import itertools
import math

import mpmath
import numpy as np
import pytest

from conftest import require_oracle
from seedbed.core.activations import activation_derivative, apply_activation, gain_for


def _scipy_second_moment(phi, kinks):  # type: ignore[no-untyped-def]
    integrate = require_oracle("scipy.integrate")
    points = [-math.inf, *kinks, math.inf]
    total = 0.0
    for a, b in itertools.pairwise(points):
        part, _ = integrate.quad(
            lambda z: phi(z) ** 2 * math.exp(-z * z / 2) / math.sqrt(2 * math.pi),
            a,
            b,
            epsabs=1e-16,
            epsrel=1e-13,
            limit=200,
        )
        total += part
    return total


def test_hard_swish_gain_against_quadpack_and_mpmath() -> None:
    phi = lambda z: z * min(max(z / 6 + 0.5, 0.0), 1.0)  # noqa: E731
    m2 = _scipy_second_moment(phi, [-3.0, 0.0, 3.0])
    got = gain_for("hard_swish")
    assert got.second_moment == pytest.approx(m2, rel=1e-12)
    ctx = mpmath.MPContext()
    ctx.prec = 140
    exact = ctx.quad(
        lambda z: (z * min(max(z / 6 + ctx.mpf(0.5), 0), 1)) ** 2 * ctx.npdf(z),
        [-ctx.inf, -3, 0, 3, ctx.inf],
    )
    assert got.value == float(1 / ctx.sqrt(exact))  # correctly rounded


@pytest.mark.parametrize("slope", [0.2, 1.0 / 6.0, 1.0])
def test_hard_sigmoid_closed_form_against_quadpack(slope: float) -> None:
    c = 1 / (2 * slope)
    phi = lambda z: min(max(slope * z + 0.5, 0.0), 1.0)  # noqa: E731
    m2 = _scipy_second_moment(phi, [-c, 0.0, c])
    got = gain_for("hard_sigmoid", slope)
    assert got.second_moment == pytest.approx(m2, rel=1e-12)
    assert got.value == pytest.approx(1 / math.sqrt(m2), rel=1e-12)


def test_values_and_slopes_match_torch() -> None:
    torch = require_oracle("torch")
    x = np.linspace(-7.0, 7.0, 57) + 0.0123  # off the kinks
    for name, fn in (
        ("hard_swish", torch.nn.functional.hardswish),
        ("hard_sigmoid", torch.nn.functional.hardsigmoid),
    ):
        t = torch.tensor(x, dtype=torch.float64, requires_grad=True)
        y = fn(t)
        (grad,) = torch.autograd.grad(y.sum(), t)
        np.testing.assert_allclose(apply_activation(name, x), y.detach().numpy(), rtol=1e-12)
        # torch's backward multiplies by 1/6 rounded to float32: 3e-8 relative
        np.testing.assert_allclose(activation_derivative(name, x), grad.numpy(), rtol=1e-7)
