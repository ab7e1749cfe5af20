"""How each torch module becomes seedbed layers, and where each of its parameters comes from.

    Linear                        dense; weight (out, in) as served
    Conv1d/2d/3d                  conv (kernel, groups, stride); weight (out, in/groups, *k)
    ConvTranspose1d/2d/3d         conv with transposed: true; torch stores (in, out/groups, *k):
                                  rearranged by framework_layouts.transposed_conv_to_in_first
    Embedding                     embedding; a padding_idx row is set to zero afterwards (as
                                  torch does: that row gets no gradient), and reported
    RNN / LSTM / GRU              one recurrent layer per stacked layer and direction, named
                                  <module>.l<k> and <module>.l<k>_reverse, gates asked for in
                                  torch's order so blocks copy straight across
    MultiheadAttention            attention; in_proj_weight (and in_proj_bias) is the fused
                                  concatenation of the query, key and value tensors
    TransformerEncoderLayer       its attention, two dense layers and two norms, with the
                                  layer's own activation and residual branches (norm_first
                                  decides pre- or post-norm)
    LayerNorm, BatchNorm*, GroupNorm, InstanceNorm* (affine), RMSNorm
                                  norm; scale -> weight, shift -> bias

Recurrent biases: torch adds two bias vectors (bias_ih, bias_hh); seedbed serves one. The
served bias goes into bias_ih and bias_hh is zero (framework_layouts.two_bias_split).
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
from torch import nn

from seedbed_client import framework_layouts as fl
from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.torch_adapter.catalog import CONVS, NORMS, TRANSPOSED, Activation, has_affine

Converter = Callable[[np.ndarray], np.ndarray]


def _same(values: np.ndarray) -> np.ndarray:
    return values


@dataclass(frozen=True)
class ParameterCopy:
    """Where one torch parameter's values come from: the served tensors in `sources`, fused
    along axis 0 when there are several (attention in_proj), then `convert`ed to torch's
    layout; or zeros (`zero`: torch's second recurrent bias)."""

    parameter: str
    sources: tuple[str, ...]
    convert: Converter = _same
    zero: bool = False


@dataclass
class Part:
    """One seedbed layer made from (part of) a torch module."""

    layer: dict[str, Any]
    module: str  # qualified name of the torch module it comes from
    copies: list[ParameterCopy]
    needs_activation: bool  # dense, conv, norm: the activation after it sets its scale
    # Fixed by the module itself (TransformerEncoderLayer parts, simple RNN cells): the
    # activation, branch and role, and the sentence saying so.
    fixed_activation: Activation | None = None
    fixed_branch: str | None = None
    fixed_role: str | None = None
    fixed_reason: str = ""
    inner: bool = False  # built from a composite module, not a call of its own
    call: str = ""  # the module whose call places this layer in the signal order (default: module)
    notes: list[str] = field(default_factory=list)


def weight_layer_types() -> tuple[type[nn.Module], ...]:
    return (nn.Linear, *CONVS, *TRANSPOSED)


def is_layer_module(m: nn.Module) -> bool:
    """A module this file turns into seedbed layers (norms only with an affine part)."""
    return isinstance(
        m,
        (
            nn.Linear,
            *CONVS,
            *TRANSPOSED,
            nn.Embedding,
            nn.RNNBase,
            nn.MultiheadAttention,
            nn.TransformerEncoderLayer,
        ),
    ) or (isinstance(m, NORMS) and has_affine(m))


def _param(qualname: str, local: str) -> str:
    return f"{qualname}.{local}" if qualname else local


def _linear(name: str, q: str, m: nn.Linear) -> Part:
    layer = {
        "name": name,
        "kind": "dense",
        "n_in": m.in_features,
        "n_out": m.out_features,
        "bias": m.bias is not None,
    }
    copies = [ParameterCopy(_param(q, "weight"), (f"{name}.weight",))]
    if m.bias is not None:
        copies.append(ParameterCopy(_param(q, "bias"), (f"{name}.bias",)))
    return Part(layer, q, copies, True)


def _conv(name: str, q: str, m: Any, transposed: bool) -> Part:
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
    groups = int(m.groups)
    convert: Converter = (
        (lambda served: fl.transposed_conv_to_in_first(served, groups)) if transposed else _same
    )
    copies = [ParameterCopy(_param(q, "weight"), (f"{name}.weight",), convert)]
    if m.bias is not None:
        copies.append(ParameterCopy(_param(q, "bias"), (f"{name}.bias",)))
    return Part(layer, q, copies, True)


def _embedding(name: str, q: str, m: nn.Embedding) -> Part:
    layer = {"name": name, "kind": "embedding", "vocab": m.num_embeddings, "dim": m.embedding_dim}
    part = Part(layer, q, [ParameterCopy(_param(q, "weight"), (f"{name}.weight",))], False)
    if m.padding_idx is not None:
        part.notes.append(f"row {m.padding_idx} (padding_idx) set to zero, as torch keeps it")
    return part


def _recurrent(name: str, q: str, m: nn.RNNBase) -> list[Part]:
    if getattr(m, "proj_size", 0):
        raise SpecInvalid([Problem(q, "not_allowed", "LSTM with proj_size has no seedbed layer")])
    activation: Activation | None = None
    if m.mode == "LSTM":
        cell = "lstm"
    elif m.mode == "GRU":
        cell = "gru"
    else:
        cell = "simple"
        activation = ("tanh", None) if m.mode == "RNN_TANH" else ("relu", None)
    gates = fl.FRAMEWORK_GATE_ORDERS["torch"][cell]
    directions = 2 if m.bidirectional else 1
    parts = []
    for k in range(m.num_layers):
        for d in range(directions):
            sfx = "_reverse" if d else ""
            lname = f"{name}.l{k}{sfx}"
            layer: dict[str, Any] = {
                "name": lname,
                "kind": "recurrent",
                "cell": cell,
                "n_in": m.input_size if k == 0 else m.hidden_size * directions,
                "hidden": m.hidden_size,
                "bias": bool(m.bias),
            }
            if cell != "simple":
                layer["gate_order"] = list(gates)
            copies = [
                ParameterCopy(_param(q, f"weight_ih_l{k}{sfx}"), (f"{lname}.input_weight",)),
                ParameterCopy(_param(q, f"weight_hh_l{k}{sfx}"), (f"{lname}.recurrent_weight",)),
            ]
            if m.bias:
                copies.append(ParameterCopy(_param(q, f"bias_ih_l{k}{sfx}"), (f"{lname}.bias",)))
                copies.append(ParameterCopy(_param(q, f"bias_hh_l{k}{sfx}"), (), zero=True))
            part = Part(layer, q, copies, False, inner=(k, d) != (0, 0))
            if activation is not None:
                part.fixed_activation = activation
                part.fixed_reason = f"the cell's own nonlinearity ({m.mode})"
            if m.bias:
                part.notes.append("served bias in bias_ih; bias_hh zero, so their sum is it")
            parts.append(part)
    return parts


def _attention(name: str, q: str, m: nn.MultiheadAttention) -> Part:
    if not m._qkv_same_embed_dim:
        raise SpecInvalid(
            [
                Problem(
                    q,
                    "not_allowed",
                    "MultiheadAttention with kdim/vdim different from embed_dim has no seedbed "
                    "layer (attention is dim x dim)",
                )
            ]
        )
    if m.bias_k is not None or m.bias_v is not None:
        raise SpecInvalid(
            [Problem(q, "not_allowed", "MultiheadAttention with add_bias_kv has no seedbed layer")]
        )
    has_bias = m.in_proj_bias is not None
    layer = {
        "name": name,
        "kind": "attention",
        "dim": m.embed_dim,
        "heads": m.num_heads,
        "bias": has_bias,
    }
    qkv = ("query", "key", "value")
    copies = [
        ParameterCopy(_param(q, "in_proj_weight"), tuple(f"{name}.{p}.weight" for p in qkv)),
        ParameterCopy(_param(q, "out_proj.weight"), (f"{name}.output.weight",)),
    ]
    if has_bias:
        copies.append(
            ParameterCopy(_param(q, "in_proj_bias"), tuple(f"{name}.{p}.bias" for p in qkv))
        )
        if m.out_proj.bias is not None:
            copies.append(ParameterCopy(_param(q, "out_proj.bias"), (f"{name}.output.bias",)))
    return Part(layer, q, copies, False)


def _norm(name: str, q: str, m: nn.Module) -> Part:
    weight = m.weight
    assert isinstance(weight, nn.Parameter)  # is_layer_module admitted only affine norms
    bias = getattr(m, "bias", None)
    shape = tuple(weight.shape)
    has_shift = isinstance(bias, nn.Parameter)
    layer = {"name": name, "kind": "norm", "dim": math.prod(shape), "bias": has_shift}
    copies = [ParameterCopy(_param(q, "weight"), (f"{name}.scale",), lambda a: a.reshape(shape))]
    if has_shift:
        copies.append(
            ParameterCopy(_param(q, "bias"), (f"{name}.shift",), lambda a: a.reshape(shape))
        )
    return Part(layer, q, copies, True)


def _encoder_layer(name: str, q: str, m: nn.TransformerEncoderLayer) -> list[Part]:
    from seedbed_client.torch_adapter.catalog import function_activation

    act = function_activation(m.activation)
    if act is None:
        raise SpecInvalid(
            [
                Problem(
                    q,
                    "not_allowed",
                    f"TransformerEncoderLayer with activation {m.activation!r}: no seedbed gain "
                    "for it; pass activations={...} for its linear1 and build the layer from "
                    "its parts",
                )
            ]
        )
    sub = {k: f"{name}.{k}" for k in ("self_attn", "linear1", "linear2", "norm1", "norm2")}
    qq = {k: _param(q, k) for k in sub}
    attn = _attention(sub["self_attn"], qq["self_attn"], m.self_attn)
    lin1 = _linear(sub["linear1"], qq["linear1"], m.linear1)
    lin2 = _linear(sub["linear2"], qq["linear2"], m.linear2)
    norm1 = _norm(sub["norm1"], qq["norm1"], m.norm1)
    norm2 = _norm(sub["norm2"], qq["norm2"], m.norm2)
    attn_branch, mlp_branch = f"{name}.attn_skip", f"{name}.mlp_skip"
    why = "the layer's own structure (TransformerEncoderLayer"
    why += ", norm_first)" if m.norm_first else ", post-norm)"
    lin1.fixed_activation, lin1.fixed_reason = act, f"the layer's activation setting ({act[0]})"
    lin2.fixed_activation, lin2.fixed_reason = ("linear", None), why
    lin2.fixed_role = attn.fixed_role = "residual_out"
    attn.fixed_reason = why
    if m.norm_first:
        order = [norm1, attn, norm2, lin1, lin2]
        norm1.fixed_branch = attn.fixed_branch = attn_branch
        norm2.fixed_branch = lin1.fixed_branch = lin2.fixed_branch = mlp_branch
        for p in (norm1, norm2):
            p.fixed_activation, p.fixed_reason = ("linear", None), why
    else:
        order = [attn, norm1, lin1, lin2, norm2]
        attn.fixed_branch = attn_branch
        lin1.fixed_branch = lin2.fixed_branch = mlp_branch
        norm1.fixed_activation, norm1.fixed_reason = ("linear", None), why
        # norm2's output leaves the layer: what follows the whole layer decides
    for p in order:
        p.inner = True
        p.call = q
    order[0].inner = False
    return order


def module_parts(name: str, q: str, m: nn.Module) -> list[Part]:
    """The seedbed layers of module `m` (qualified name `q`; layer names start with `name`)."""
    if isinstance(m, nn.TransformerEncoderLayer):
        return _encoder_layer(name, q, m)
    if isinstance(m, nn.MultiheadAttention):
        return [_attention(name, q, m)]
    if isinstance(m, nn.Linear):
        return [_linear(name, q, m)]
    if isinstance(m, CONVS):
        return [_conv(name, q, m, transposed=False)]
    if isinstance(m, TRANSPOSED):
        return [_conv(name, q, m, transposed=True)]
    if isinstance(m, nn.Embedding):
        return [_embedding(name, q, m)]
    if isinstance(m, nn.RNNBase):
        return _recurrent(name, q, m)
    if isinstance(m, NORMS) and has_affine(m):
        return [_norm(name, q, m)]
    return []
