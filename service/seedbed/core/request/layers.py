"""The six basic layer kinds: dense, conv, embedding, recurrent, attention, norm.

Everything after parsing sees only these (block shorthands are expanded into them by
seedbed.core.request.blocks).
"""

from __future__ import annotations

from typing import Annotated, Any, Literal

from pydantic import ConfigDict, Field, ValidationInfo, field_validator, model_validator

from seedbed.core.request.fields import (
    NAME_TEXT,
    Finite,
    Size,
    StrictModel,
    check_activation_fit,
    checked_activation,
    checked_name,
    fill_activation,
)
from seedbed.core.request.limits import MAX_SIZE
from seedbed.core.request.overrides import BiasOverride, WeightOverride
from seedbed.core.request.problems import Allowed, field_error
from seedbed.core.request.vocabulary import GATES, RANDOM_METHODS, Cell, Role

# Sources a layer's `reads` may join: more than any concatenating skip in common use.
MAX_READS = 16


class LayerBase(StrictModel):
    name: Annotated[str, Allowed(NAME_TEXT)] = Field(
        description="Unique name of the layer; tensor names are built from it.",
        examples=["encoder.0"],
    )
    activation: str | None = Field(
        default=None,
        description="The activation applied to this layer's output. Default linear (simple "
        "recurrent cells: tanh; lstm/gru take none). softmax only for output layers.",
        examples=["relu"],
    )
    activation_param: Finite | None = Field(
        default=None,
        description="The activation's parameter: leaky_relu's negative slope (default 0.01), "
        "elu's alpha (default 1.0); filled with the default when omitted.",
        examples=[0.2],
    )
    role: Role = Field(
        default="hidden",
        description="hidden, output (the network's last layer), or residual_out (the last layer "
        "of a residual branch, whose output is added to the skip path).",
        examples=["output"],
    )
    branch: Annotated[str, Allowed(NAME_TEXT)] | None = Field(
        default=None,
        description="Name of the residual branch this layer belongs to. Consecutive layers "
        "with the same branch form one branch; its input (the output of the layer before it, "
        "or the network input) is added to the output of its last layer. Must not equal a "
        "layer name; input and output widths must match.",
        examples=["encoder.3.mlp_branch"],
    )
    block: Annotated[str, Allowed(NAME_TEXT)] | None = Field(
        default=None,
        description="Label of the block shorthand this layer was expanded from (filled by the "
        "expansion; you may set it to group your own layers in the plan's layer list).",
        examples=["encoder"],
    )
    init: WeightOverride | None = Field(
        default=None,
        description="Explicit initialisation of this layer's weight tensors.",
        examples=[{"method": "he", "distribution": "normal", "fan": "in"}],
    )
    bias_init: BiasOverride | None = Field(
        default=None,
        description="Explicit constant for this layer's bias tensors (needs bias true).",
        examples=[{"method": "constant", "value": 0.0}],
    )
    class_prior: (
        Annotated[float, Field(gt=0, lt=1), Allowed("a probability strictly between 0 and 1")]
        | None
    ) = Field(
        default=None,
        description="For a dense or conv output layer with a bias: the prior probability of "
        "the positive class; the bias becomes log(pi/(1-pi)) (Lin et al. 2017, sec. 4.1).",
        examples=[0.01],
    )
    reads: (
        Annotated[
            list[Annotated[str, Allowed("the name of an earlier layer")]],
            Field(max_length=MAX_READS),
            Allowed(f"a list of at most {MAX_READS} names of earlier layers"),
        ]
        | None
    ) = Field(
        default=None,
        description="What this layer reads when it is not the output of the layer before it: "
        "the names of earlier layers whose outputs are joined (concatenated along features) "
        "into its input, e.g. a second head on a trunk, or a skip that concatenates. Its input "
        "width is then checked against their sum. An empty list: the layer reads an input of "
        "the network, not checked. Omit it for the usual chain "
        "(seedbed.core.request.width_chain).",
        examples=[["trunk.3"], ["encoder.1", "decoder.0"], []],
    )

    @field_validator("name", "branch", "block", mode="after")
    @classmethod
    def _check_name(cls, value: str | None, info: ValidationInfo) -> str | None:
        return None if value is None else checked_name(value, info)

    @field_validator("activation", mode="after")
    @classmethod
    def _check_activation(cls, value: str | None) -> str | None:
        return checked_activation(value)

    @model_validator(mode="before")
    @classmethod
    def _fill_layer_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        return fill_activation(data, cls._default_activation(data))

    @classmethod
    def _default_activation(cls, data: dict[str, Any]) -> str | None:
        return "linear"

    @model_validator(mode="after")
    def _check_layer(self) -> LayerBase:
        self._check_kind()
        self._check_activation_fields()
        self._check_bias_fields()
        return self

    def _check_kind(self) -> None:
        """Kind-specific checks; subclasses override."""

    def _has_bias(self) -> bool:
        return bool(getattr(self, "bias", False))

    def _check_activation_fields(self) -> None:
        check_activation_fit(self.activation, self.activation_param, self.role)

    def _check_bias_fields(self) -> None:
        kind = getattr(self, "kind", "")
        if self.bias_init is not None and not self._has_bias():
            raise field_error(
                "not_allowed", "bias_init needs the layer to have a bias (bias: true)", "bias_init"
            )
        if self.class_prior is None:
            return
        if kind not in ("dense", "conv"):
            raise field_error(
                "not_allowed",
                f"class_prior is only for dense and conv output layers, not {kind}",
                "class_prior",
            )
        if self.role != "output":
            raise field_error(
                "not_allowed", "class_prior is only allowed when role is output", "class_prior"
            )
        if not self._has_bias():
            raise field_error(
                "not_allowed",
                "class_prior sets the bias, so the layer needs bias: true",
                "class_prior",
            )
        if self.bias_init is not None:
            raise field_error(
                "not_allowed",
                "class_prior already sets the bias; give class_prior or bias_init, not both",
                "bias_init",
            )


class DenseLayer(LayerBase):
    """A fully connected layer y = W x + b."""

    model_config = ConfigDict(title="dense layer")

    kind: Literal["dense"] = Field(description="Layer kind.", examples=["dense"])
    n_in: Size = Field(description="Input features.", examples=[784])
    n_out: Size = Field(description="Output features (units).", examples=[256])
    bias: bool = Field(
        default=True, description="Whether the layer has a bias vector.", examples=[True]
    )


class ConvLayer(LayerBase):
    """A convolution over 1 to 3 spatial dimensions, optionally grouped or transposed."""

    model_config = ConfigDict(title="conv layer")

    kind: Literal["conv"] = Field(description="Layer kind.", examples=["conv"])
    channels_in: Size = Field(description="Input channels.", examples=[3])
    channels_out: Size = Field(description="Output channels.", examples=[64])
    kernel: Annotated[
        list[Size],
        Field(min_length=1, max_length=3),
        Allowed(f"a list of 1 to 3 positive integers (each 1 to {MAX_SIZE})"),
    ] = Field(description="Kernel size per spatial dimension.", examples=[[3, 3]])
    groups: Size = Field(
        default=1,
        description="Number of channel groups; divides channels_in and channels_out.",
        examples=[1],
    )
    transposed: bool = Field(
        default=False,
        description="A transposed (fractionally strided) convolution.",
        examples=[False],
    )
    stride: (
        Annotated[
            list[Size],
            Field(min_length=1, max_length=3),
            Allowed(f"a list of positive integers, one per kernel entry (each 1 to {MAX_SIZE})"),
        ]
        | None
    ) = Field(
        default=None,
        description="Stride per spatial dimension, one per kernel entry; default all 1.",
        examples=[[2, 2]],
    )
    bias: bool = Field(
        default=True, description="Whether the layer has a bias per channel.", examples=[True]
    )

    @model_validator(mode="before")
    @classmethod
    def _fill_stride(cls, data: Any) -> Any:
        if isinstance(data, dict) and data.get("stride") is None:
            kernel = data.get("kernel")
            if isinstance(kernel, list) and 1 <= len(kernel) <= 3:
                data = dict(data)
                data["stride"] = [1] * len(kernel)
        return data

    def _check_kind(self) -> None:
        if self.stride is not None and len(self.stride) != len(self.kernel):
            raise field_error(
                "invalid_value",
                f"stride needs one entry per kernel entry ({len(self.kernel)}); got "
                f"{len(self.stride)}",
                "stride",
            )
        g = self.groups
        if self.channels_in % g or self.channels_out % g:
            raise field_error(
                "invalid_value",
                f"groups must divide channels_in ({self.channels_in}) and channels_out "
                f"({self.channels_out}); got {g}",
                "groups",
            )


class EmbeddingLayer(LayerBase):
    """A lookup table: one row of `dim` values per token id."""

    model_config = ConfigDict(title="embedding layer")

    kind: Literal["embedding"] = Field(description="Layer kind.", examples=["embedding"])
    vocab: Size = Field(description="Number of rows (token ids).", examples=[32000])
    dim: Size = Field(description="Width of each row.", examples=[512])
    bias: bool = Field(
        default=False, description="Always false: an embedding has no bias.", examples=[False]
    )

    def _check_kind(self) -> None:
        if self.bias:
            raise field_error(
                "not_allowed", "an embedding has no bias; omit bias or set it false", "bias"
            )


class RecurrentLayer(LayerBase):
    """A recurrent layer: simple (Elman), LSTM or GRU cell, gates stacked in `gate_order`."""

    model_config = ConfigDict(title="recurrent layer")

    kind: Literal["recurrent"] = Field(description="Layer kind.", examples=["recurrent"])
    cell: Cell = Field(description="simple, lstm or gru.", examples=["lstm"])
    n_in: Size = Field(description="Input features per step.", examples=[128])
    hidden: Size = Field(description="Hidden state size.", examples=[256])
    gate_order: (
        Annotated[
            list[str],
            Allowed(
                "each gate of the cell exactly once: lstm input, forget, cell, output; gru reset, "
                "update, candidate"
            ),
        ]
        | None
    ) = Field(
        default=None,
        description="Order in which gate blocks are stacked along the output axis (lstm: input, "
        "forget, cell, output; gru: reset, update, candidate; not for simple cells).",
        examples=[["input", "forget", "cell", "output"]],
    )
    forget_bias: Finite | None = Field(
        default=None,
        description="lstm only: the forget-gate bias (default 1.0; Gers et al. 2000, "
        "Jozefowicz et al. 2015).",
        examples=[1.0],
    )
    bias: bool = Field(
        default=True, description="Whether the cell has a bias per gate unit.", examples=[True]
    )

    @classmethod
    def _default_activation(cls, data: dict[str, Any]) -> str | None:
        return "tanh" if data.get("cell") == "simple" else None

    @model_validator(mode="before")
    @classmethod
    def _fill_cell_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        cell = data.get("cell")
        data = dict(data)
        if cell in ("lstm", "gru") and data.get("gate_order") is None:
            data["gate_order"] = list(GATES[cell])
        if cell == "lstm" and data.get("forget_bias") is None and data.get("bias") is not False:
            data["forget_bias"] = 1.0
        return data

    @property
    def gate_count(self) -> int:
        return len(GATES[self.cell])

    def _check_kind(self) -> None:
        if self.cell == "simple":
            if self.gate_order is not None:
                raise field_error(
                    "not_allowed", "a simple cell has no gates; omit gate_order", "gate_order"
                )
        else:
            expected = GATES[self.cell]
            got = self.gate_order or []
            if sorted(got) != sorted(expected):
                raise field_error(
                    "invalid_value",
                    f"gate_order must name each {self.cell} gate exactly once: "
                    f"{', '.join(expected)} (in any order); got {got}",
                    "gate_order",
                )
            if self.activation is not None:
                raise field_error(
                    "not_allowed",
                    f"{self.cell} cells have built-in gate nonlinearities (sigmoid gates, tanh "
                    "candidate); activation is only for simple cells",
                    "activation",
                )
        if self.forget_bias is not None and self.cell != "lstm":
            raise field_error("not_allowed", "forget_bias is only for lstm cells", "forget_bias")
        if self.forget_bias is not None and not self.bias:
            raise field_error(
                "not_allowed", "forget_bias needs the cell to have a bias (bias: true)",
                "forget_bias",
            )  # fmt: skip


class AttentionLayer(LayerBase):
    """Multi-head attention: query, key, value and output projections, each dim x dim."""

    model_config = ConfigDict(title="attention layer")

    kind: Literal["attention"] = Field(description="Layer kind.", examples=["attention"])
    dim: Size = Field(description="Model width.", examples=[512])
    heads: Size = Field(description="Number of heads; divides dim.", examples=[8])
    bias: bool = Field(
        default=True, description="Whether each projection has a bias.", examples=[True]
    )

    def _check_kind(self) -> None:
        if self.dim % self.heads:
            raise field_error(
                "invalid_value",
                f"heads must divide dim ({self.dim}); got {self.heads}",
                "heads",
            )


class NormLayer(LayerBase):
    """A normalisation layer's affine part: a scale and (with bias) a shift, each of size dim."""

    model_config = ConfigDict(title="norm layer")

    kind: Literal["norm"] = Field(description="Layer kind.", examples=["norm"])
    dim: Size = Field(description="Number of features normalised.", examples=[512])
    bias: bool = Field(
        default=True, description="Whether the layer has a shift vector.", examples=[True]
    )

    def _check_kind(self) -> None:
        init = self.init
        if init is None or init.method == "constant":
            return
        if init.method in RANDOM_METHODS and (init.std is not None or init.bound is not None):
            return
        raise field_error(
            "not_allowed",
            "a norm scale is a vector with no fan: use constant, or symmetric_uniform/glorot/"
            "he/lecun with an explicit std or bound",
            "init.method",
        )


LAYER_MODELS: dict[str, type[LayerBase]] = {
    "dense": DenseLayer,
    "conv": ConvLayer,
    "embedding": EmbeddingLayer,
    "recurrent": RecurrentLayer,
    "attention": AttentionLayer,
    "norm": NormLayer,
}
AnyLayer = DenseLayer | ConvLayer | EmbeddingLayer | RecurrentLayer | AttentionLayer | NormLayer
