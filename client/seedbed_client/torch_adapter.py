"""PyTorch adapter (extra "torch"): describe a module's parameters as a seedbed request, fetch
the weights, and copy them into the module in place.

    from seedbed_client import Client
    from seedbed_client.torch_adapter import seed_module

    model = build_my_model()
    with Client() as client:
        report = seed_module(model, client, seed="sonar-denoiser/run-12")
    print(report.summary())

How modules map (layer names are the module's qualified names; the root module is `root_name`):

    Linear                        dense; weight (out, in) as served
    Conv1d/2d/3d                  conv (kernel, groups, stride); weight (out, in/groups, *k)
    ConvTranspose1d/2d/3d         conv with transposed: true; seedbed serves (out, in/groups, *k),
                                  torch stores (in, out/groups, *k): regrouped on copy
    Embedding                     embedding; a padding_idx row is set to zero afterwards (as
                                  torch does: that row gets no gradient), and reported
    RNN / LSTM / GRU              one recurrent layer per stacked layer and direction, named
                                  <module>.l<k> and <module>.l<k>_reverse; gate order asked for
                                  in torch's order (LSTM input, forget, cell, output; GRU reset,
                                  update, candidate), so gate blocks copy straight across
    MultiheadAttention            attention; query/key/value stacked into in_proj_weight (and
                                  in_proj_bias), output into out_proj
    LayerNorm, BatchNorm*, GroupNorm, InstanceNorm* (affine), RMSNorm
                                  norm; scale -> weight, shift -> bias

Recurrent biases: torch keeps two bias vectors per layer (bias_ih and bias_hh) and adds them;
seedbed serves one. The served bias goes into bias_ih and bias_hh is set to zero, so their sum
is the served bias exactly (for GRU this puts the candidate's bias outside the reset gate's
product, the usual single-bias reading of the cell).

Activations: `activations={"encoder.0": "relu"}` wins; otherwise, inside an nn.Sequential, the
module that follows a dense/conv layer decides (ReLU, LeakyReLU with its slope, ELU with its
alpha, GELU, SiLU, SELU, Tanh, Sigmoid, Softplus with default beta, Softmax which also makes
the layer an output layer), looking past Dropout and norm modules; another weight layer next
means linear. Anything else is left to the service's default (linear) and reported as not
inferred, so you can see which layers were guessed and which were not.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import torch
from torch import nn

from seedbed_client.client import DEFAULT_FORMAT, Client
from seedbed_client.errors import Problem, SpecInvalid

__all__ = [
    "ModuleDescription",
    "ParameterCopy",
    "apply_weights",
    "describe_module",
    "seed_module",
]

_DTYPES: Mapping[torch.dtype, str] = {
    torch.float32: "float32",
    torch.float64: "float64",
    torch.float16: "float16",
    torch.bfloat16: "bfloat16",
}
_CONVS = (nn.Conv1d, nn.Conv2d, nn.Conv3d)
_TRANSPOSED = (nn.ConvTranspose1d, nn.ConvTranspose2d, nn.ConvTranspose3d)
_NORMS: tuple[type[nn.Module], ...] = (
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
_PASS_THROUGH: tuple[type[nn.Module], ...] = (
    nn.Dropout,
    nn.Dropout1d,
    nn.Dropout2d,
    nn.Dropout3d,
    nn.AlphaDropout,
    *_NORMS,
)
_WEIGHT_LAYERS = (nn.Linear, *_CONVS, *_TRANSPOSED)

Converter = Callable[[np.ndarray], np.ndarray]


def _same(values: np.ndarray) -> np.ndarray:
    return values


@dataclass(frozen=True)
class ParameterCopy:
    """Where one torch parameter's values come from."""

    parameter: str  # the module's parameter name, e.g. "rnn.weight_ih_l0"
    sources: tuple[str, ...]  # served tensor names (several are stacked: attention in_proj)
    convert: Converter = _same  # served array(s), stacked, -> the parameter's layout
    zero: bool = False  # set to zero instead (torch's second recurrent bias)


@dataclass
class ModuleDescription:
    """A module as a seedbed request, and how to copy the answer back."""

    request: dict[str, Any]
    copies: list[ParameterCopy]
    inferred: dict[str, str] = field(default_factory=dict)  # layer -> activation, from structure
    not_inferred: list[str] = field(default_factory=list)  # dense/conv layers left at default
    skipped: list[str] = field(default_factory=list)  # parameters left untouched
    notes: list[str] = field(default_factory=list)

    def summary(self) -> str:
        lines = [f"{len(self.copies)} parameters from {len(self.request['layers'])} layers"]
        lines += [f"  activation of {k} inferred: {v}" for k, v in self.inferred.items()]
        lines += [f"  activation of {k}: not inferred (service default)" for k in self.not_inferred]
        lines += [f"  left untouched: {p}" for p in self.skipped]
        lines += [f"  note: {n}" for n in self.notes]
        return "\n".join(lines)


def _activation_of(module: nn.Module) -> tuple[str, float | None] | None:
    if isinstance(module, nn.ReLU):
        return "relu", None
    if isinstance(module, nn.LeakyReLU):
        return "leaky_relu", float(module.negative_slope)
    if isinstance(module, nn.ELU):
        return "elu", float(module.alpha)
    if isinstance(module, nn.SELU):
        return "selu", None
    if isinstance(module, nn.GELU):
        return "gelu", None
    if isinstance(module, nn.SiLU):
        return "silu", None
    if isinstance(module, nn.Tanh):
        return "tanh", None
    if isinstance(module, nn.Sigmoid):
        return "sigmoid", None
    if isinstance(module, nn.Softplus) and module.beta == 1:
        return "softplus", None
    if isinstance(module, nn.Softmax):
        return "softmax", None
    return None


def _following_activation(
    parents: Mapping[str, tuple[nn.Module, str]], qualname: str
) -> tuple[str, float | None] | None:
    """The activation that clearly follows `qualname` inside its nn.Sequential, if any."""
    if qualname not in parents:
        return None
    parent, key = parents[qualname]
    if not isinstance(parent, nn.Sequential):
        return None
    siblings = list(parent._modules.items())
    index = [k for k, _ in siblings].index(key)
    for _, nxt in siblings[index + 1 :]:
        if nxt is None or isinstance(nxt, _PASS_THROUGH):
            continue
        if isinstance(nxt, _WEIGHT_LAYERS):
            return "linear", None
        return _activation_of(nxt)
    return None


def _transposed_converter(groups: int) -> Converter:
    def convert(served: np.ndarray) -> np.ndarray:
        # served (out, in/g, *k) -> torch (in, out/g, *k): split out into groups, swap the
        # per-group in/out axes, and stack the groups along the input axis.
        out_ch, in_per, *kernel = served.shape
        blocks = served.reshape(groups, out_ch // groups, in_per, *kernel)
        swapped = np.swapaxes(blocks, 1, 2)
        return np.ascontiguousarray(swapped.reshape(groups * in_per, out_ch // groups, *kernel))

    return convert


def _reshaper(shape: tuple[int, ...]) -> Converter:
    return lambda served: served.reshape(shape)


class _Builder:
    def __init__(
        self,
        root_name: str,
        activations: Mapping[str, str | tuple[str, float]],
        roles: Mapping[str, str],
        extra: Mapping[str, Mapping[str, Any]],
    ) -> None:
        self.root_name = root_name
        self.activations = activations
        self.roles = roles
        self.extra = extra
        self.layers: list[dict[str, Any]] = []
        self.copies: list[ParameterCopy] = []
        self.covered: set[str] = set()
        self.inferred: dict[str, str] = {}
        self.not_inferred: list[str] = []
        self.notes: list[str] = []

    def name(self, qualname: str) -> str:
        return qualname or self.root_name

    def param(self, qualname: str, local: str) -> str:
        return f"{qualname}.{local}" if qualname else local

    def add_layer(self, qualname: str, layer: dict[str, Any]) -> None:
        name = layer["name"]
        if name in self.roles:
            layer["role"] = self.roles[name]
        layer.update(self.extra.get(name, {}))
        self.layers.append(layer)

    def copy(
        self,
        qualname: str,
        local: str,
        sources: tuple[str, ...],
        convert: Converter = _same,
        zero: bool = False,
    ) -> None:
        full = self.param(qualname, local)
        self.copies.append(ParameterCopy(full, sources, convert, zero))
        self.covered.add(full)

    def set_activation(
        self, layer: dict[str, Any], parents: Mapping[str, tuple[nn.Module, str]], qualname: str
    ) -> None:
        name = layer["name"]
        given = self.activations.get(name)
        found: tuple[str, float | None] | None
        if given is not None:
            found = (given, None) if isinstance(given, str) else (given[0], float(given[1]))
        else:
            found = _following_activation(parents, qualname)
            if found is None:
                self.not_inferred.append(name)
                return
            self.inferred[name] = found[0] if found[1] is None else f"{found[0]}({found[1]:g})"
        layer["activation"] = found[0]
        if found[1] is not None:
            layer["activation_param"] = found[1]
        if found[0] == "softmax":
            layer.setdefault("role", "output")


def _describe_linear(b: _Builder, q: str, m: nn.Linear, parents: Any) -> None:
    name = b.name(q)
    layer = {
        "name": name,
        "kind": "dense",
        "n_in": m.in_features,
        "n_out": m.out_features,
        "bias": m.bias is not None,
    }
    b.set_activation(layer, parents, q)
    b.add_layer(q, layer)
    b.copy(q, "weight", (f"{name}.weight",))
    if m.bias is not None:
        b.copy(q, "bias", (f"{name}.bias",))


def _describe_conv(b: _Builder, q: str, m: Any, parents: Any, transposed: bool) -> None:
    name = b.name(q)
    layer = {
        "name": name,
        "kind": "conv",
        "channels_in": int(m.in_channels),
        "channels_out": int(m.out_channels),
        "kernel": [int(k) for k in m.kernel_size],
        "groups": int(m.groups),
        "stride": [int(s) for s in m.stride],
        "transposed": transposed,
        "bias": m.bias is not None,
    }
    b.set_activation(layer, parents, q)
    b.add_layer(q, layer)
    convert = _transposed_converter(int(m.groups)) if transposed else _same
    b.copy(q, "weight", (f"{name}.weight",), convert)
    if m.bias is not None:
        b.copy(q, "bias", (f"{name}.bias",))


def _describe_recurrent(b: _Builder, q: str, m: nn.RNNBase) -> None:
    if getattr(m, "proj_size", 0):
        raise SpecInvalid(
            [Problem(b.name(q), "not_allowed", "LSTM with proj_size has no seedbed equivalent")]
        )
    if m.mode == "LSTM":
        cell, gates, activation = "lstm", ["input", "forget", "cell", "output"], None
    elif m.mode == "GRU":
        cell, gates, activation = "gru", ["reset", "update", "candidate"], None
    else:
        cell, gates, activation = "simple", None, "tanh" if m.mode == "RNN_TANH" else "relu"
    directions = 2 if m.bidirectional else 1
    for k in range(m.num_layers):
        for d in range(directions):
            sfx = "_reverse" if d else ""
            name = f"{b.name(q)}.l{k}{sfx}"
            layer: dict[str, Any] = {
                "name": name,
                "kind": "recurrent",
                "cell": cell,
                "n_in": m.input_size if k == 0 else m.hidden_size * directions,
                "hidden": m.hidden_size,
                "bias": bool(m.bias),
            }
            if gates is not None:
                layer["gate_order"] = gates
            if activation is not None:
                layer["activation"] = activation
            b.add_layer(q, layer)
            b.copy(q, f"weight_ih_l{k}{sfx}", (f"{name}.input_weight",))
            b.copy(q, f"weight_hh_l{k}{sfx}", (f"{name}.recurrent_weight",))
            if m.bias:
                b.copy(q, f"bias_ih_l{k}{sfx}", (f"{name}.bias",))
                b.copy(q, f"bias_hh_l{k}{sfx}", (), zero=True)
    if m.bias:
        b.notes.append(
            f"{b.name(q)}: the served bias went into bias_ih_*; bias_hh_* were set to zero so "
            "their sum is the served bias"
        )


def _describe_attention(b: _Builder, q: str, m: nn.MultiheadAttention) -> None:
    name = b.name(q)
    if not m._qkv_same_embed_dim:
        raise SpecInvalid(
            [
                Problem(
                    name,
                    "not_allowed",
                    "MultiheadAttention with kdim/vdim different from embed_dim "
                    "has no seedbed equivalent (attention is dim x dim)",
                )
            ]
        )
    if m.bias_k is not None or m.bias_v is not None:
        raise SpecInvalid(
            [
                Problem(
                    name,
                    "not_allowed",
                    "MultiheadAttention with add_bias_kv has no seedbed equivalent",
                )
            ]
        )
    has_bias = m.in_proj_bias is not None
    b.add_layer(
        q,
        {
            "name": name,
            "kind": "attention",
            "dim": m.embed_dim,
            "heads": m.num_heads,
            "bias": has_bias,
        },
    )
    parts = ("query", "key", "value")
    b.copy(q, "in_proj_weight", tuple(f"{name}.{p}.weight" for p in parts))
    b.copy(q, "out_proj.weight", (f"{name}.output.weight",))
    if has_bias:
        b.copy(q, "in_proj_bias", tuple(f"{name}.{p}.bias" for p in parts))
        if m.out_proj.bias is not None:
            b.copy(q, "out_proj.bias", (f"{name}.output.bias",))


def _describe_norm(b: _Builder, q: str, m: nn.Module) -> None:
    weight = getattr(m, "weight", None)
    if not isinstance(weight, nn.Parameter):
        return  # no affine part: nothing to initialise
    name = b.name(q)
    bias = getattr(m, "bias", None)
    shape = tuple(weight.shape)
    b.add_layer(
        q,
        {
            "name": name,
            "kind": "norm",
            "dim": math.prod(shape),
            "bias": isinstance(bias, nn.Parameter),
        },
    )
    b.copy(q, "weight", (f"{name}.scale",), _reshaper(shape))
    if isinstance(bias, nn.Parameter):
        b.copy(q, "bias", (f"{name}.shift",), _reshaper(tuple(bias.shape)))


def describe_module(
    module: nn.Module,
    *,
    seed: int | str,
    activations: Mapping[str, str | tuple[str, float]] | None = None,
    roles: Mapping[str, str] | None = None,
    layer_options: Mapping[str, Mapping[str, Any]] | None = None,
    root_name: str = "model",
    allow_untouched: bool = False,
) -> ModuleDescription:
    """The seedbed request for `module`'s parameters, and how to copy the answer back.

    `activations` and `roles` are keyed by layer name (the module's qualified name; recurrent
    layers `<name>.l<k>`); `layer_options` adds request fields per layer (e.g. an `init`
    override). Parameters of modules the adapter does not know raise SpecInvalid, unless
    `allow_untouched`, in which case they are listed in `skipped` and left as they are.
    """
    dtypes = {p.dtype for p in module.parameters()}
    if len(dtypes) != 1 or next(iter(dtypes)) not in _DTYPES:
        raise SpecInvalid(
            [
                Problem(
                    "dtype",
                    "not_allowed",
                    f"the module's parameters have dtypes {sorted(map(str, dtypes))}"
                    "; allowed: one of float32, float64, float16, bfloat16 for "
                    "all",
                )
            ]
        )
    b = _Builder(root_name, activations or {}, roles or {}, layer_options or {})
    parents: dict[str, tuple[nn.Module, str]] = {}
    for qualname, sub in module.named_modules():
        for key, child in sub._modules.items():
            if child is not None:
                parents[f"{qualname}.{key}" if qualname else key] = (sub, key)
    handled: list[str] = []
    for qualname, sub in module.named_modules():
        if any(qualname.startswith(h + ".") for h in handled):
            continue  # inside a module already described whole (attention's out_proj)
        if isinstance(sub, nn.MultiheadAttention):
            _describe_attention(b, qualname, sub)
        elif isinstance(sub, nn.Linear):
            _describe_linear(b, qualname, sub, parents)
        elif isinstance(sub, _CONVS):
            _describe_conv(b, qualname, sub, parents, transposed=False)
        elif isinstance(sub, _TRANSPOSED):
            _describe_conv(b, qualname, sub, parents, transposed=True)
        elif isinstance(sub, nn.Embedding):
            name = b.name(qualname)
            b.add_layer(
                qualname,
                {
                    "name": name,
                    "kind": "embedding",
                    "vocab": sub.num_embeddings,
                    "dim": sub.embedding_dim,
                },
            )
            b.copy(qualname, "weight", (f"{name}.weight",))
            if sub.padding_idx is not None:
                b.notes.append(f"{name}: row {sub.padding_idx} (padding_idx) set to zero")
        elif isinstance(sub, nn.RNNBase):
            _describe_recurrent(b, qualname, sub)
        elif isinstance(sub, _NORMS):
            _describe_norm(b, qualname, sub)
        else:
            continue
        handled.append(qualname)
    untouched = [n for n, _ in module.named_parameters() if n not in b.covered]
    if untouched and not allow_untouched:
        raise SpecInvalid(
            [
                Problem(
                    n,
                    "not_allowed",
                    "no seedbed layer describes this parameter; pass "
                    "allow_untouched=True to leave it as it is",
                )
                for n in untouched
            ]
        )
    request = {
        "seed": seed,
        "dtype": _DTYPES[next(iter(dtypes))],
        "layout": "out_in",
        "layers": b.layers,
    }
    return ModuleDescription(request, b.copies, b.inferred, b.not_inferred, untouched, b.notes)


def _as_torch(values: np.ndarray, dtype: torch.dtype) -> torch.Tensor:
    if dtype == torch.bfloat16:  # numpy has no bfloat16 torch understands: go through the bits
        bits = np.ascontiguousarray(values).view(np.int16)
        return torch.from_numpy(bits).view(torch.bfloat16)
    return torch.from_numpy(np.ascontiguousarray(values))


def apply_weights(
    module: nn.Module, description: ModuleDescription, arrays: Mapping[str, np.ndarray]
) -> None:
    """Copy served arrays into the module's parameters, in place, under torch.no_grad()."""
    params = dict(module.named_parameters())
    # Served arrays are memory maps of the download, one per tensor: dropping each once its
    # last parameter is filled lets its pages go, so copying holds about one tensor at a time.
    pending = dict(arrays)
    del arrays  # when the caller passed its only reference, `pending` is now the only holder
    uses: dict[str, int] = {}
    for item in description.copies:
        for s in item.sources:
            uses[s] = uses.get(s, 0) + 1
    with torch.no_grad():
        for item in description.copies:
            target = params[item.parameter]
            if item.zero:
                target.zero_()
                continue
            pieces = [pending[s] for s in item.sources]
            for s in item.sources:
                uses[s] -= 1
                if uses[s] == 0:
                    del pending[s]
            served = pieces[0] if len(pieces) == 1 else np.concatenate(pieces, axis=0)
            values = _as_torch(item.convert(served), target.dtype)
            if tuple(values.shape) != tuple(target.shape):
                raise SpecInvalid(
                    [
                        Problem(
                            item.parameter,
                            "invalid_value",
                            f"served shape {tuple(values.shape)} does not fit "
                            f"the parameter's {tuple(target.shape)}",
                        )
                    ]
                )
            target.copy_(values)
            del pieces, served, values
        for sub in module.modules():
            if isinstance(sub, nn.Embedding) and sub.padding_idx is not None:
                sub.weight[sub.padding_idx].zero_()


def seed_module(
    module: nn.Module,
    client: Client,
    *,
    seed: int | str,
    format: str = DEFAULT_FORMAT,
    origin: str = "service",
    **options: Any,
) -> ModuleDescription:
    """Describe `module`, fetch its weights (verified), and copy them in place.

    `origin="local"` fetches only the plan and generates the values in this process (the same
    bytes; see Client.weights). `options` go to `describe_module`. Returns the description
    (what was inferred, skipped, noted); the module's parameters hold the served values.
    """
    description = describe_module(module, seed=seed, **options)
    # Not bound to a name here, so apply_weights holds the only reference and can let each
    # tensor go once copied.
    apply_weights(module, description,
                  client.weights(description.request, format=format, origin=origin))
    return description
