"""Per-unit health of one layer's output: dead units and saturation, defined in one place.

A *unit* is one output feature (a dense unit, a conv channel, an attention or norm feature);
its values are all samples and positions of the synthetic batch.

Dead (`dead_fraction`, the fraction of units that are dead):

    rectifier family          a unit is dead when its pre-activation is <= 0 for every
      relu, leaky_relu, elu,  sample and position: it never leaves the negative regime. For
      selu, gelu, silu,       relu that means output 0 and gradient 0 (nothing can revive it
      softplus, hard_swish    through this batch); for the others a small or vanishing slope.
    tanh, sigmoid,            a unit is dead when phi'(x) is exactly 0.0 in float64 for every
    hard_sigmoid              value (saturated beyond the float's resolution: |x| > ~19 for
                              tanh, x < -745 or x > 37 for sigmoid; outside the ramp for
                              hard_sigmoid): it passes no gradient.
    linear, softmax           never dead (no flat region).

Saturated (`saturated_fraction`, the fraction of all output values, not of units):

    tanh        |phi(x)| > 0.99
    sigmoid     phi(x) <= 0.01 or phi(x) >= 0.99 (hard_sigmoid likewise)
    others      not applicable: null (no saturation region; a rectifier's flat side is what
                `dead_fraction` measures)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

from seedbed.core.activations import activation_derivative, apply_activation

FloatArray = npt.NDArray[np.float64]

RECTIFIER_FAMILY = frozenset(
    {"relu", "leaky_relu", "elu", "selu", "gelu", "silu", "softplus", "hard_swish"}
)
FLAT_WHEN_SATURATED = frozenset({"tanh", "sigmoid", "hard_sigmoid"})
SATURATION_RULES: dict[str, str] = {
    "tanh": "|tanh(x)| > 0.99",
    "sigmoid": "sigmoid(x) <= 0.01 or >= 0.99",
    "hard_sigmoid": "hard_sigmoid(x) <= 0.01 or >= 0.99",
}


def dead_units(activation: str, pre: FloatArray, slope: FloatArray | None) -> npt.NDArray[np.bool_]:
    """Boolean per unit (last axis) under the rule for `activation` (see module doc)."""
    rows = pre.reshape(-1, pre.shape[-1])
    if activation in RECTIFIER_FAMILY:
        result: npt.NDArray[np.bool_] = np.all(rows <= 0.0, axis=0)
        return result
    if activation in FLAT_WHEN_SATURATED and slope is not None:
        flat: npt.NDArray[np.bool_] = np.all(slope.reshape(rows.shape) == 0.0, axis=0)
        return flat
    return np.zeros(rows.shape[1], dtype=bool)


def saturated_fraction(activation: str, post: FloatArray) -> float | None:
    """Fraction of output values in the activation's saturated region; None if it has none."""
    if activation == "tanh":
        return float(np.mean(np.abs(post) > 0.99))
    if activation in ("sigmoid", "hard_sigmoid"):
        return float(np.mean((post <= 0.01) | (post >= 0.99)))
    return None


@dataclass
class Activated:
    """An activation applied to a layer's pre-activation, with what the backward pass needs."""

    post: FloatArray
    # relu: boolean mask of positive inputs; softmax: its output; linear: None; else phi'(x)
    slope: npt.NDArray[np.float64] | npt.NDArray[np.bool_] | None
    dead: npt.NDArray[np.bool_]
    saturated: float | None


def activate(activation: str, param: float | None, pre: FloatArray) -> Activated:
    if activation == "linear":
        return Activated(pre, None, dead_units(activation, pre, None), None)
    if activation == "relu":
        mask = pre > 0.0
        post = np.where(mask, pre, 0.0)
        return Activated(post, mask, dead_units(activation, pre, None), None)
    post = apply_activation(activation, pre, param)
    if activation == "softmax":
        return Activated(post, post, dead_units(activation, pre, None), None)
    slope = activation_derivative(activation, pre, param)
    return Activated(
        post, slope, dead_units(activation, pre, slope), saturated_fraction(activation, post)
    )


def activation_backward(
    activation: str,
    slope: npt.NDArray[np.float64] | npt.NDArray[np.bool_] | None,
    grad_post: FloatArray,
) -> FloatArray:
    """Gradient with respect to the pre-activation from the gradient of the output."""
    if slope is None:
        return grad_post
    if activation == "relu":
        return np.where(slope, grad_post, 0.0)
    if activation == "softmax":  # full Jacobian along the last axis: s * (g - <s, g>)
        s = slope.astype(np.float64)
        result: FloatArray = s * (grad_post - np.sum(s * grad_post, axis=-1, keepdims=True))
        return result
    product: FloatArray = grad_post * slope
    return product


__all__ = [
    "FLAT_WHEN_SATURATED",
    "RECTIFIER_FAMILY",
    "SATURATION_RULES",
    "Activated",
    "activate",
    "activation_backward",
    "dead_units",
    "saturated_fraction",
]
