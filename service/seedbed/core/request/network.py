"""The whole request: seed, dtype, layout, layers (blocks expanded) and an optional policy."""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import (
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
    ValidatorFunctionWrapHandler,
    field_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from seedbed.core.request.blocks import LayerList
from seedbed.core.request.fields import StrictModel
from seedbed.core.request.policy_models import POLICY_MODELS, POLICY_NAMES, POLICY_TEXT, PolicyField
from seedbed.core.request.problems import (
    BODY,
    Allowed,
    ProblemCode,
    describe_input,
    field_error,
    problems_from_validation_error,
)
from seedbed.core.request.vocabulary import DType, Layout
from seedbed_client.generator.keys import SEED_INT_MAX
from seedbed_client.generator.keys import SEED_STR_MAX_CHARS as SEED_STR_MAX

_EXAMPLE_REQUEST: dict[str, Any] = {
    "seed": 20261201,
    "dtype": "float32",
    "layout": "out_in",
    "layers": [
        {"name": "sensor.embed", "kind": "embedding", "vocab": 4096, "dim": 64},
        {"name": "sensor.mix", "kind": "conv", "channels_in": 64, "channels_out": 128,
         "kernel": [5], "activation": "gelu"},
        {"name": "sensor.memory", "kind": "recurrent", "cell": "gru", "n_in": 128,
         "hidden": 128},
        {"name": "alarm", "kind": "dense", "n_in": 128, "n_out": 1, "activation": "sigmoid",
         "role": "output", "class_prior": 0.02},
    ],
}  # fmt: skip
# A 24-block pre-norm language model in a few lines: 24 * 5 + 3 = 123 layers after expansion.
_EXAMPLE_BLOCKS: dict[str, Any] = {
    "seed": "harbour-chat/base",
    "layers": [
        {"name": "tokens", "kind": "embedding", "vocab": 32000, "dim": 512},
        {"name": "body", "kind": "transformer_block", "dim": 512, "heads": 8, "mlp_dim": 2048,
         "norm": "pre", "repeat": 24},
        {"name": "final_norm", "kind": "norm", "dim": 512},
        {"name": "next_token", "kind": "dense", "n_in": 512, "n_out": 32000, "bias": False,
         "role": "output"},
    ],
    "depth_policy": {"name": "scaled_residual"},
}  # fmt: skip


class NetworkRequest(StrictModel):
    """A request for initial weights: seed, dtype, layout, the network's layers, and optionally
    a depth policy. Block shorthands in `layers` are expanded: after validation `layers` holds
    basic layers only."""

    model_config = ConfigDict(
        title="network request",
        json_schema_extra={"examples": [_EXAMPLE_REQUEST, _EXAMPLE_BLOCKS]},
    )

    seed: Annotated[
        Annotated[int, Field(ge=0, le=SEED_INT_MAX)]
        | Annotated[str, Field(min_length=1, max_length=SEED_STR_MAX)],
        Allowed(f"an integer 0 to {SEED_INT_MAX} or a string of 1 to {SEED_STR_MAX} characters"),
    ] = Field(
        description=f"Integer 0 to {SEED_INT_MAX}, or a string of 1 to {SEED_STR_MAX} "
        "characters (hashed into the generator key). Booleans are not integers.",
        examples=[20261201, "team-baseline-2026"],
    )
    dtype: Annotated[DType, Allowed("one of float32, float64, float16, bfloat16")] = Field(
        default="float32", description="Element type of every tensor.", examples=["float32"]
    )
    layout: Annotated[Layout, Allowed("out_in or in_out")] = Field(
        default="out_in",
        description="out_in: rows are output units (dense (n_out, n_in)); in_out: the "
        "transpose (dense (n_in, n_out), conv (*kernel, in/groups, out)).",
        examples=["out_in"],
    )
    layers: Annotated[
        LayerList,
        Allowed("a list of at least one layer object (the limit is set by the service)"),
    ] = Field(
        description="The layers, in the order the signal meets them. Block shorthands "
        "(transformer_block, residual_conv_block) expand into named basic layers.",
        examples=[_EXAMPLE_REQUEST["layers"][:2], _EXAMPLE_BLOCKS["layers"][1:2]],
    )
    widths: (
        Annotated[Literal["unchecked"], Allowed("unchecked, or omit the field (widths chain)")]
        | None
    ) = Field(
        default=None,
        description="Omit it: each layer's input width must equal what it reads (the layer "
        'before it, or the layers named in its `reads`). "unchecked": the layers are a '
        "collection of separate layers rather than one network, and no width between them is "
        "checked (diagnose refuses such a request: it needs a chain).",
        examples=["unchecked"],
    )
    depth_policy: Annotated[PolicyField, Allowed(POLICY_TEXT)] | None = Field(
        default=None,
        description="A depth- or width-aware rule applied on top of the recommendations: "
        f"{', '.join(POLICY_NAMES)}. Omit it for the plain recommendations.",
        examples=[
            {"name": "fixup"},
            {"name": "deepnorm", "architecture": "encoder", "encoder_layers": 6},
            {"name": "width_transfer", "base_width": 256},
        ],
    )

    @field_validator("depth_policy", mode="wrap")
    @classmethod
    def _dispatch_policy(
        cls, value: Any, handler: ValidatorFunctionWrapHandler, info: ValidationInfo
    ) -> Any:
        # Chosen by hand rather than by the discriminator so that problems are reported at
        # depth_policy.<field> (a discriminated union would put the tag into the path).
        if value is None or not isinstance(value, dict):
            if value is None or isinstance(value, StrictModel):
                return handler(value)
            raise field_error("invalid_type", f"got {describe_input(value)}; allowed: "
                              f"{POLICY_TEXT}")  # fmt: skip
        name = value.get("name")
        model = POLICY_MODELS.get(name) if isinstance(name, str) else None
        if model is None:
            code: ProblemCode = "missing_field" if "name" not in value else "invalid_value"
            got = "no name" if "name" not in value else f"got {describe_input(name)}"
            raise field_error(code, f"{got}; allowed policy names: {', '.join(POLICY_NAMES)}",
                              "name")  # fmt: skip
        try:
            return model.model_validate(value, context=info.context)
        except ValidationError as err:
            problems = problems_from_validation_error(model, err)
        raise ValidationError.from_exception_data(
            "depth_policy",
            [
                InitErrorDetails(
                    type=PydanticCustomError(p.code, p.message),
                    loc=() if p.field == BODY else (p.field,),
                    input=value,
                )
                for p in problems
            ],
        )

    @field_validator("seed", mode="before")
    @classmethod
    def _check_seed(cls, value: Any) -> Any:
        problem = seed_problem(value)
        if problem is not None:
            raise field_error(*problem)
        return value


def seed_problem(value: Any) -> tuple[ProblemCode, str] | None:
    """(code, message) when `value` is not a seed this service accepts, else None."""
    allowed = f"an integer 0 to {SEED_INT_MAX} or a string of 1 to {SEED_STR_MAX} characters"
    if isinstance(value, bool) or not isinstance(value, int | str):
        return "invalid_type", f"got {describe_input(value)}; allowed: {allowed}"
    if isinstance(value, int) and not 0 <= value <= SEED_INT_MAX:
        return "invalid_value", f"got {describe_input(value)}; allowed: {allowed}"
    if isinstance(value, str):
        if not 1 <= len(value) <= SEED_STR_MAX:
            return "invalid_value", f"got a string of {len(value)} characters; allowed: {allowed}"
        try:  # the seed is hashed as UTF-8; JSON can smuggle in lone surrogates (\ud800)
            value.encode("utf-8")
        except UnicodeEncodeError:
            return (
                "invalid_value",
                f"the string contains a lone surrogate; allowed: {allowed} of valid Unicode",
            )
    return None


def canonical_request(request: NetworkRequest) -> dict[str, Any]:
    """The request as JSON-ready data: defaults filled, absent options dropped, keys sorted.

    Same meaning, same dict: defaults are filled by the models (activation, activation_param,
    stride, gate_order, forget_bias, override distribution and fan), integers given for float
    fields become floats, and unset optional fields are omitted rather than written as null.
    `parse(canonical_request(r)).request` gives back an equal request.
    """
    return _sorted(request.model_dump(mode="json", exclude_none=True))


def _sorted(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _sorted(value[k]) for k in sorted(value)}
    if isinstance(value, list):
        return [_sorted(v) for v in value]
    return value
