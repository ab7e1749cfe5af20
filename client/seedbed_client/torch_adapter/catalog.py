"""What the adapter knows about torch's own classes and calls: which modules are layers, which
are activations (as modules, functions or methods, with their parameter), which only pass the
signal through."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

from torch import nn

CONVS = (nn.Conv1d, nn.Conv2d, nn.Conv3d)
TRANSPOSED = (nn.ConvTranspose1d, nn.ConvTranspose2d, nn.ConvTranspose3d)
NORMS: tuple[type[nn.Module], ...] = (
    nn.LayerNorm,
    nn.BatchNorm1d,
    nn.BatchNorm2d,
    nn.BatchNorm3d,
    nn.GroupNorm,
    nn.InstanceNorm1d,
    nn.InstanceNorm2d,
    nn.InstanceNorm3d,
    *((nn.RMSNorm,) if hasattr(nn, "RMSNorm") else ()),
)
_PASS_MODULES: tuple[type[nn.Module], ...] = (
    nn.Dropout,
    nn.Dropout1d,
    nn.Dropout2d,
    nn.Dropout3d,
    nn.AlphaDropout,
    nn.Identity,
    nn.Flatten,
    nn.Unflatten,
    nn.MaxPool1d,
    nn.MaxPool2d,
    nn.MaxPool3d,
    nn.AvgPool1d,
    nn.AvgPool2d,
    nn.AvgPool3d,
    nn.AdaptiveAvgPool1d,
    nn.AdaptiveAvgPool2d,
    nn.AdaptiveAvgPool3d,
    nn.AdaptiveMaxPool1d,
    nn.AdaptiveMaxPool2d,
    nn.AdaptiveMaxPool3d,
)
_CONTAINERS = (nn.Sequential, nn.ModuleList, nn.ModuleDict)

Activation = tuple[str, float | None]


def has_affine(m: nn.Module) -> bool:
    return isinstance(getattr(m, "weight", None), nn.Parameter)


def is_leaf_module(m: nn.Module) -> bool:
    """torch's own modules are read whole; containers and the caller's classes are looked into."""
    return type(m).__module__.startswith("torch.nn") and not isinstance(m, _CONTAINERS)


def is_pass_through_module(m: nn.Module) -> bool:
    """Modules that do not change which activation a layer feeds: dropout, pooling, reshaping,
    and norms without an affine part (with one they are layers of their own)."""
    return isinstance(m, _PASS_MODULES) or (isinstance(m, NORMS) and not has_affine(m))


def activation_of_module(m: nn.Module | None) -> Activation | None:
    """A torch activation module as (seedbed activation name, parameter)."""
    if isinstance(m, nn.ReLU):
        return "relu", None
    if isinstance(m, nn.LeakyReLU):
        return "leaky_relu", float(m.negative_slope)
    if isinstance(m, nn.ELU):
        return "elu", float(m.alpha)
    if isinstance(m, nn.SELU):
        return "selu", None
    if isinstance(m, nn.GELU):
        return "gelu", None
    if isinstance(m, nn.SiLU):
        return "silu", None
    if isinstance(m, nn.Tanh):
        return "tanh", None
    if isinstance(m, nn.Sigmoid):
        return "sigmoid", None
    if isinstance(m, nn.Softplus) and m.beta == 1:
        return "softplus", None
    if isinstance(m, (nn.Softmax, nn.LogSoftmax)):
        return "softmax", None
    return None


# Functions and methods by plain name (torch.relu, F.relu, x.relu(), relu_ ...), with where
# their parameter sits: (position after the input, keyword, torch's default).
_CALLS: Mapping[str, tuple[str, tuple[int, str, float] | None]] = {
    "relu": ("relu", None),
    "leaky_relu": ("leaky_relu", (1, "negative_slope", 0.01)),
    "elu": ("elu", (1, "alpha", 1.0)),
    "selu": ("selu", None),
    "gelu": ("gelu", None),
    "silu": ("silu", None),
    "tanh": ("tanh", None),
    "sigmoid": ("sigmoid", None),
    "softplus": ("softplus", None),
    "softmax": ("softmax", None),
    "log_softmax": ("softmax", None),
}


def activation_of_call(
    name: str, args: tuple[Any, ...], kwargs: Mapping[str, Any]
) -> Activation | None:
    """The activation a torch call applies, or None when the call is not an activation (or one
    with a setting seedbed has no gain for, such as softplus with beta != 1)."""
    if name not in _CALLS:
        return None
    act, param = _CALLS[name]
    if name == "softplus":
        beta = kwargs.get("beta", args[1] if len(args) > 1 else 1.0)
        return ("softplus", None) if beta == 1 else None
    if param is None:
        return act, None
    position, keyword, default = param
    value = kwargs.get(keyword, args[position] if len(args) > position else default)
    return act, float(value)


def activation_text(act: Activation | None) -> str:
    if act is None:
        return "?"
    return act[0] if act[1] is None else f"{act[0]}({act[1]:g})"


def function_activation(fn: Any) -> Activation | None:
    """The activation of a callable held by a module (TransformerEncoderLayer.activation)."""
    if isinstance(fn, nn.Module):
        return activation_of_module(fn)
    name = getattr(fn, "__name__", "")
    return activation_of_call(name, (), {}) if name else None
