"""Field types and checks shared by every request model: sizes, gains, names, activations.

`StrictModel` is the base of every request model (unknown fields refused, no coercion, no
NaN or Infinity). The name and activation checks are used by layers and blocks alike.
"""

from __future__ import annotations

import re
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, ValidationInfo

from seedbed.core.activations import activation_names, describe_activation
from seedbed.core.request.limits import MAX_SIZE, limits_from_context
from seedbed.core.request.problems import Allowed, describe_input, field_error
from seedbed.core.request.suggest import did_you_mean
from seedbed.core.request.vocabulary import GAIN_MAX, GAIN_MIN

NAME_PATTERN = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.\-]*")

SIZE_TEXT = f"a positive integer (1 to {MAX_SIZE})"
Size = Annotated[int, Field(ge=1, le=MAX_SIZE), Allowed(SIZE_TEXT, is_size=True)]
Positive = Annotated[float, Field(gt=0), Allowed("a positive finite number")]
Gain = Annotated[
    float, Field(ge=GAIN_MIN, le=GAIN_MAX), Allowed(f"a number from {GAIN_MIN:g} to {GAIN_MAX:g}")
]
Finite = Annotated[float, Allowed("a finite number")]


class StrictModel(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False, frozen=True)


def activation_allowed_text() -> str:
    return ", ".join(activation_names())


def checked_activation(value: str | None) -> str | None:
    if value is not None and value not in activation_names():
        raise field_error(
            "invalid_value",
            f"got {describe_input(value)}; allowed activations: {activation_allowed_text()}"
            f"{did_you_mean(value, activation_names())}",
        )
    return value


NAME_TEXT = (
    "1 to 128 characters of letters, digits, '_', '.', '-', starting with a letter, digit or '_'"
)


def checked_name(value: str, info: ValidationInfo) -> str:
    """Layer, branch and block names: the character rules and the length limit."""
    limits = limits_from_context(info)
    if not value or len(value) > limits.max_name_length:
        raise field_error(
            "invalid_value",
            f"names have 1 to {limits.max_name_length} characters; got {len(value)}",
        )
    if not NAME_PATTERN.fullmatch(value):
        raise field_error(
            "invalid_value",
            f"got {describe_input(value)}; allowed: letters, digits, '_', '.', '-', "
            "starting with a letter, digit or '_'",
        )
    return value


def check_activation_fit(activation: str | None, param: float | None, role: str) -> None:
    """An activation with its parameter, on a layer with the given role."""
    if activation is None:
        if param is not None:
            raise field_error(
                "not_allowed",
                "activation_param needs an activation that takes a parameter "
                "(leaky_relu: slope; elu: alpha)",
                "activation_param",
            )
        return
    info = describe_activation(activation)
    if info.output_only and role != "output":
        raise field_error(
            "not_allowed",
            f"{activation} is only allowed on an output layer (role: output)",
            "activation",
        )
    if param is not None:
        if info.param is None:
            takers = [
                f"{n} ({p.name})"
                for n in activation_names()
                if (p := describe_activation(n).param) is not None
            ]
            raise field_error(
                "not_allowed",
                f"{activation} takes no parameter; only {', '.join(takers)} take one",
                "activation_param",
            )
        if not info.param.contains(param):
            raise field_error(
                "invalid_value",
                f"{activation}'s {info.param.name} must be in {info.param.range_text()}; "
                f"got {param!r}",
                "activation_param",
            )


def fill_activation(data: dict[str, Any], default: str | None) -> dict[str, Any]:
    """Fill a missing activation with `default` and a missing parameter with its default."""
    data = dict(data)
    if data.get("activation") is None:
        if default is None:
            data.pop("activation", None)
        else:
            data["activation"] = default
    activation = data.get("activation")
    if (
        data.get("activation_param") is None
        and isinstance(activation, str)
        and activation in activation_names()
    ):
        spec = describe_activation(activation).param
        if spec is not None:
            data["activation_param"] = spec.default
    return data
