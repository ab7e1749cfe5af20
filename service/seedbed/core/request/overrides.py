"""Explicit initialisations a caller may give a layer instead of the recommendation."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import ConfigDict, Field, model_validator

from seedbed.core.request.fields import Finite, Gain, Positive, StrictModel
from seedbed.core.request.problems import Allowed, field_error
from seedbed.core.request.vocabulary import (
    DEFAULT_DISTRIBUTION,
    FAN_METHODS,
    GAIN_MAX,
    GAIN_MIN,
    RANDOM_METHODS,
    Distribution,
    Fan,
    WeightMethod,
)


class WeightOverride(StrictModel):
    """An explicit initialisation for a layer's weight tensors, replacing the recommendation.

    Which fields each method takes (anything else is refused with a message):

    - symmetric_uniform: U(-b, b). Either an explicit `bound` (or `std`, b = std*sqrt(3)), or
      b = gain/sqrt(fan) from `fan` (in | out | mean, default in) and `gain` (default: from the
      activation), the older heuristic of Glorot & Bengio (2010) eq. 1. `distribution` may be
      omitted or "uniform".
    - glorot, he, lecun: `distribution` uniform | normal | truncated_normal (defaults: glorot
      uniform, he normal, lecun normal), `gain` (default: from the activation). he and lecun
      take `fan` (in | out | mean, default in); glorot always uses the mean of fan-in and
      fan-out (only "mean" is accepted). Alternatively an explicit `std` (any distribution) or
      `bound` (uniform only) fixes the scale, and then fan and gain are refused: the explicit
      number is the final scale.
    - orthogonal, identity: only `gain`.
    - constant: only `value` (required).
    """

    model_config = ConfigDict(title="weight override")

    method: Annotated[
        WeightMethod,
        Allowed("one of symmetric_uniform, glorot, he, lecun, orthogonal, identity, constant"),
    ] = Field(description="The initialisation method.", examples=["he", "orthogonal"])
    distribution: Distribution | None = Field(
        default=None,
        description="Distribution for symmetric_uniform/glorot/he/lecun; filled with the "
        "method's default when omitted; not used by orthogonal/identity/constant.",
        examples=["truncated_normal"],
    )
    fan: Fan | None = Field(
        default=None,
        description="Which fan scales the weights: in, out or mean of the two. symmetric_uniform, "
        "he and lecun take any (default in); glorot is always mean.",
        examples=["in"],
    )
    gain: Gain | None = Field(
        default=None,
        description=f"Multiplier of the method's unit scale, {GAIN_MIN:g} to {GAIN_MAX:g}; "
        "default: the activation's gain.",
        examples=[1.0],
    )
    std: Positive | None = Field(
        default=None,
        description="Explicit standard deviation of the realised distribution (replaces the "
        "fan-based formula; not with bound).",
        examples=[0.02],
    )
    bound: Positive | None = Field(
        default=None,
        description="Explicit bound b of U(-b, b) (uniform only; not with std).",
        examples=[0.05],
    )
    value: Finite | None = Field(
        default=None,
        description="The value of every element; required for, and only for, constant.",
        examples=[0.0],
    )

    @model_validator(mode="before")
    @classmethod
    def _fill_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        method = data.get("method")
        if not isinstance(method, str) or method not in RANDOM_METHODS:
            return data
        data = dict(data)
        if data.get("distribution") is None:
            data["distribution"] = DEFAULT_DISTRIBUTION[method]
        explicit_scale = data.get("std") is not None or data.get("bound") is not None
        if data.get("fan") is None and not explicit_scale:
            data["fan"] = "mean" if method == "glorot" else "in"
        return data

    @model_validator(mode="after")
    def _check(self) -> WeightOverride:
        m = self.method
        if m not in RANDOM_METHODS:
            for name in ("distribution", "fan", "std", "bound"):
                if getattr(self, name) is not None:
                    raise field_error(
                        "not_allowed",
                        f"{m} does not take {name}; "
                        + ("it takes only value" if m == "constant" else "it takes only gain"),
                        name,
                    )
            if m == "constant":
                if self.gain is not None:
                    raise field_error("not_allowed", "constant takes only value", "gain")
                if self.value is None:
                    raise field_error(
                        "missing_field", "constant needs value: a finite number", "value"
                    )
            return self
        if self.value is not None:
            raise field_error("not_allowed", "value is only allowed when method is constant",
                              "value")  # fmt: skip
        if m == "symmetric_uniform" and self.distribution != "uniform":
            raise field_error(
                "not_allowed",
                "symmetric_uniform is uniform by definition; omit distribution or set uniform",
                "distribution",
            )
        if self.std is not None and self.bound is not None:
            raise field_error("not_allowed", "give either std or bound, not both", "bound")
        if self.bound is not None and self.distribution != "uniform":
            raise field_error(
                "not_allowed",
                "bound is only allowed when the distribution is uniform (a truncated normal is "
                "cut at 2 std; give std instead)",
                "bound",
            )
        if self.std is not None or self.bound is not None:
            which = "std" if self.std is not None else "bound"
            for name in ("fan", "gain"):
                if getattr(self, name) is not None:
                    raise field_error(
                        "not_allowed",
                        f"{name} is not used with an explicit {which}: the {which} is the final "
                        f"scale; remove {name}, or remove {which} to use the {m} formula",
                        name,
                    )
        if m not in FAN_METHODS and self.fan not in (None, "mean"):
            raise field_error(
                "not_allowed",
                "glorot always uses the mean of fan-in and fan-out (allowed: mean); use he or "
                "lecun to scale by fan-in or fan-out alone",
                "fan",
            )
        return self


class BiasOverride(StrictModel):
    """An explicit value for every element of a layer's bias tensors."""

    model_config = ConfigDict(title="bias override")

    method: Annotated[Literal["constant"], Allowed("constant (the only bias method)")] = Field(
        description="Only constant is available for biases.", examples=["constant"]
    )
    value: Finite = Field(description="The value of every bias element.", examples=[0.1])
