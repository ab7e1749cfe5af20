"""Describe a network in Python instead of writing request dicts by hand.

    net = NetworkSpec(seed="kiln-controller/v3", dtype="float32")
    net.add(
        DenseSpec("probe.0", 48, 128, activation="relu"),
        RecurrentSpec("history", "gru", n_in=128, hidden=64),
        DenseSpec("damper", 64, 4, role="output"),
    )
    request = net.to_request()          # a dict in the service's request format, checked

Only options you set are written; everything else takes the service's default. The checks here
are the structural rules and the size limits the service applies (field names in the errors are
the request's: `layers[2].heads`). Which activation names exist is the service's business: an
unknown one passes here and is refused by the service with the list of allowed names.
"""

from __future__ import annotations

import re
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import KW_ONLY, dataclass, field
from math import isfinite
from typing import Any, ClassVar

from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.limits import MAX_SIZE, RequestLimits, limit_problems

__all__ = [
    "AttentionSpec",
    "ConvSpec",
    "DenseSpec",
    "DepthPolicy",
    "EmbeddingSpec",
    "InitOverride",
    "LayerSpec",
    "NetworkSpec",
    "NormSpec",
    "RecurrentSpec",
    "ResidualConvBlockSpec",
    "TransformerBlockSpec",
    "request_problems",
]

SEED_INT_MAX = 2**63 - 1
SEED_STR_MAX = 128
DTYPES = ("float32", "float64", "float16", "bfloat16")
LAYOUTS = ("out_in", "in_out")
ROLES = ("hidden", "output", "residual_out")
BLOCK_NORMS = ("pre", "post")
CELL_GATES: dict[str, tuple[str, ...]] = {
    "simple": (),
    "lstm": ("input", "forget", "cell", "output"),
    "gru": ("reset", "update", "candidate"),
}
INIT_METHODS = (
    "symmetric_uniform",
    "glorot",
    "he",
    "lecun",
    "orthogonal",
    "identity",
    "constant",
)
DISTRIBUTIONS = ("uniform", "normal", "truncated_normal")
FANS = ("in", "out", "mean")
_NAME = re.compile(r"[A-Za-z0-9_][A-Za-z0-9_.\-]*")


def _is_int(value: object) -> bool:
    return isinstance(value, int) and not isinstance(value, bool)


def _is_number(value: object) -> bool:
    return isinstance(value, int | float) and not isinstance(value, bool) and isfinite(value)


@dataclass(frozen=True)
class InitOverride:
    """An explicit initialisation of a layer's weights, replacing the service's recommendation.

    method: symmetric_uniform, glorot, he, lecun, orthogonal, identity or constant; which other
    fields each takes is in the service's request documentation (e.g. he with fan="out", or
    glorot with an explicit std).
    """

    method: str
    _: KW_ONLY
    distribution: str | None = None
    fan: str | None = None
    gain: float | None = None
    std: float | None = None
    bound: float | None = None
    value: float | None = None

    def to_dict(self) -> dict[str, Any]:
        return {k: v for k, v in self.__dict__.items() if v is not None}

    def problems(self, where: str) -> Iterator[Problem]:
        if self.method not in INIT_METHODS:
            yield Problem(
                f"{where}.method",
                "invalid_value",
                f"got {self.method!r}; allowed: {', '.join(INIT_METHODS)}",
            )
        for name, allowed in (("distribution", DISTRIBUTIONS), ("fan", FANS)):
            value = getattr(self, name)
            if value is not None and value not in allowed:
                yield Problem(
                    f"{where}.{name}",
                    "invalid_value",
                    f"got {value!r}; allowed: {', '.join(allowed)}",
                )
        for name in ("gain", "std", "bound"):
            value = getattr(self, name)
            if value is not None and not (_is_number(value) and value > 0):
                yield Problem(
                    f"{where}.{name}",
                    "invalid_value",
                    f"got {value!r}; allowed: a positive finite number",
                )
        if self.value is not None and not _is_number(self.value):
            yield Problem(
                f"{where}.value", "invalid_value", f"got {self.value!r}; allowed: a finite number"
            )


@dataclass(frozen=True)
class LayerSpec:
    """Fields every layer kind has. Use one of the kind classes below, not this one."""

    kind: ClassVar[str] = ""
    name: str
    _: KW_ONLY
    activation: str | None = None
    activation_param: float | None = None
    role: str | None = None
    init: InitOverride | None = None
    bias_value: float | None = None  # every bias element set to this constant
    class_prior: float | None = None  # output layers: bias = log(pi / (1 - pi))
    branch: str | None = None  # residual branch (consecutive layers with one name; docs/depth.md)
    block: str | None = None  # a label grouping layers in the plan's layer list
    # What the layer reads when it is not the layer listed before it (a second head on a trunk,
    # a projection skip, a concatenation); () reads the network input (docs/service.md).
    reads: tuple[str, ...] | None = None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {"name": self.name, "kind": self.kind}
        for key, value in self.__dict__.items():
            if key in ("name", "init", "bias_value") or value is None:
                continue
            out[key] = list(value) if isinstance(value, tuple) else value
        if self.init is not None:
            out["init"] = self.init.to_dict()
        if self.bias_value is not None:
            out["bias_init"] = {"method": "constant", "value": self.bias_value}
        return out

    # Kind-specific checks; `where` is the request path of this layer, e.g. "layers[3]".
    def _kind_problems(self, where: str) -> Iterator[Problem]:
        return iter(())

    def _sizes(self) -> Sequence[str]:
        return ()

    def problems(self, where: str, limits: RequestLimits) -> list[Problem]:
        out: list[Problem] = []
        if (
            not isinstance(self.name, str)
            or not 1 <= len(self.name) <= limits.max_name_length
            or not _NAME.fullmatch(self.name)
        ):
            out.append(
                Problem(
                    f"{where}.name",
                    "invalid_value",
                    f"got {self.name!r}; allowed: 1 to {limits.max_name_length} "
                    "letters, digits, '_', '.', '-', starting with a letter, digit "
                    "or '_'",
                )
            )
        for size in self._sizes():
            value = getattr(self, size)
            if not (_is_int(value) and 1 <= value <= MAX_SIZE):
                out.append(
                    Problem(
                        f"{where}.{size}",
                        "invalid_value",
                        f"got {value!r}; allowed: a positive integer (1 to {MAX_SIZE})",
                    )
                )
        if self.activation is not None and (
            not isinstance(self.activation, str) or not self.activation
        ):
            out.append(
                Problem(
                    f"{where}.activation",
                    "invalid_type",
                    f"got {self.activation!r}; allowed: an activation name",
                )
            )
        if self.activation_param is not None and not _is_number(self.activation_param):
            out.append(
                Problem(
                    f"{where}.activation_param",
                    "invalid_value",
                    f"got {self.activation_param!r}; allowed: a finite number",
                )
            )
        if self.role is not None and self.role not in ROLES:
            out.append(
                Problem(
                    f"{where}.role",
                    "invalid_value",
                    f"got {self.role!r}; allowed: {', '.join(ROLES)}",
                )
            )
        if self.reads is not None and not (
            isinstance(self.reads, tuple | list)
            and all(isinstance(r, str) and _NAME.fullmatch(r) for r in self.reads)
        ):
            out.append(
                Problem(
                    f"{where}.reads",
                    "invalid_value",
                    f"got {self.reads!r}; allowed: a list of layer names",
                )
            )
        for label in ("branch", "block"):
            value = getattr(self, label)
            if value is not None and not (
                isinstance(value, str)
                and 1 <= len(value) <= limits.max_name_length
                and _NAME.fullmatch(value)
            ):
                out.append(
                    Problem(
                        f"{where}.{label}",
                        "invalid_value",
                        f"got {value!r}; allowed: a name like a layer name (1 to "
                        f"{limits.max_name_length} letters, digits, '_', '.', '-')",
                    )
                )
        if self.init is not None:
            out.extend(self.init.problems(f"{where}.init"))
        if self.bias_value is not None and not _is_number(self.bias_value):
            out.append(
                Problem(
                    f"{where}.bias_init.value",
                    "invalid_value",
                    f"got {self.bias_value!r}; allowed: a finite number",
                )
            )
        if self.class_prior is not None:
            if not (_is_number(self.class_prior) and 0 < self.class_prior < 1):
                out.append(
                    Problem(
                        f"{where}.class_prior",
                        "invalid_value",
                        f"got {self.class_prior!r}; allowed: a probability strictly "
                        "between 0 and 1",
                    )
                )
            elif self.kind not in ("dense", "conv") or self.role != "output":
                out.append(
                    Problem(
                        f"{where}.class_prior",
                        "not_allowed",
                        "class_prior is only for dense and conv layers with role output",
                    )
                )
        if not out:  # kind rules assume well-typed sizes
            out.extend(self._kind_problems(where))
        return out


@dataclass(frozen=True)
class DenseSpec(LayerSpec):
    """A fully connected layer: weight (n_out, n_in) and bias (n_out)."""

    kind: ClassVar[str] = "dense"
    n_in: int
    n_out: int
    _: KW_ONLY
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("n_in", "n_out")


@dataclass(frozen=True)
class ConvSpec(LayerSpec):
    """A convolution over 1-3 spatial dims; `kernel` an int (1-D) or a tuple of sizes."""

    kind: ClassVar[str] = "conv"
    channels_in: int
    channels_out: int
    kernel: int | tuple[int, ...]
    _: KW_ONLY
    groups: int | None = None
    transposed: bool | None = None
    stride: int | tuple[int, ...] | None = None
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("channels_in", "channels_out")

    def _kernel(self) -> tuple[Any, ...]:
        return (self.kernel,) if not isinstance(self.kernel, tuple | list) else tuple(self.kernel)

    def to_dict(self) -> dict[str, Any]:
        out = super().to_dict()
        out["kernel"] = list(self._kernel())
        if self.stride is not None:
            stride = self.stride if isinstance(self.stride, tuple | list) else (self.stride,)
            out["stride"] = list(stride) * (len(self._kernel()) if len(stride) == 1 else 1)
        return out

    def _kind_problems(self, where: str) -> Iterator[Problem]:
        kernel = self._kernel()
        if not 1 <= len(kernel) <= 3 or not all(_is_int(k) and 1 <= k <= MAX_SIZE for k in kernel):
            yield Problem(
                f"{where}.kernel",
                "invalid_value",
                f"got {self.kernel!r}; allowed: 1 to 3 positive integers",
            )
        groups = 1 if self.groups is None else self.groups
        if not (_is_int(groups) and groups >= 1):
            yield Problem(
                f"{where}.groups", "invalid_value", f"got {groups!r}; allowed: a positive integer"
            )
        elif self.channels_in % groups or self.channels_out % groups:
            yield Problem(
                f"{where}.groups",
                "invalid_value",
                f"groups must divide channels_in ({self.channels_in}) and "
                f"channels_out ({self.channels_out}); got {groups}",
            )
        if self.stride is not None:
            stride = self.stride if isinstance(self.stride, tuple | list) else (self.stride,)
            if not all(_is_int(s) and s >= 1 for s in stride) or len(stride) not in (
                1,
                len(kernel),
            ):
                yield Problem(
                    f"{where}.stride",
                    "invalid_value",
                    f"got {self.stride!r}; allowed: one positive integer per kernel "
                    f"entry ({len(kernel)})",
                )


@dataclass(frozen=True)
class EmbeddingSpec(LayerSpec):
    """A lookup table (vocab, dim); no bias."""

    kind: ClassVar[str] = "embedding"
    vocab: int
    dim: int

    def _sizes(self) -> Sequence[str]:
        return ("vocab", "dim")


@dataclass(frozen=True)
class RecurrentSpec(LayerSpec):
    """A recurrent layer: cell simple, lstm or gru; gates stacked in `gate_order`."""

    kind: ClassVar[str] = "recurrent"
    cell: str
    _: KW_ONLY
    n_in: int
    hidden: int
    gate_order: tuple[str, ...] | None = None
    forget_bias: float | None = None
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("n_in", "hidden")

    def _kind_problems(self, where: str) -> Iterator[Problem]:
        if self.cell not in CELL_GATES:
            yield Problem(
                f"{where}.cell", "invalid_value", f"got {self.cell!r}; allowed: simple, lstm, gru"
            )
            return
        gates = CELL_GATES[self.cell]
        if self.gate_order is not None:
            if not gates:
                yield Problem(
                    f"{where}.gate_order",
                    "not_allowed",
                    "a simple cell has no gates; omit gate_order",
                )
            elif sorted(self.gate_order) != sorted(gates):
                yield Problem(
                    f"{where}.gate_order",
                    "invalid_value",
                    f"gate_order must name each {self.cell} gate exactly once: "
                    f"{', '.join(gates)}; got {list(self.gate_order)}",
                )
        if gates and self.activation is not None:
            yield Problem(
                f"{where}.activation",
                "not_allowed",
                f"{self.cell} cells have built-in gate nonlinearities; activation is "
                "only for simple cells",
            )
        if self.forget_bias is not None and self.cell != "lstm":
            yield Problem(
                f"{where}.forget_bias", "not_allowed", "forget_bias is only for lstm cells"
            )


@dataclass(frozen=True)
class AttentionSpec(LayerSpec):
    """Multi-head attention: query, key, value and output projections, each dim x dim."""

    kind: ClassVar[str] = "attention"
    dim: int
    heads: int
    _: KW_ONLY
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("dim", "heads")

    def _kind_problems(self, where: str) -> Iterator[Problem]:
        if self.dim % self.heads:
            yield Problem(
                f"{where}.heads",
                "invalid_value",
                f"heads must divide dim ({self.dim}); got {self.heads}",
            )


@dataclass(frozen=True)
class NormSpec(LayerSpec):
    """A normalisation layer's affine part: scale and (with bias) shift, each of size dim."""

    kind: ClassVar[str] = "norm"
    dim: int
    _: KW_ONLY
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("dim",)


@dataclass(frozen=True)
class TransformerBlockSpec(LayerSpec):
    """`repeat` transformer blocks, expanded by the service into attention, dense and norm layers
    in two residual branches per copy (docs/depth.md, "transformer_block")."""

    kind: ClassVar[str] = "transformer_block"
    dim: int
    heads: int
    mlp_dim: int
    _: KW_ONLY
    norm: str | None = None  # pre (default) or post
    repeat: int | None = None
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("dim", "heads", "mlp_dim") + (("repeat",) if self.repeat is not None else ())

    def _kind_problems(self, where: str) -> Iterator[Problem]:
        if self.dim % self.heads:
            yield Problem(
                f"{where}.heads",
                "invalid_value",
                f"heads must divide dim ({self.dim}); got {self.heads}",
            )
        if self.norm is not None and self.norm not in BLOCK_NORMS:
            yield Problem(
                f"{where}.norm", "invalid_value", f"got {self.norm!r}; allowed: pre, post"
            )
        yield from _block_field_problems(self, where)


@dataclass(frozen=True)
class ResidualConvBlockSpec(LayerSpec):
    """`repeat` residual blocks of two same-width convolutions (docs/depth.md,
    "residual_conv_block"); `norm` omitted, pre or post."""

    kind: ClassVar[str] = "residual_conv_block"
    channels: int
    kernel: int | tuple[int, ...]
    _: KW_ONLY
    norm: str | None = None
    repeat: int | None = None
    bias: bool | None = None

    def _sizes(self) -> Sequence[str]:
        return ("channels",) + (("repeat",) if self.repeat is not None else ())

    def to_dict(self) -> dict[str, Any]:
        out = super().to_dict()
        out["kernel"] = [self.kernel] if isinstance(self.kernel, int) else list(self.kernel)
        return out

    def _kind_problems(self, where: str) -> Iterator[Problem]:
        kernel = (self.kernel,) if isinstance(self.kernel, int) else tuple(self.kernel)
        if not 1 <= len(kernel) <= 3 or not all(_is_int(k) and 1 <= k <= MAX_SIZE for k in kernel):
            yield Problem(
                f"{where}.kernel",
                "invalid_value",
                f"got {self.kernel!r}; allowed: 1 to 3 positive integers",
            )
        if self.norm is not None and self.norm not in BLOCK_NORMS:
            yield Problem(
                f"{where}.norm",
                "invalid_value",
                f"got {self.norm!r}; allowed: pre, post (or omit it)",
            )
        yield from _block_field_problems(self, where)


def _block_field_problems(block: LayerSpec, where: str) -> Iterator[Problem]:
    # Shorthands expand into layers that carry their own roles and branches.
    for label in ("role", "branch", "block", "init", "bias_value", "class_prior"):
        if getattr(block, label) is not None:
            yield Problem(
                f"{where}.{label}",
                "not_allowed",
                f"{block.kind} sets {label} on the layers it expands into; write the layers out "
                "to set it yourself",
            )


# Which parameters each depth/width policy takes (docs/depth.md).
POLICY_FIELDS: dict[str, tuple[str, ...]] = {
    "fixup": (),
    "skip_gate": (),
    "scaled_residual": ("base_std", "residual_layers"),
    "deepnorm": ("architecture", "encoder_layers", "decoder_layers", "decoder_start"),
    "t_fixup": ("architecture", "encoder_layers", "decoder_layers", "decoder_start"),
    "width_transfer": ("base_width", "width"),
}
ARCHITECTURES = ("encoder", "decoder", "encoder_decoder")


@dataclass(frozen=True)
class DepthPolicy:
    """The request's `depth_policy`: a depth- or width-aware rule on top of the
    recommendations. `name` one of fixup, skip_gate, scaled_residual, deepnorm, t_fixup,
    width_transfer; the other fields belong to some policies only (POLICY_FIELDS).

        DepthPolicy("scaled_residual", base_std=0.02)
        DepthPolicy("deepnorm", architecture="encoder", encoder_layers=6)
    """

    name: str
    _: KW_ONLY
    base_std: float | None = None
    residual_layers: int | None = None
    architecture: str | None = None
    encoder_layers: int | None = None
    decoder_layers: int | None = None
    decoder_start: str | None = None
    base_width: int | None = None
    width: int | None = None

    @classmethod
    def from_dict(cls, data: Mapping[str, Any]) -> DepthPolicy:
        """The policy of a request dict; unknown keys are kept so `problems` reports them."""
        known = {k: v for k, v in data.items() if k in cls.__dataclass_fields__ and k != "_"}
        policy = cls(**known)
        extra = sorted(set(data) - set(known))
        object.__setattr__(policy, "_extra", tuple(extra))
        return policy

    def to_dict(self) -> dict[str, Any]:
        return {k: v for k, v in self.__dict__.items() if v is not None and not k.startswith("_")}

    def problems(self, where: str = "depth_policy") -> list[Problem]:
        if self.name not in POLICY_FIELDS:
            return [
                Problem(
                    f"{where}.name",
                    "invalid_value",
                    f"got {self.name!r}; allowed: {', '.join(POLICY_FIELDS)}",
                )
            ]
        out: list[Problem] = []
        allowed = POLICY_FIELDS[self.name]
        for key in getattr(self, "_extra", ()):
            out.append(
                Problem(
                    f"{where}.{key}",
                    "unknown_field",
                    f"{self.name} takes no field {key!r}; allowed: {', '.join(('name', *allowed))}",
                )
            )
        for key, value in self.to_dict().items():
            if key == "name":
                continue
            if key not in allowed:
                out.append(
                    Problem(
                        f"{where}.{key}",
                        "not_allowed",
                        f"{key} is not a parameter of {self.name}; allowed: "
                        f"{', '.join(allowed) or 'none'}",
                    )
                )
            elif key == "base_std" and not (_is_number(value) and value > 0):
                out.append(
                    Problem(
                        f"{where}.{key}",
                        "invalid_value",
                        f"got {value!r}; allowed: a positive finite number",
                    )
                )
            elif key in (
                "residual_layers",
                "encoder_layers",
                "decoder_layers",
                "base_width",
                "width",
            ) and not (_is_int(value) and 1 <= value <= MAX_SIZE):
                out.append(
                    Problem(
                        f"{where}.{key}",
                        "invalid_value",
                        f"got {value!r}; allowed: a positive integer (1 to {MAX_SIZE})",
                    )
                )
            elif key == "architecture" and value not in ARCHITECTURES:
                out.append(
                    Problem(
                        f"{where}.{key}",
                        "invalid_value",
                        f"got {value!r}; allowed: {', '.join(ARCHITECTURES)}",
                    )
                )
        if self.name in ("deepnorm", "t_fixup") and not out:
            if self.architecture is None:
                out.append(
                    Problem(
                        f"{where}.architecture",
                        "missing_field",
                        "allowed: encoder, decoder or encoder_decoder",
                    )
                )
            elif self.architecture == "encoder_decoder" and self.decoder_start is None:
                out.append(
                    Problem(
                        f"{where}.decoder_start",
                        "missing_field",
                        "encoder_decoder needs decoder_start: the name of the decoder's "
                        "first layer",
                    )
                )
            elif self.architecture != "encoder_decoder":
                other = "decoder_layers" if self.architecture == "encoder" else "encoder_layers"
                own = "encoder_layers" if self.architecture == "encoder" else "decoder_layers"
                for key in (other, "decoder_start"):
                    if getattr(self, key) is not None:
                        out.append(
                            Problem(
                                f"{where}.{key}",
                                "not_allowed",
                                f"{key} is only for other architectures; a single "
                                f"{self.architecture} stack takes {own}",
                            )
                        )
        if self.name == "width_transfer" and self.base_width is None and not out:
            out.append(
                Problem(
                    f"{where}.base_width",
                    "missing_field",
                    "width_transfer needs base_width: the width the hyperparameters were tuned at",
                )
            )
        return out


LAYER_CLASSES: dict[str, type[LayerSpec]] = {}


@dataclass
class NetworkSpec:
    """A whole request: seed, dtype, layout and the layers in the order the signal meets them."""

    seed: int | str
    layers: list[LayerSpec] = field(default_factory=list)
    dtype: str = "float32"
    layout: str = "out_in"
    depth_policy: DepthPolicy | None = None
    # "unchecked": a collection of layers whose widths need not chain (docs/service.md)
    widths: str | None = None

    @classmethod
    def from_request(cls, request: Mapping[str, Any]) -> NetworkSpec:
        """The spec of a request dict (layers rebuilt from their fields; a field a kind does
        not have raises TypeError naming it)."""
        layers = []
        for item in request.get("layers", []):
            data = dict(item)
            kind = data.pop("kind", None)
            if kind not in LAYER_CLASSES:
                raise TypeError(f"layer kind {kind!r}; allowed: {', '.join(LAYER_CLASSES)}")
            bias_init = data.pop("bias_init", None)
            if bias_init is not None:
                data["bias_value"] = bias_init.get("value")
            if "init" in data:
                data["init"] = InitOverride(**data["init"])
            for key in ("kernel", "stride", "gate_order", "reads"):
                if isinstance(data.get(key), list):
                    data[key] = tuple(data[key])
            layers.append(LAYER_CLASSES[kind](**data))
        policy = request.get("depth_policy")
        return cls(
            seed=request.get("seed"),  # type: ignore[arg-type]
            layers=layers,
            dtype=request.get("dtype", "float32"),
            layout=request.get("layout", "out_in"),
            depth_policy=None if policy is None else DepthPolicy.from_dict(policy),
            widths=request.get("widths"),
        )

    def add(self, *layers: LayerSpec) -> NetworkSpec:
        """Append layers; returns the spec so calls can be chained."""
        self.layers.extend(layers)
        return self

    def problems(self, limits: RequestLimits | None = None) -> list[Problem]:
        """Everything the client can tell is wrong with this request (empty when none)."""
        limits = limits or RequestLimits()
        out: list[Problem] = []
        seed = self.seed
        if _is_int(seed):
            assert isinstance(seed, int)
            if not 0 <= seed <= SEED_INT_MAX:
                out.append(
                    Problem(
                        "seed",
                        "invalid_value",
                        f"got {seed}; allowed: an integer 0 to {SEED_INT_MAX} or a "
                        f"string of 1 to {SEED_STR_MAX} characters",
                    )
                )
        elif not (isinstance(seed, str) and 1 <= len(seed) <= SEED_STR_MAX):
            out.append(
                Problem(
                    "seed",
                    "invalid_type",
                    f"got {seed!r}; allowed: an integer 0 to {SEED_INT_MAX} or a "
                    f"string of 1 to {SEED_STR_MAX} characters",
                )
            )
        if self.dtype not in DTYPES:
            out.append(
                Problem(
                    "dtype", "invalid_value", f"got {self.dtype!r}; allowed: {', '.join(DTYPES)}"
                )
            )
        if self.layout not in LAYOUTS:
            out.append(
                Problem("layout", "invalid_value", f"got {self.layout!r}; allowed: out_in, in_out")
            )
        if not self.layers:
            out.append(Problem("layers", "invalid_value", "a request needs at least one layer"))
        first: dict[str, int] = {}
        for i, layer in enumerate(self.layers):
            if not isinstance(layer, LayerSpec) or type(layer) is LayerSpec:
                out.append(
                    Problem(
                        f"layers[{i}]",
                        "invalid_type",
                        f"got {type(layer).__name__}; allowed: DenseSpec, ConvSpec, "
                        "EmbeddingSpec, RecurrentSpec, AttentionSpec, NormSpec, "
                        "TransformerBlockSpec, ResidualConvBlockSpec",
                    )
                )
                continue
            out.extend(layer.problems(f"layers[{i}]", limits))
            if layer.name in first:
                out.append(
                    Problem(
                        f"layers[{i}].name",
                        "duplicate_name",
                        f"layer name {layer.name!r} is already used by layers[{first[layer.name]}]",
                    )
                )
            else:
                first[layer.name] = i
        out.extend(self._branch_problems(first))
        if self.depth_policy is not None:
            policy_problems = self.depth_policy.problems()
            out.extend(policy_problems)
            if not policy_problems:
                out.extend(self._decoder_start_problems(first))
        if not out:
            out.extend(limit_problems(self._dict(), limits))
        return out

    def _decoder_start_problems(self, names: Mapping[str, int]) -> Iterator[Problem]:
        start = self.depth_policy.decoder_start if self.depth_policy is not None else None
        if start is None:
            return
        where = "depth_policy.decoder_start"
        if start not in names:
            yield Problem(where, "invalid_value", f"{start!r} names no layer of the request")
            return
        i = names[start]
        branch = getattr(self.layers[i], "branch", None)
        if branch is not None and i > 0 and getattr(self.layers[i - 1], "branch", None) == branch:
            yield Problem(
                where,
                "invalid_value",
                f"decoder_start {start!r} falls inside branch {branch!r}; allowed: a layer "
                "outside any branch or the first layer of one",
            )

    def _branch_problems(self, names: Mapping[str, int]) -> Iterator[Problem]:
        # The structural rules of docs/depth.md the client can check without widths.
        ended: dict[str, int] = {}
        previous: str | None = None
        for i, layer in enumerate(self.layers):
            branch = getattr(layer, "branch", None)
            if branch is not None:
                if branch in names:
                    yield Problem(
                        f"layers[{i}].branch",
                        "invalid_value",
                        f"branch name {branch!r} is also the name of layers[{names[branch]}]; "
                        "branch names must differ from layer names",
                    )
                if branch != previous and branch in ended:
                    yield Problem(
                        f"layers[{i}].branch",
                        "invalid_value",
                        f"branch {branch!r} already ended at layers[{ended[branch]}]; the "
                        "layers of a branch must be consecutive",
                    )
                if layer.role == "output":
                    yield Problem(
                        f"layers[{i}].role",
                        "not_allowed",
                        f"the network's output layer cannot be inside residual branch {branch!r}",
                    )
                ended[branch] = i
            previous = branch

    def _dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "seed": self.seed,
            "dtype": self.dtype,
            "layout": self.layout,
            "layers": [layer.to_dict() for layer in self.layers],
        }
        if self.depth_policy is not None:
            out["depth_policy"] = self.depth_policy.to_dict()
        if self.widths is not None:
            out["widths"] = self.widths
        return out

    def to_request(self, limits: RequestLimits | None = None) -> dict[str, Any]:
        """The request dict, after every local check (SpecInvalid lists all problems)."""
        problems = self.problems(limits)
        if problems:
            raise SpecInvalid(problems)
        return self._dict()


LAYER_CLASSES.update(
    {
        c.kind: c
        for c in (
            DenseSpec,
            ConvSpec,
            EmbeddingSpec,
            RecurrentSpec,
            AttentionSpec,
            NormSpec,
            TransformerBlockSpec,
            ResidualConvBlockSpec,
        )
    }
)


def request_problems(
    request: Mapping[str, Any], limits: RequestLimits | None = None
) -> list[Problem]:
    """Everything the client can tell is wrong with a request dict (empty when none)."""
    try:
        spec = NetworkSpec.from_request(request)
    except TypeError as exc:
        return [Problem("layers", "invalid_value", str(exc))]
    return spec.problems(limits)
