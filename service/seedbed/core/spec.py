"""The request format: a network's layers, validated strictly, with defaults filled in.

A request is a JSON object:

    seed      integer 0 .. 2**63-1, or a string of 1..128 characters (hashed into a key).
              true/false are not integers here.
    dtype     float32 (default) | float64 | float16 | bfloat16
    layout    out_in (default: rows are output units) | in_out (the transpose; see tensors.py)
    layers    1 .. Limits.max_layers layer objects, in the order the signal meets them

Every layer has a unique `name` (letters, digits, ``_ . -``; starting with a letter, digit or
``_``; at most Limits.max_name_length characters) and a `kind` with its own size fields:

    dense       n_in, n_out
    conv        channels_in, channels_out, kernel (1-3 sizes), groups (1; divides both
                channel counts), transposed (false), stride (one per kernel entry; all 1s)
    embedding   vocab, dim                    (no bias)
    recurrent   cell (simple | lstm | gru), n_in, hidden, gate_order (lstm/gru only),
                forget_bias (lstm only, default 1.0)
    attention   dim, heads (heads divides dim): query/key/value/output projections
    norm        dim: a scale and (with bias) a shift vector

and these optional fields:

    activation        what follows the layer (an activation name; default linear; simple
                      recurrent cells default to tanh; lstm/gru cells have built-in gate
                      nonlinearities and take none; softmax only on output layers)
    activation_param  the activation's one parameter (leaky_relu slope, elu alpha); filled with
                      the activation's default when it takes one and none is given
    role              hidden (default) | output | residual_out (last layer of a residual branch)
    bias              whether the layer has bias tensors (default true; embedding: false only;
                      norm: whether it has a shift)
    init              override for the layer's weight tensors (see `WeightOverride`)
    bias_init         override for its bias tensors: {"method": "constant", "value": v}
    class_prior       dense/conv output layers with a bias: the prior probability pi in (0, 1)
                      of the positive class; the bias is set to log(pi/(1-pi)) (Lin et al. 2017)

Residual structure (optional on every layer; see seedbed.core.structure and docs/depth.md):

    branch            name of the residual branch the layer belongs to (same character rules as
                      layer names; must not equal a layer name). Consecutive layers with the
                      same branch form one branch: the branch's input (the output of the layer
                      before its first layer, or the network input) is added to the output of
                      its last layer. Reusing a branch name further down is refused. The
                      branch's input and output widths must match where both are known.
    block             label of the block shorthand the layer was expanded from (set by the
                      expansion; callers may set it to group their own layers in the plan)

Block shorthands are layer kinds that `parse_request` expands into basic layers, so everything
after parsing sees only the six basic kinds:

    transformer_block    dim, heads, mlp_dim, norm (pre | post, default pre), activation
                         (default gelu), repeat (default 1), bias. Copy i of block "enc" is
                         norm "enc.i.attn_norm", attention "enc.i.attn" (role residual_out: its
                         output projection closes the branch), norm "enc.i.mlp_norm", dense
                         "enc.i.mlp_in" (dim -> mlp_dim, the activation) and dense
                         "enc.i.mlp_out" (mlp_dim -> dim, role residual_out), in branches
                         "enc.i.attn_branch" and "enc.i.mlp_branch". pre: each norm opens its
                         branch (x + f(norm(x))); post: each norm follows the addition, outside
                         the branch (norm(x + f(x))), order attn, attn_norm, mlp_in, mlp_out,
                         mlp_norm.
    residual_conv_block  channels, kernel, activation (default relu), norm (none, pre or post),
                         repeat, bias. Copy i of block "res" is branch "res.i.branch" of convs
                         "res.i.conv1" (the activation) and "res.i.conv2" (role residual_out);
                         with norm post: conv1, norm1 (the activation), conv2, norm2; with norm
                         pre: norm1 (the activation), conv1, norm2 (the activation), conv2.

The layer limit applies to the expanded count, computed from the shorthands' numbers before
anything is expanded.

    depth_policy      optional request-level object {"name": ..., parameters} choosing a depth-
                      or width-aware rule: fixup, skip_gate, scaled_residual, deepnorm, t_fixup,
                      width_transfer (see seedbed.core.policies). Absent: plain recommendations.

Strictness: unknown fields are refused everywhere, numbers must not be quoted, booleans are not
numbers, NaN and Infinity are refused, sizes are positive integers at most 2**31-1.

`parse_request(data, limits)` is the entry point for untrusted input: besides the model checks
it checks what spans layers (unique layer and tensor names), that explicit values fit the
dtype, and the size limits. Validating `NetworkRequest` directly skips those; do not serve a
request that did not go through `parse_request`.

`canonical_request(request)` gives the JSON-ready form with every default filled and keys
sorted: two requests that mean the same thing have the same canonical form, which is what
ETags and caches key on.
"""

from __future__ import annotations

import re
from typing import TYPE_CHECKING, Annotated, Any, ClassVar, Literal, Union

from pydantic import (
    AfterValidator,
    BaseModel,
    ConfigDict,
    Field,
    ValidationError,
    ValidationInfo,
    ValidatorFunctionWrapHandler,
    field_validator,
    model_validator,
)
from pydantic_core import InitErrorDetails, PydanticCustomError

from seedbed.core.activations import activation_names, describe_activation
from seedbed.core.limits import MAX_SIZE, Limits, check_layer_count, size_problems
from seedbed.core.problems import (
    BODY,
    Allowed,
    Problem,
    ProblemCode,
    RequestRejected,
    describe_input,
    field_error,
    problems_from_validation_error,
)
from seedbed.core.suggest import did_you_mean
from seedbed_client.generator.keys import SEED_INT_MAX
from seedbed_client.generator.keys import SEED_STR_MAX_CHARS as SEED_STR_MAX

# ---------------------------------------------------------------------------------------------
# Vocabulary

DType = Literal["float32", "float64", "float16", "bfloat16"]
Layout = Literal["out_in", "in_out"]
Role = Literal["hidden", "output", "residual_out"]
Cell = Literal["simple", "lstm", "gru"]
WeightMethod = Literal[
    "symmetric_uniform", "glorot", "he", "lecun", "orthogonal", "identity", "constant"
]
Distribution = Literal["uniform", "normal", "truncated_normal"]
Fan = Literal["in", "out", "mean"]


# Largest finite value of each dtype (IEEE 754 binary16/32/64; bfloat16 keeps float32's
# exponent with an 8-bit significand). A test checks these against numpy/ml_dtypes finfo.
DTYPE_MAX: dict[str, float] = {
    "float64": 1.7976931348623157e308,
    "float32": 3.4028234663852886e38,
    "float16": 65504.0,
    "bfloat16": 3.3895313892515355e38,
}
# Smallest positive normal number of each dtype. An explicit std or bound below it would give
# values that are subnormal (a few bits of precision) or round to zero, making units identical.
DTYPE_TINY: dict[str, float] = {
    "float64": 2.2250738585072014e-308,
    "float32": 1.1754943508222875e-38,
    "float16": 6.103515625e-05,
    "bfloat16": 1.1754943508222875e-38,
}
# An explicit gain is a multiplier of order one in every published rule (sqrt(2) for ReLU,
# ~1.59 for tanh, 1 for SELU; branch down-scaling goes to ~1e-2). 1e-6 .. 1e6 leaves ample
# room while keeping every scale derived from it finite and non-zero in float64 arithmetic.
GAIN_MIN = 1e-6
GAIN_MAX = 1e6

# Normal draws come from probabilities no closer to 0 or 1 than 2**-53, whose normal quantile
# is about -8.21 (scipy.special.ndtri); 8.3 bounds |z| with a margin. A std is refused when
# 8.3 * std would not fit the dtype.
NORMAL_EXTREME = 8.3

LSTM_GATES: tuple[str, ...] = ("input", "forget", "cell", "output")
GRU_GATES: tuple[str, ...] = ("reset", "update", "candidate")
GATES: dict[str, tuple[str, ...]] = {"simple": ("candidate",), "lstm": LSTM_GATES, "gru": GRU_GATES}

RANDOM_METHODS = frozenset({"symmetric_uniform", "glorot", "he", "lecun"})
FAN_METHODS = frozenset({"symmetric_uniform", "he", "lecun"})  # glorot's fan is fixed: mean
# Distribution a random method uses when the override names none: Glorot & Bengio (2010)
# derive their normalised init as a uniform (eq. 16); He et al. (2015) draw from a zero-mean
# Gaussian (eq. 10); LeCun et al. (1998) state the target std, normal is the usual reading.
DEFAULT_DISTRIBUTION: dict[str, str] = {
    "symmetric_uniform": "uniform",
    "glorot": "uniform",
    "he": "normal",
    "lecun": "normal",
}

_NAME_PATTERN = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.\-]*")

_SIZE_TEXT = f"a positive integer (1 to {MAX_SIZE})"
Size = Annotated[int, Field(ge=1, le=MAX_SIZE), Allowed(_SIZE_TEXT, is_size=True)]
Positive = Annotated[float, Field(gt=0), Allowed("a positive finite number")]
Gain = Annotated[
    float, Field(ge=GAIN_MIN, le=GAIN_MAX), Allowed(f"a number from {GAIN_MIN:g} to {GAIN_MAX:g}")
]
Finite = Annotated[float, Allowed("a finite number")]


class _Strict(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False, frozen=True)


# ---------------------------------------------------------------------------------------------
# Overrides


class WeightOverride(_Strict):
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


class BiasOverride(_Strict):
    """An explicit value for every element of a layer's bias tensors."""

    model_config = ConfigDict(title="bias override")

    method: Annotated[Literal["constant"], Allowed("constant (the only bias method)")] = Field(
        description="Only constant is available for biases.", examples=["constant"]
    )
    value: Finite = Field(description="The value of every bias element.", examples=[0.1])


# ---------------------------------------------------------------------------------------------
# Layers


def _activation_allowed() -> str:
    return ", ".join(activation_names())


def _checked_activation(value: str | None) -> str | None:
    if value is not None and value not in activation_names():
        raise field_error(
            "invalid_value",
            f"got {describe_input(value)}; allowed activations: {_activation_allowed()}"
            f"{did_you_mean(value, activation_names())}",
        )
    return value


# Sources a layer's `reads` may join: more than any concatenating skip in common use.
MAX_READS = 16

_NAME_TEXT = (
    "1 to 128 characters of letters, digits, '_', '.', '-', starting with a letter, digit or '_'"
)


def _checked_name(value: str, info: ValidationInfo) -> str:
    """Layer, branch and block names: the character rules and the length limit."""
    limits = _limits_from(info)
    if not value or len(value) > limits.max_name_length:
        raise field_error(
            "invalid_value",
            f"names have 1 to {limits.max_name_length} characters; got {len(value)}",
        )
    if not _NAME_PATTERN.fullmatch(value):
        raise field_error(
            "invalid_value",
            f"got {describe_input(value)}; allowed: letters, digits, '_', '.', '-', "
            "starting with a letter, digit or '_'",
        )
    return value


def _check_activation(activation: str | None, param: float | None, role: str) -> None:
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


def _fill_activation(data: dict[str, Any], default: str | None) -> dict[str, Any]:
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


class _LayerBase(_Strict):
    name: Annotated[str, Allowed(_NAME_TEXT)] = Field(
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
    branch: Annotated[str, Allowed(_NAME_TEXT)] | None = Field(
        default=None,
        description="Name of the residual branch this layer belongs to. Consecutive layers "
        "with the same branch form one branch; its input (the output of the layer before it, "
        "or the network input) is added to the output of its last layer. Must not equal a "
        "layer name; input and output widths must match.",
        examples=["encoder.3.mlp_branch"],
    )
    block: Annotated[str, Allowed(_NAME_TEXT)] | None = Field(
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
    class_prior: Annotated[
        float, Field(gt=0, lt=1), Allowed("a probability strictly between 0 and 1")
    ] | None = Field(
        default=None,
        description="For a dense or conv output layer with a bias: the prior probability of "
        "the positive class; the bias becomes log(pi/(1-pi)) (Lin et al. 2017, sec. 4.1).",
        examples=[0.01],
    )
    reads: Annotated[
        list[Annotated[str, Allowed(_NAME_TEXT)]],
        Field(max_length=MAX_READS),
        Allowed(f"a list of at most {MAX_READS} names of earlier layers"),
    ] | None = Field(
        default=None,
        description="What this layer reads when it is not the output of the layer before it: "
        "the names of earlier layers whose outputs are joined (concatenated along features) "
        "into its input, e.g. a second head on a trunk, or a skip that concatenates. Its input "
        "width is then checked against their sum. An empty list: the layer reads an input of "
        "the network, not checked. Omit it for the usual chain (see seedbed.core.width_chain).",
        examples=[["trunk.3"], ["encoder.1", "decoder.0"], []],
    )

    @field_validator("name", "branch", "block", mode="after")
    @classmethod
    def _check_name(cls, value: str | None, info: ValidationInfo) -> str | None:
        return None if value is None else _checked_name(value, info)

    @field_validator("activation", mode="after")
    @classmethod
    def _check_activation(cls, value: str | None) -> str | None:
        return _checked_activation(value)

    @model_validator(mode="before")
    @classmethod
    def _fill_layer_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        return _fill_activation(data, cls._default_activation(data))

    @classmethod
    def _default_activation(cls, data: dict[str, Any]) -> str | None:
        return "linear"

    @model_validator(mode="after")
    def _check_layer(self) -> _LayerBase:
        self._check_kind()
        self._check_activation_fields()
        self._check_bias_fields()
        return self

    def _check_kind(self) -> None:
        """Kind-specific checks; subclasses override."""

    def _has_bias(self) -> bool:
        return bool(getattr(self, "bias", False))

    def _check_activation_fields(self) -> None:
        _check_activation(self.activation, self.activation_param, self.role)

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


class DenseLayer(_LayerBase):
    """A fully connected layer y = W x + b."""

    model_config = ConfigDict(title="dense layer")

    kind: Literal["dense"] = Field(description="Layer kind.", examples=["dense"])
    n_in: Size = Field(description="Input features.", examples=[784])
    n_out: Size = Field(description="Output features (units).", examples=[256])
    bias: bool = Field(
        default=True, description="Whether the layer has a bias vector.", examples=[True]
    )


class ConvLayer(_LayerBase):
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
    stride: Annotated[
        list[Size],
        Field(min_length=1, max_length=3),
        Allowed(f"a list of positive integers, one per kernel entry (each 1 to {MAX_SIZE})"),
    ] | None = Field(
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


class EmbeddingLayer(_LayerBase):
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


class RecurrentLayer(_LayerBase):
    """A recurrent layer: simple (Elman), LSTM or GRU cell, gates stacked in `gate_order`."""

    model_config = ConfigDict(title="recurrent layer")

    kind: Literal["recurrent"] = Field(description="Layer kind.", examples=["recurrent"])
    cell: Cell = Field(description="simple, lstm or gru.", examples=["lstm"])
    n_in: Size = Field(description="Input features per step.", examples=[128])
    hidden: Size = Field(description="Hidden state size.", examples=[256])
    gate_order: Annotated[
        list[str],
        Allowed(
            "each gate of the cell exactly once: lstm input, forget, cell, output; gru reset, "
            "update, candidate"
        ),
    ] | None = Field(
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
            raise field_error(
                "not_allowed", "forget_bias is only for lstm cells", "forget_bias"
            )
        if self.forget_bias is not None and not self.bias:
            raise field_error(
                "not_allowed", "forget_bias needs the cell to have a bias (bias: true)",
                "forget_bias",
            )  # fmt: skip


class AttentionLayer(_LayerBase):
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


class NormLayer(_LayerBase):
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


LayerSpec = Annotated[
    Union[DenseLayer, ConvLayer, EmbeddingLayer, RecurrentLayer, AttentionLayer, NormLayer],  # noqa: UP007
    Field(discriminator="kind"),
    Allowed(
        "a layer object with name, kind (dense, conv, embedding, recurrent, attention, norm) "
        "and the kind's size fields"
    ),
]
LAYER_MODELS: dict[str, type[_LayerBase]] = {
    "dense": DenseLayer,
    "conv": ConvLayer,
    "embedding": EmbeddingLayer,
    "recurrent": RecurrentLayer,
    "attention": AttentionLayer,
    "norm": NormLayer,
}
AnyLayer = DenseLayer | ConvLayer | EmbeddingLayer | RecurrentLayer | AttentionLayer | NormLayer


# ---------------------------------------------------------------------------------------------
# Block shorthands: expanded into basic layers by `parse_request` (seedbed.core.structure)

BlockNorm = Literal["pre", "post"]
# Names of the layers and branches of one copy of a block: "<block>.<copy>.<part>".
TRANSFORMER_LAYER_PARTS: tuple[str, ...] = ("attn_norm", "attn", "mlp_norm", "mlp_in", "mlp_out")
TRANSFORMER_BRANCH_PARTS: tuple[str, ...] = ("attn_branch", "mlp_branch")
CONV_LAYER_PARTS: tuple[str, ...] = ("conv1", "conv2", "norm1", "norm2")
CONV_BRANCH_PART = "branch"


class _BlockBase(_Strict):
    name: Annotated[str, Allowed(_NAME_TEXT)] = Field(
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
        return _checked_name(value, info)

    @field_validator("activation", mode="after")
    @classmethod
    def _check_activation_name(cls, value: str | None) -> str | None:
        return _checked_activation(value)

    @model_validator(mode="before")
    @classmethod
    def _fill_block_defaults(cls, data: Any) -> Any:
        if not isinstance(data, dict):
            return data
        return _fill_activation(data, cls._default_activation)

    @model_validator(mode="after")
    def _check_block(self, info: ValidationInfo) -> _BlockBase:
        _check_activation(self.activation, self.activation_param, "hidden")
        self._check_kind()
        limit = _limits_from(info).max_name_length
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


class TransformerBlock(_BlockBase):
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
        description="Activation after the feed-forward part's first layer (mlp_in); default "
        "gelu.",
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


class ResidualConvBlock(_BlockBase):
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
        description="Activation inside the branch (after conv1, or after the norms); default "
        "relu.",
        examples=["relu"],
    )

    _default_activation: ClassVar[str] = "relu"
    _part_names: ClassVar[tuple[str, ...]] = (*CONV_LAYER_PARTS, CONV_BRANCH_PART)

    @property
    def layers_per_copy(self) -> int:
        return 2 if self.norm is None else 4


BLOCK_MODELS: dict[str, type[_BlockBase]] = {
    "transformer_block": TransformerBlock,
    "residual_conv_block": ResidualConvBlock,
}
AnyBlock = TransformerBlock | ResidualConvBlock

LayerOrBlockSpec = Annotated[
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
    if not any(isinstance(item, _BlockBase) for item in layers):
        return layers
    from seedbed.core.structure import expand_layers  # structure imports this module

    limits = _limits_from(info)
    total = sum(item.layer_count if isinstance(item, _BlockBase) else 1 for item in layers)
    if total > limits.max_layers:
        raise field_error(
            "too_large",
            f"the layers expand to {total} layers; the limit is {limits.max_layers} per "
            "request, counted after expanding block shorthands",
        )
    return expand_layers(layers, info.context)


if TYPE_CHECKING:
    # After validation the list holds basic layers only: blocks are expanded by the validator.
    LayerList = list[AnyLayer]
else:
    LayerList = Annotated[
        list[LayerOrBlockSpec], Field(min_length=1), AfterValidator(_expand_blocks)
    ]


# ---------------------------------------------------------------------------------------------
# Depth policies (applied by seedbed.core.policies)

Architecture = Literal["encoder", "decoder", "encoder_decoder"]
POLICY_NAMES: tuple[str, ...] = (
    "fixup", "skip_gate", "scaled_residual", "deepnorm", "t_fixup", "width_transfer"
)  # fmt: skip
# The base std of GPT-2-style initialisation: common practice, not a derived value.
SCALED_RESIDUAL_BASE_STD = 0.02


class FixupPolicy(_Strict):
    """Fixup (Zhang et al. 2019): branch layers scaled by L^(-1/(2m-2)), the last layer of
    every branch and the classifier zero, a scalar multiplier (1) per branch and scalar offsets
    (0) before every weight layer and activation of a branch. Branches of dense and conv layers
    only. Example: {"name": "fixup"}."""

    model_config = ConfigDict(title="fixup policy")

    name: Literal["fixup"] = Field(description="Policy name.", examples=["fixup"])


class SkipGatePolicy(_Strict):
    """A scalar gate per branch, initialised 0 (SkipInit, De & Smith 2020; ReZero, Bachlechner
    et al. 2020): every residual block starts as the identity. Example: {"name": "skip_gate"}."""

    model_config = ConfigDict(title="skip gate policy")

    name: Literal["skip_gate"] = Field(description="Policy name.", examples=["skip_gate"])


class ScaledResidualPolicy(_Strict):
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


class _TransformerDepth(_Strict):
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
    decoder_start: Annotated[str, Allowed(_NAME_TEXT)] | None = Field(
        default=None,
        description="encoder_decoder only (required there): the name of the decoder's first "
        "layer; the layers before it are the encoder.",
        examples=["dec.0.attn_norm"],
    )

    @field_validator("decoder_start", mode="after")
    @classmethod
    def _check_start(cls, value: str | None, info: ValidationInfo) -> str | None:
        return None if value is None else _checked_name(value, info)

    @model_validator(mode="after")
    def _check_architecture(self) -> _TransformerDepth:
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
                    f"{name} is only for other architectures; a single {arch} stack takes "
                    f"{own}",
                    name,
                )
        return self


class DeepNormPolicy(_TransformerDepth):
    """DeepNorm (Wang et al. 2022) for post-norm transformers: feed-forward, value and output
    projections Glorot normal with gain beta, query and key gain 1, and the residual multiplier
    alpha returned for the training script (x_next = norm(alpha*x + f(x))). encoder or
    decoder with N layers: alpha = (2N)^(1/4), beta = (8N)^(-1/4); encoder_decoder: encoder
    alpha = 0.81 (N^4 M)^(1/16), beta = 0.87 (N^4 M)^(-1/16), decoder alpha = (3M)^(1/4),
    beta = (12M)^(-1/4). Example: {"name": "deepnorm", "architecture": "encoder"}."""

    model_config = ConfigDict(title="deepnorm policy")

    name: Literal["deepnorm"] = Field(description="Policy name.", examples=["deepnorm"])


class TFixupPolicy(_TransformerDepth):
    """T-Fixup (Huang et al. 2020) for transformers trained without normalisation or warmup:
    Glorot uniform projections, value and output projections and feed-forward weights scaled by
    0.67 N^(-1/4) in the encoder and (9M)^(-1/4) in the decoder, embeddings normal with std
    dim^(-1/2) scaled by (9M)^(-1/4) [from memory; see docs/depth.md]. Example:
    {"name": "t_fixup", "architecture": "encoder_decoder", "decoder_start": "dec.0.attn"}."""

    model_config = ConfigDict(title="t_fixup policy")

    name: Literal["t_fixup"] = Field(description="Policy name.", examples=["t_fixup"])


class WidthTransferPolicy(_Strict):
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


POLICY_MODELS: dict[str, type[_Strict]] = {
    "fixup": FixupPolicy,
    "skip_gate": SkipGatePolicy,
    "scaled_residual": ScaledResidualPolicy,
    "deepnorm": DeepNormPolicy,
    "t_fixup": TFixupPolicy,
    "width_transfer": WidthTransferPolicy,
}
AnyPolicy = (
    FixupPolicy | SkipGatePolicy | ScaledResidualPolicy | DeepNormPolicy | TFixupPolicy
    | WidthTransferPolicy
)  # fmt: skip
DepthPolicy = Annotated[
    Union[  # noqa: UP007
        FixupPolicy, SkipGatePolicy, ScaledResidualPolicy, DeepNormPolicy, TFixupPolicy,
        WidthTransferPolicy,
    ],
    Field(discriminator="name"),
]  # fmt: skip
_POLICY_TEXT = f"an object with name (one of {', '.join(POLICY_NAMES)}) and its parameters"


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


class NetworkRequest(_Strict):
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
    widths: Annotated[
        Literal["unchecked"], Allowed("unchecked, or omit the field (widths chain)")
    ] | None = Field(
        default=None,
        description="Omit it: each layer's input width must equal what it reads (the layer "
        "before it, or the layers named in its `reads`). \"unchecked\": the layers are a "
        "collection of separate layers rather than one network, and no width between them is "
        "checked (diagnose refuses such a request: it needs a chain).",
        examples=["unchecked"],
    )
    depth_policy: Annotated[DepthPolicy, Allowed(_POLICY_TEXT)] | None = Field(
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
            if value is None or isinstance(value, _Strict):
                return handler(value)
            raise field_error("invalid_type", f"got {describe_input(value)}; allowed: "
                              f"{_POLICY_TEXT}")  # fmt: skip
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
        allowed = f"an integer 0 to {SEED_INT_MAX} or a string of 1 to {SEED_STR_MAX} characters"
        if isinstance(value, bool) or not isinstance(value, int | str):
            raise field_error("invalid_type", f"got {describe_input(value)}; allowed: {allowed}")
        if isinstance(value, int) and not 0 <= value <= SEED_INT_MAX:
            raise field_error("invalid_value", f"got {describe_input(value)}; allowed: {allowed}")
        if isinstance(value, str):
            if not 1 <= len(value) <= SEED_STR_MAX:
                raise field_error(
                    "invalid_value", f"got a string of {len(value)} characters; allowed: {allowed}"
                )
            try:  # the seed is hashed as UTF-8; JSON can smuggle in lone surrogates (\ud800)
                value.encode("utf-8")
            except UnicodeEncodeError:
                raise field_error(
                    "invalid_value",
                    f"the string contains a lone surrogate; allowed: {allowed} of valid Unicode",
                ) from None
        return value


# ---------------------------------------------------------------------------------------------
# Entry points


def _limits_from(info: ValidationInfo) -> Limits:
    context = info.context
    if isinstance(context, dict):
        limits = context.get("limits")
        if isinstance(limits, Limits):
            return limits
    return Limits()


def parse_request(data: object, limits: Limits | None = None) -> NetworkRequest:
    """Validate a parsed JSON body into a `NetworkRequest`, or raise `RequestRejected`.

    Order: the raw layer count and the count after expanding block shorthands (both before
    any layer is looked at), the models (types, ranges, per-layer combinations; blocks are
    expanded here), then what spans layers: unique layer names, unique tensor names, residual
    branches, explicit values that must fit the dtype, the size limits and the depth policy's
    fit to the network. All problems of the last stage are reported together, at the fields of
    the request as written (a problem of an expanded layer points at its block).
    """
    # These modules import this one.
    from seedbed.core.policies import policy_problems
    from seedbed.core.structure import (
        branch_problems,
        check_expanded_count,
        relocate_problems,
    )
    from seedbed.core.tensors import slots_by_layer, tensor_name_problems
    from seedbed.core.width_chain import chain_problems

    limits = limits if limits is not None else Limits()
    if not isinstance(data, dict):
        raise RequestRejected(
            [
                Problem(
                    BODY,
                    "invalid_type",
                    f"got {describe_input(data)}; allowed: a JSON object with fields seed, "
                    "dtype, layout, layers",
                )
            ]
        )
    check_layer_count(data, limits)
    check_expanded_count(data, limits)
    try:
        request = NetworkRequest.model_validate(data, context={"limits": limits})
    except ValidationError as err:
        raise RequestRejected(problems_from_validation_error(NetworkRequest, err)) from None

    slots = slots_by_layer(request)
    problems = layer_name_problems(request)
    problems += tensor_name_problems(request, slots)
    structure = branch_problems(request)
    problems += structure
    # A branch whose width changes inside it is already told at the same field.
    told = {p.field for p in structure}
    problems += [p for p in chain_problems(request) if p.field not in told]
    problems += _dtype_range_problems(request)
    problems += size_problems(request, slots, limits)
    if not structure:
        problems += policy_problems(request)
    if problems:
        raise RequestRejected(relocate_problems(problems, data["layers"], request))
    return request


def layer_name_problems(request: NetworkRequest) -> list[Problem]:
    """Layer names used more than once; each repeat names the first use."""
    first: dict[str, int] = {}
    problems: list[Problem] = []
    for i, layer in enumerate(request.layers):
        if layer.name in first:
            problems.append(
                Problem(
                    f"layers[{i}].name",
                    "duplicate_name",
                    f"layer name {layer.name!r} is already used by layers[{first[layer.name]}]"
                    ".name; layer names must be unique",
                )
            )
        else:
            first[layer.name] = i
    return problems


def _dtype_range_problems(request: NetworkRequest) -> list[Problem]:
    """Explicit numbers that would overflow the request's dtype, or scales that underflow it."""
    top = DTYPE_MAX[request.dtype]
    tiny = DTYPE_TINY[request.dtype]
    problems: list[Problem] = []

    def check_tiny(path: str, scale: float, what: str) -> None:
        if scale < tiny:
            problems.append(
                Problem(
                    path,
                    "invalid_value",
                    f"{what} {scale!r} is below {request.dtype}'s smallest normal number "
                    f"{tiny:g}: the values would lose their precision or round to zero; "
                    f"allowed: at least {tiny:g}",
                )
            )

    def check(path: str, magnitude: float, what: str, limit: float) -> None:
        if magnitude > limit:
            problems.append(
                Problem(
                    path,
                    "invalid_value",
                    f"{what} does not fit {request.dtype}, whose largest finite value is "
                    f"{top:g}; allowed: at most {limit:g} in magnitude",
                )
            )

    for i, layer in enumerate(request.layers):
        init = layer.init
        if init is not None:
            if init.value is not None:
                check(f"layers[{i}].init.value", abs(init.value), f"{init.value!r}", top)
            if init.bound is not None:
                check(f"layers[{i}].init.bound", init.bound, f"bound {init.bound!r}", top)
                check_tiny(f"layers[{i}].init.bound", init.bound, "bound")
            if init.std is not None:
                check(
                    f"layers[{i}].init.std",
                    init.std,
                    f"std {init.std!r} (normal draws reach {NORMAL_EXTREME} std)",
                    top / NORMAL_EXTREME,
                )
                check_tiny(f"layers[{i}].init.std", init.std, "std")
        if layer.bias_init is not None:
            v = layer.bias_init.value
            check(f"layers[{i}].bias_init.value", abs(v), f"{v!r}", top)
        if isinstance(layer, RecurrentLayer) and layer.forget_bias is not None:
            v = layer.forget_bias
            check(f"layers[{i}].forget_bias", abs(v), f"{v!r}", top)
    policy = request.depth_policy
    if isinstance(policy, ScaledResidualPolicy):
        path = "depth_policy.base_std"
        check(path, policy.base_std, f"base_std {policy.base_std!r} (normal draws reach "
              f"{NORMAL_EXTREME} std)", top / NORMAL_EXTREME)  # fmt: skip
        check_tiny(path, policy.base_std, "base_std")
    return problems


def canonical_request(request: NetworkRequest) -> dict[str, Any]:
    """The request as JSON-ready data: defaults filled, absent options dropped, keys sorted.

    Same meaning, same dict: defaults are filled by the models (activation, activation_param,
    stride, gate_order, forget_bias, override distribution and fan), integers given for float
    fields become floats, and unset optional fields are omitted rather than written as null.
    `parse_request(canonical_request(r))` gives back an equal request.
    """
    return _sorted(request.model_dump(mode="json", exclude_none=True))


def _sorted(value: Any) -> Any:
    if isinstance(value, dict):
        return {k: _sorted(value[k]) for k in sorted(value)}
    if isinstance(value, list):
        return [_sorted(v) for v in value]
    return value

