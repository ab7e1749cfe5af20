"""Block shorthands and their expansion into basic layers.

A block shorthand (`transformer_block`, `residual_conv_block`) is a layer kind that parsing
replaces by basic layers carrying `branch` and `block`, deterministically and with documented
names (see the models' docstrings and docs/depth.md), so that everything after parsing —
plan, generation, diagnostics, web — sees only the six basic kinds.

    check_expanded_count(data, limits)       refuse a raw body whose blocks expand too far,
                                             from the shorthands' numbers alone
    expand_layers(items, context) -> layers  validated items with blocks replaced
    block_layer_dicts(block) -> [dict]       the basic layers of one block, as request JSON
    relocate_problems(problems, raw, request)  problems of expanded layers pointed at the
                                             fields of the request as written
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from typing import TYPE_CHECKING, Annotated, Any, ClassVar, Literal, Union

from pydantic import (
    AfterValidator,
    ConfigDict,
    Field,
    ValidationInfo,
    field_validator,
    model_validator,
)

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
from seedbed.core.request.layers import (
    LAYER_MODELS,
    AnyLayer,
    AttentionLayer,
    ConvLayer,
    DenseLayer,
    EmbeddingLayer,
    NormLayer,
    RecurrentLayer,
)
from seedbed.core.request.limits import MAX_SIZE, Limits, limits_from_context, raised_by
from seedbed.core.request.problems import (
    Allowed,
    Problem,
    RequestRejected,
    field_error,
)
from seedbed_client import wire_facts

BlockNorm = Literal["pre", "post"]
# Names of the layers and branches of one copy of a block: "<block>.<copy>.<part>".
TRANSFORMER_LAYER_PARTS: tuple[str, ...] = wire_facts.TRANSFORMER_LAYER_PARTS
TRANSFORMER_BRANCH_PARTS: tuple[str, ...] = wire_facts.TRANSFORMER_BRANCH_PARTS
CONV_LAYER_PARTS: tuple[str, ...] = wire_facts.CONV_LAYER_PARTS
CONV_BRANCH_PART: str = wire_facts.CONV_BRANCH_PART


class BlockBase(StrictModel):
    name: Annotated[str, Allowed(NAME_TEXT)] = Field(
        description="Name of the block; copy i of it is named '<name>.<i>', and its layers and "
        "branches '<name>.<i>.<part>' (see the kind's description).",
        examples=["encoder"],
    )
    repeat: Size = Field(
        default=1,
        description="How many copies of the block follow one another. The expanded layer "
        "count (repeat times the layers per copy) counts against the request's layer limit.",
        examples=[48],
    )
    activation: str | None = Field(
        default=None,
        description="The activation inside each copy (see the kind's description for where).",
        examples=["gelu"],
    )
    activation_param: Finite | None = Field(
        default=None,
        description="The activation's parameter (leaky_relu slope, elu alpha); filled with the "
        "default when omitted.",
        examples=[0.1],
    )
    bias: bool = Field(
        default=True,
        description="Whether every layer of the block has bias (norm layers: a shift).",
        examples=[True],
    )

    _default_activation: ClassVar[str] = "linear"
    _part_names: ClassVar[tuple[str, ...]] = ()

    @field_validator("name", mode="after")
    @classmethod
    def _check_name(cls, value: str, info: ValidationInfo) -> str:
        return checked_name(value, info)

    @field_validator("activation", mode="after")
    @classmethod
    def _check_activation_name(cls, value: str | None) -> str | None:
        return checked_activation(value)

    @model_validator(mode="before")
    @classmethod
    def _fill_block_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        return fill_activation(data, cls._default_activation)

    @model_validator(mode="after")
    def _check_block(self, info: ValidationInfo) -> BlockBase:
        check_activation_fit(self.activation, self.activation_param, "hidden")
        self._check_kind()
        limit = limits_from_context(info).max_name_length
        longest = f"{self.name}.{self.repeat - 1}.{max(self._part_names, key=len)}"
        if len(longest) > limit:
            raise field_error(
                "invalid_value",
                f"the expanded names would be too long: {longest[:40]}... has {len(longest)} "
                f"characters and names have at most {limit}; shorten the block name to at most "
                f"{len(self.name) - (len(longest) - limit)} characters",
                "name",
            )
        return self

    def _check_kind(self) -> None:
        """Kind-specific checks; subclasses override."""

    @property
    def layers_per_copy(self) -> int:
        raise NotImplementedError

    @property
    def layer_count(self) -> int:
        return self.repeat * self.layers_per_copy


class TransformerBlock(BlockBase):
    """A transformer block, expanded into five layers per copy and two residual branches.

    Copy i of block "enc": norm "enc.i.attn_norm", attention "enc.i.attn" (role residual_out:
    its output projection closes the branch), norm "enc.i.mlp_norm", dense "enc.i.mlp_in" (dim
    -> mlp_dim, followed by the activation) and dense "enc.i.mlp_out" (mlp_dim -> dim, role
    residual_out), in branches "enc.i.attn_branch" and "enc.i.mlp_branch". norm pre: each norm
    is the first layer of its branch (x + f(norm(x))). norm post: each norm follows the
    addition, outside the branch (norm(x + f(x))), in the order attn, attn_norm, mlp_in,
    mlp_out, mlp_norm. Example: {"name": "enc", "kind": "transformer_block", "dim": 768,
    "heads": 12, "mlp_dim": 3072, "norm": "pre", "repeat": 12}.
    """

    model_config = ConfigDict(title="transformer block")

    kind: Literal["transformer_block"] = Field(
        description="Block shorthand kind.", examples=["transformer_block"]
    )
    dim: Size = Field(description="Model width (attention dim, norm dim).", examples=[768])
    heads: Size = Field(description="Attention heads; divides dim.", examples=[12])
    mlp_dim: Size = Field(description="Hidden width of the feed-forward part.", examples=[3072])
    norm: Annotated[BlockNorm, Allowed("pre or post")] = Field(
        default="pre",
        description="pre: normalise the input of each branch (x + f(norm(x))); post: normalise "
        "after each residual addition (norm(x + f(x))).",
        examples=["pre"],
    )
    activation: str | None = Field(
        default=None,
        description="Activation after the feed-forward part's first layer (mlp_in); default gelu.",
        examples=["gelu"],
    )

    _default_activation: ClassVar[str] = "gelu"
    _part_names: ClassVar[tuple[str, ...]] = TRANSFORMER_LAYER_PARTS + TRANSFORMER_BRANCH_PARTS

    def _check_kind(self) -> None:
        if self.dim % self.heads:
            raise field_error(
                "invalid_value", f"heads must divide dim ({self.dim}); got {self.heads}", "heads"
            )

    @property
    def layers_per_copy(self) -> int:
        return len(TRANSFORMER_LAYER_PARTS)


class ResidualConvBlock(BlockBase):
    """A residual block of two same-width convolutions, optionally with normalisation.

    Copy i of block "res" is branch "res.i.branch". norm omitted: conv "res.i.conv1" (followed
    by the activation) and conv "res.i.conv2" (role residual_out). norm post: conv1, norm
    "res.i.norm1" (followed by the activation), conv2 (role residual_out), norm2. norm pre:
    norm1 (the activation), conv1, norm2 (the activation), conv2 (role residual_out). The
    activation after the residual addition (as in the original ResNet) belongs to no layer.
    Example: {"name": "stage2", "kind": "residual_conv_block", "channels": 128,
    "kernel": [3, 3], "repeat": 4}.
    """

    model_config = ConfigDict(title="residual conv block")

    kind: Literal["residual_conv_block"] = Field(
        description="Block shorthand kind.", examples=["residual_conv_block"]
    )
    channels: Size = Field(
        description="Channels in and out of every conv of the block.", examples=[128]
    )
    kernel: Annotated[
        list[Size],
        Field(min_length=1, max_length=3),
        Allowed(f"a list of 1 to 3 positive integers (each 1 to {MAX_SIZE})"),
    ] = Field(description="Kernel size per spatial dimension.", examples=[[3, 3]])
    norm: Annotated[BlockNorm, Allowed("pre or post (or omit it for no norm layers)")] | None = (
        Field(
            default=None,
            description="Norm layers in the branch: post (conv, norm, activation), pre "
            "(norm, activation, conv), or omitted for none (Fixup/SkipInit-style stacks).",
            examples=["post"],
        )
    )
    activation: str | None = Field(
        default=None,
        description="Activation inside the branch (after conv1, or after the norms); default relu.",
        examples=["relu"],
    )

    _default_activation: ClassVar[str] = "relu"
    _part_names: ClassVar[tuple[str, ...]] = (*CONV_LAYER_PARTS, CONV_BRANCH_PART)

    @property
    def layers_per_copy(self) -> int:
        return 2 if self.norm is None else 4


BLOCK_MODELS: dict[str, type[BlockBase]] = {
    "transformer_block": TransformerBlock,
    "residual_conv_block": ResidualConvBlock,
}

LayerOrBlockItem = Annotated[
    Union[  # noqa: UP007
        DenseLayer, ConvLayer, EmbeddingLayer, RecurrentLayer, AttentionLayer, NormLayer,
        TransformerBlock, ResidualConvBlock,
    ],
    Field(discriminator="kind"),
    Allowed(
        "a layer object with name, kind (dense, conv, embedding, recurrent, attention, norm, "
        "or a block shorthand: transformer_block, residual_conv_block) and the kind's fields"
    ),
]  # fmt: skip


def _expand_blocks(layers: list[Any], info: ValidationInfo) -> list[Any]:
    """Replace block shorthands by their basic layers (after every item validated)."""
    if not any(isinstance(item, BlockBase) for item in layers):
        return layers
    from seedbed.core.request.blocks import expand_layers

    limits = limits_from_context(info)
    total = sum(item.layer_count if isinstance(item, BlockBase) else 1 for item in layers)
    if total > limits.max_layers:
        raise field_error(
            "too_large",
            f"the layers expand to {total} layers; the limit is {limits.max_layers} per "
            f"request, counted after expanding block shorthands{raised_by('max_layers')}",
        )
    return expand_layers(layers, info.context)


if TYPE_CHECKING:
    # After validation the list holds basic layers only: blocks are expanded by the validator.
    LayerList = list[AnyLayer]
else:
    LayerList = Annotated[
        list[LayerOrBlockItem], Field(min_length=1), AfterValidator(_expand_blocks)
    ]


# ---------------------------------------------------------------------------------------------
# Counting and expanding block shorthands


def _is_block(item: object) -> bool:
    return wire_facts.is_block_item(item)


def _raw_count(item: object) -> int:
    return wire_facts.raw_layer_count(item)


def check_expanded_count(data: object, limits: Limits) -> None:
    """Refuse a body whose layers, after expanding block shorthands, exceed the layer limit
    (seedbed_client.wire_facts.expanded_count_refusal: the client runs the same check before
    sending). Call after `limits.check_layer_count`."""
    if not isinstance(data, dict) or not isinstance(data.get("layers"), list):
        return
    refusal = wire_facts.expanded_count_refusal(data["layers"], limits.max_layers)
    if refusal is not None:
        field, code, message = refusal
        raise RequestRejected([Problem(field, code, message + raised_by("max_layers"))])


def _activation(block: BlockBase) -> dict[str, Any]:
    out: dict[str, Any] = {"activation": block.activation}
    if block.activation_param is not None:
        out["activation_param"] = block.activation_param
    return out


def _transformer_copy(block: TransformerBlock, i: int) -> list[dict[str, Any]]:
    p = f"{block.name}.{i}."
    attn_branch, mlp_branch = p + "attn_branch", p + "mlp_branch"
    common = {"bias": block.bias, "block": block.name}
    pre = block.norm == "pre"
    attn_norm = {"name": p + "attn_norm", "kind": "norm", "dim": block.dim, **common}
    mlp_norm = {"name": p + "mlp_norm", "kind": "norm", "dim": block.dim, **common}
    if pre:
        attn_norm["branch"], mlp_norm["branch"] = attn_branch, mlp_branch
    attn = {
        "name": p + "attn",
        "kind": "attention",
        "dim": block.dim,
        "heads": block.heads,
        "role": "residual_out",
        "branch": attn_branch,
        **common,
    }
    mlp_in = {
        "name": p + "mlp_in",
        "kind": "dense",
        "n_in": block.dim,
        "n_out": block.mlp_dim,
        **_activation(block),
        "branch": mlp_branch,
        **common,
    }
    mlp_out = {
        "name": p + "mlp_out",
        "kind": "dense",
        "n_in": block.mlp_dim,
        "n_out": block.dim,
        "role": "residual_out",
        "branch": mlp_branch,
        **common,
    }
    if pre:
        return [attn_norm, attn, mlp_norm, mlp_in, mlp_out]
    return [attn, attn_norm, mlp_in, mlp_out, mlp_norm]


def _conv_copy(block: ResidualConvBlock, i: int) -> list[dict[str, Any]]:
    p = f"{block.name}.{i}."
    common = {"bias": block.bias, "block": block.name, "branch": p + CONV_BRANCH_PART}
    act = _activation(block)

    def conv(k: int, inner: dict[str, Any], role: str = "hidden") -> dict[str, Any]:
        return {
            "name": f"{p}conv{k}",
            "kind": "conv",
            "channels_in": block.channels,
            "channels_out": block.channels,
            "kernel": list(block.kernel),
            "role": role,
            **inner,
            **common,
        }

    def norm(k: int, inner: dict[str, Any]) -> dict[str, Any]:
        return {"name": f"{p}norm{k}", "kind": "norm", "dim": block.channels, **inner, **common}

    if block.norm is None:
        return [conv(1, act), conv(2, {}, "residual_out")]
    if block.norm == "post":
        return [conv(1, {}), norm(1, act), conv(2, {}, "residual_out"), norm(2, {})]
    return [norm(1, act), conv(1, {}), norm(2, act), conv(2, {}, "residual_out")]


def block_layer_dicts(block: BlockBase) -> list[dict[str, Any]]:
    """The basic layers of a validated block shorthand, in signal order, as request JSON."""
    out: list[dict[str, Any]] = []
    for i in range(block.repeat):
        if isinstance(block, TransformerBlock):
            out.extend(_transformer_copy(block, i))
        elif isinstance(block, ResidualConvBlock):
            out.extend(_conv_copy(block, i))
        else:  # pragma: no cover - every block model is handled above
            raise TypeError(f"not a block model: {type(block).__name__}")
    return out


def expand_layers(items: Sequence[Any], context: Any) -> list[AnyLayer]:
    """Validated layer items with every block replaced by its validated basic layers.

    The count has been checked against the limit by the caller; `context` is passed on so the
    expanded names meet the same limits as written ones.
    """
    out: list[AnyLayer] = []
    for item in items:
        if isinstance(item, BlockBase):
            for data in block_layer_dicts(item):
                model = LAYER_MODELS[data["kind"]]
                out.append(model.model_validate(data, context=context))  # type: ignore[arg-type]
        else:
            out.append(item)
    return out


# ---------------------------------------------------------------------------------------------
# Pointing problems of expanded layers at what the caller wrote

_LAYER_REF = re.compile(r"layers\[(\d+)\]((?:\.[a-z_]+)*)")


def relocate_problems(
    problems: Sequence[Problem], raw_layers: Sequence[Any], layers: Sequence[AnyLayer]
) -> list[Problem]:
    """Problems found on the expanded request, with paths into the request as written.

    A layer written by the caller keeps its fields under its original index. A layer made by a
    block points at the block (and at its name when the name is at fault), the message says
    which expanded layer is meant, and the same problem on many layers of one block is told
    once with a count. Without blocks nothing changes.
    """
    origin: list[tuple[int, bool]] = []
    for j, item in enumerate(raw_layers):
        is_block = _is_block(item)
        origin.extend([(j, is_block)] * _raw_count(item))
    if not any(is_block for _, is_block in origin) or len(origin) != len(layers):
        return list(problems)

    def ref(m: re.Match[str]) -> str:
        k = int(m.group(1))
        if k >= len(origin):
            return m.group(0)
        j, is_block = origin[k]
        if is_block:
            return f"layers[{j}] (its layer {layers[k].name!r})"
        return f"layers[{j}]{m.group(2)}"

    out: list[Problem] = []
    repeats: dict[tuple[str, str], int] = {}
    for p in problems:
        message = _LAYER_REF.sub(ref, p.message)
        head = _LAYER_REF.match(p.field)
        if head is None or int(head.group(1)) >= len(origin):
            out.append(Problem(p.field, p.code, message))
            continue
        k = int(head.group(1))
        j, is_block = origin[k]
        rest = p.field[len(f"layers[{k}]") :]
        if not is_block:
            out.append(Problem(f"layers[{j}]{rest}", p.code, message))
            continue
        field = f"layers[{j}]" + (".name" if rest == ".name" else "")
        if (field, p.code) in repeats:
            repeats[field, p.code] += 1
            continue
        repeats[field, p.code] = 0
        out.append(Problem(field, p.code, f"in layer {layers[k].name!r}, expanded from "
                                          f"layers[{j}]: {message}"))  # fmt: skip
    return [_with_count(p, repeats) for p in out]


def _with_count(p: Problem, repeats: dict[tuple[str, str], int]) -> Problem:
    more = repeats.get((p.field, p.code), 0)
    if not more:
        return p
    return Problem(p.field, p.code, f"{p.message} (and {more} more like it from the same block)")
