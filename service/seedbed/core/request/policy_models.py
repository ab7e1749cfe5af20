"""The depth and width policies a request may name, as models (their checks and effects on
the plan live in seedbed.core.policies)."""

from __future__ import annotations

from typing import Annotated, Literal, Union

from pydantic import ConfigDict, Field, ValidationInfo, field_validator, model_validator

from seedbed.core.request.fields import NAME_TEXT, Positive, Size, StrictModel, checked_name
from seedbed.core.request.problems import Allowed, field_error
from seedbed_client import wire_facts

Architecture = Literal["encoder", "decoder", "encoder_decoder"]
POLICY_NAMES: tuple[str, ...] = wire_facts.POLICY_NAMES
# The base std of GPT-2-style initialisation: common practice, not a derived value.
SCALED_RESIDUAL_BASE_STD = 0.02


class FixupPolicy(StrictModel):
    """Fixup (Zhang et al. 2019): branch layers scaled by L^(-1/(2m-2)), the last layer of
    every branch and the classifier zero, a scalar multiplier (1) per branch and scalar offsets
    (0) before every weight layer and activation of a branch. Branches of dense and conv layers
    only. Example: {"name": "fixup"}."""

    model_config = ConfigDict(title="fixup policy")

    name: Literal["fixup"] = Field(description="Policy name.", examples=["fixup"])


class SkipGatePolicy(StrictModel):
    """A scalar gate per branch, initialised 0 (SkipInit, De & Smith 2020; ReZero, Bachlechner
    et al. 2020): every residual block starts as the identity. Example: {"name": "skip_gate"}."""

    model_config = ConfigDict(title="skip gate policy")

    name: Literal["skip_gate"] = Field(description="Policy name.", examples=["skip_gate"])


class ScaledResidualPolicy(StrictModel):
    """Normal weights of std base_std, and base_std/sqrt(N) on the last map of every residual
    branch, N the number of residual layers (Radford et al. 2019, sec. 2.3). Example:
    {"name": "scaled_residual", "base_std": 0.02}."""

    model_config = ConfigDict(title="scaled residual policy")

    name: Literal["scaled_residual"] = Field(
        description="Policy name.", examples=["scaled_residual"]
    )
    base_std: Positive = Field(
        default=SCALED_RESIDUAL_BASE_STD,
        description="Std of every weight matrix and embedding; default 0.02 (common practice "
        "in GPT-2-style models, not a derived value).",
        examples=[0.02],
    )
    residual_layers: Size | None = Field(
        default=None,
        description="N, the number of residual layers; default: the number of residual "
        "branches (two per transformer block).",
        examples=[24],
    )


class TransformerDepth(StrictModel):
    architecture: Annotated[Architecture, Allowed("encoder, decoder or encoder_decoder")] = Field(
        description="encoder or decoder (a single stack of N layers), or encoder_decoder.",
        examples=["encoder"],
    )
    encoder_layers: Size | None = Field(
        default=None,
        description="N, the encoder's number of layers (blocks); default: its feed-forward "
        "branches, one per transformer block.",
        examples=[6],
    )
    decoder_layers: Size | None = Field(
        default=None,
        description="M, the decoder's number of layers (blocks); default: its feed-forward "
        "branches.",
        examples=[6],
    )
    decoder_start: Annotated[str, Allowed(NAME_TEXT)] | None = Field(
        default=None,
        description="encoder_decoder only (required there): the name of the decoder's first "
        "layer; the layers before it are the encoder.",
        examples=["dec.0.attn_norm"],
    )

    @field_validator("decoder_start", mode="after")
    @classmethod
    def _check_start(cls, value: str | None, info: ValidationInfo) -> str | None:
        return None if value is None else checked_name(value, info)

    @model_validator(mode="after")
    def _check_architecture(self) -> TransformerDepth:
        arch = self.architecture
        if arch == "encoder_decoder":
            if self.decoder_start is None:
                raise field_error(
                    "missing_field",
                    "encoder_decoder needs decoder_start: the name of the decoder's first layer",
                    "decoder_start",
                )
            return self
        other = "decoder_layers" if arch == "encoder" else "encoder_layers"
        for name in (other, "decoder_start"):
            if getattr(self, name) is not None:
                own = "encoder_layers" if arch == "encoder" else "decoder_layers"
                raise field_error(
                    "not_allowed",
                    f"{name} is only for other architectures; a single {arch} stack takes {own}",
                    name,
                )
        return self


class DeepNormPolicy(TransformerDepth):
    """DeepNorm (Wang et al. 2022) for post-norm transformers: feed-forward, value and output
    projections Glorot normal with gain beta, query and key gain 1, and the residual multiplier
    alpha returned for the training script (x_next = norm(alpha*x + f(x))). encoder or
    decoder with N layers: alpha = (2N)^(1/4), beta = (8N)^(-1/4); encoder_decoder: encoder
    alpha = 0.81 (N^4 M)^(1/16), beta = 0.87 (N^4 M)^(-1/16), decoder alpha = (3M)^(1/4),
    beta = (12M)^(-1/4). Example: {"name": "deepnorm", "architecture": "encoder"}."""

    model_config = ConfigDict(title="deepnorm policy")

    name: Literal["deepnorm"] = Field(description="Policy name.", examples=["deepnorm"])


class TFixupPolicy(TransformerDepth):
    """T-Fixup (Huang et al. 2020) for transformers trained without normalisation or warmup:
    Glorot uniform projections, value and output projections and feed-forward weights scaled by
    0.67 N^(-1/4) in the encoder and (9M)^(-1/4) in the decoder, embeddings normal with std
    dim^(-1/2) scaled by (9M)^(-1/4) [from memory; see docs/depth.md]. Example:
    {"name": "t_fixup", "architecture": "encoder_decoder", "decoder_start": "dec.0.attn"}."""

    model_config = ConfigDict(title="t_fixup policy")

    name: Literal["t_fixup"] = Field(description="Policy name.", examples=["t_fixup"])


class WidthTransferPolicy(StrictModel):
    """Width scaling relative to a base width, in the spirit of Yang et al. 2021 (Tensor
    Programs V, Table 3 [from memory]): hidden and input weights keep variance 1/fan_in, the
    output layer's variance is multiplied by base_width/width, and the learning-rate scalings
    a training script must apply are returned under "multipliers". These are scalings, not
    exact constants. Example: {"name": "width_transfer", "base_width": 256}."""

    model_config = ConfigDict(title="width transfer policy")

    name: Literal["width_transfer"] = Field(description="Policy name.", examples=["width_transfer"])
    base_width: Size = Field(
        description="Width of the model whose hyperparameters were tuned.", examples=[256]
    )
    width: Size | None = Field(
        default=None,
        description="Width of this model; default: the input width of its output layer.",
        examples=[1024],
    )


POLICY_MODELS: dict[str, type[StrictModel]] = {
    "fixup": FixupPolicy,
    "skip_gate": SkipGatePolicy,
    "scaled_residual": ScaledResidualPolicy,
    "deepnorm": DeepNormPolicy,
    "t_fixup": TFixupPolicy,
    "width_transfer": WidthTransferPolicy,
}
# The `depth_policy` field's models: depth-aware rules and width transfer alike.
PolicyField = Annotated[
    Union[  # noqa: UP007
        FixupPolicy, SkipGatePolicy, ScaledResidualPolicy, DeepNormPolicy, TFixupPolicy,
        WidthTransferPolicy,
    ],
    Field(discriminator="name"),
]  # fmt: skip
POLICY_TEXT = f"an object with name (one of {', '.join(POLICY_NAMES)}) and its parameters"
