"""The simulation engine against independent references.

Outside references:
- PyTorch (CPU, float64) as an oracle: every network is rebuilt here from torch's own layers
  (F.linear, F.conv*d after circular F.pad, F.conv_transpose*d folded onto the periodic grid,
  F.scaled_dot_product_attention, F.layer_norm, F.embedding and torch's activations), fed the
  same inputs and weights, and differentiated by autograd; each layer's output and the
  gradient of the loss with respect to it must match the engine's, and so must the reported
  stds.
- Mean-field theory (Poole et al. 2016, the length map [from memory]), computed here with
  scipy quadrature: a wide tanh network's pre-activation second moment approaches q*.
"""

from __future__ import annotations

import dataclasses
import math
from typing import Any

import numpy as np
import pytest

from conftest import require_oracle
from seedbed.core.diagnostics.engine import Simulation, simulate
from seedbed.core.diagnostics.network import Network, Step, build_network
from seedbed.core.plan import plan_request
from seedbed.core.plan_types import Plan
from seedbed.core.request.parse import parse

torch = require_oracle("torch")
F = torch.nn.functional


def _setup(request: dict[str, Any]) -> tuple[Network, Plan]:
    parsed = parse(request)
    return build_network(parsed), plan_request(parsed)


# --- the torch rebuild --------------------------------------------------------------------


def _act(name: str, param: float | None, x: Any) -> Any:
    if name == "linear":
        return x
    if name == "leaky_relu":
        return F.leaky_relu(x, negative_slope=param)
    if name == "elu":
        return F.elu(x, alpha=param)
    if name == "softmax":
        return torch.softmax(x, dim=-1)
    return {
        "relu": torch.relu,
        "tanh": torch.tanh,
        "sigmoid": torch.sigmoid,
        "selu": F.selu,
        "gelu": F.gelu,
        "silu": F.silu,
        "softplus": F.softplus,
    }[name](x)


def _conv(step: Step, x: Any, w: Any, b: Any) -> Any:
    lay = step.layer
    kernel, stride, g = list(lay.kernel), list(lay.stride), lay.groups
    nd = len(kernel)
    xc = x.movedim(-1, 1)  # channels first for torch
    if not lay.transposed:
        pads: list[int] = []
        for k in reversed(kernel):  # F.pad lists the last dim first
            c = (k - 1) // 2
            pads += [c, k - 1 - c]
        conv = {1: F.conv1d, 2: F.conv2d, 3: F.conv3d}[nd]
        y = conv(F.pad(xc, pads, mode="circular"), w, b, stride=stride, groups=g)
        return y.movedim(1, -1)
    # torch keeps transposed kernels as (c_in, c_out/g, *k); ours are (c_out, c_in/g, *k)
    c_out, c_in_g = w.shape[0], w.shape[1]
    wt = (
        w.reshape(g, c_out // g, c_in_g, *kernel)
        .transpose(1, 2)
        .reshape(g * c_in_g, c_out // g, *kernel)
    )
    conv_t = {1: F.conv_transpose1d, 2: F.conv_transpose2d, 3: F.conv_transpose3d}[nd]
    full = conv_t(xc, wt, None, stride=stride, groups=g)  # y[i*s + o] += W_o x[i]
    # fold onto the periodic grid of n*s positions, shifted by the kernel centre
    for axis, (k, s, n) in enumerate(zip(kernel, stride, step.grid_in, strict=True)):
        size, c = n * s, (k - 1) // 2
        dim = 2 + axis
        length = full.shape[dim]
        pieces = torch.zeros((*full.shape[:dim], size, *full.shape[dim + 1 :]), dtype=full.dtype)
        for j in range(length):
            index = [slice(None)] * full.dim()
            index[dim] = slice(j, j + 1)
            target = [slice(None)] * full.dim()
            target[dim] = slice((j - c) % size, (j - c) % size + 1)
            pieces[tuple(target)] = pieces[tuple(target)] + full[tuple(index)]
        full = pieces
    y = full.movedim(1, -1)
    return y + b if b is not None else y


def _attention(step: Step, x: Any, lookup: Any, logit_scale: float) -> Any:
    b, d, h = x.shape[0], x.shape[-1], step.layer.heads
    flat = x.reshape(b, -1, d)

    def proj(name: str, inp: Any) -> Any:
        bias = lookup(f"{step.name}.{name}.bias")
        return F.linear(inp, lookup(f"{step.name}.{name}.weight"), bias)

    def heads(t: Any) -> Any:
        return t.reshape(b, -1, h, d // h).transpose(1, 2)

    q, k, v = (heads(proj(n, flat)) for n in ("query", "key", "value"))
    ctx = F.scaled_dot_product_attention(q, k, v, scale=logit_scale / math.sqrt(d // h))
    out = proj("output", ctx.transpose(1, 2).reshape(b, -1, d))
    return out.reshape(x.shape)


def torch_run(network: Network, sim: Simulation) -> tuple[list[Any], list[Any]]:
    """Outputs of every layer and the loss gradient with respect to each, from torch."""
    store = sim.weights
    assert store is not None and sim.inputs is not None and sim.projection is not None

    def lookup(name: str) -> Any:
        values = store(name)
        if values is None:
            return None
        return torch.from_numpy(np.array(values)).requires_grad_(True)  # so autograd tracks

    def scalar(name: str) -> float:
        v = store.scalar(name)
        return 0.0 if v is None else v

    x = torch.from_numpy(np.array(sim.inputs))
    outs: list[Any] = []
    skip = None
    for step in network.steps:
        if step.branch_start:
            skip = x
        inp = x + scalar(f"{step.name}.offset") if step.kind != "embedding" else x
        name = step.name
        if step.kind == "dense":
            pre = F.linear(inp, lookup(f"{name}.weight"), lookup(f"{name}.bias"))
        elif step.kind == "conv":
            pre = _conv(step, inp, lookup(f"{name}.weight"), lookup(f"{name}.bias"))
        elif step.kind == "attention":
            pre = _attention(step, inp, lookup, store.logit_scale(name))
        elif step.kind == "norm":
            pre = F.layer_norm(
                inp,
                (step.out_features,),
                lookup(f"{name}.scale"),
                lookup(f"{name}.shift"),
                eps=1e-5,
            )
        else:
            pre = F.embedding(inp, lookup(f"{name}.weight"))
        pre = pre + scalar(f"{name}.activation_offset")
        y = _act(step.activation, step.activation_param, pre)
        if step.branch_end:
            gate = store.scalar(f"{step.branch}.gate")
            mult = store.scalar(f"{step.branch}.multiplier")
            m = (1.0 if gate is None else gate) * (1.0 if mult is None else mult)
            y = store.skip_scale(step.branch or "") * skip + m * y
        y.retain_grad()
        outs.append(y)
        x = y
    loss = (x * torch.from_numpy(sim.projection)).sum()
    loss.backward()
    return outs, [o.grad for o in outs]


def _compare(network: Network, plan: Plan, batch: int) -> Simulation:
    sim = simulate(network, plan, batch, keep_arrays=True)
    outs, grads = torch_run(network, sim)
    for step, record, mine, ref, g_mine, g_ref in zip(
        network.steps, sim.records, sim.outputs, outs, sim.gradients, grads, strict=True
    ):
        ref_np = ref.detach().numpy()
        scale = max(float(np.max(np.abs(ref_np))), 1e-300)
        np.testing.assert_allclose(mine, ref_np, rtol=0, atol=1e-10 * scale, err_msg=step.name)
        g_np = g_ref.numpy()
        g_scale = max(float(np.max(np.abs(g_np))), 1e-300)
        np.testing.assert_allclose(g_mine, g_np, rtol=0, atol=1e-9 * g_scale, err_msg=step.name)
        assert record.activation_std == pytest.approx(float(ref_np.std()), rel=1e-9, abs=1e-300)
        assert record.gradient_std == pytest.approx(float(g_np.std()), rel=1e-8, abs=1e-300)
        assert record.activation_mean == pytest.approx(
            float(ref_np.mean()), rel=1e-8, abs=1e-12 * scale
        )
    return sim


# --- networks -------------------------------------------------------------------------------


def _dense(name: str, n_in: int, n_out: int, act: str, **extra: Any) -> dict[str, Any]:
    return {"name": name, "kind": "dense", "n_in": n_in, "n_out": n_out, "activation": act, **extra}


def test_mlp_with_every_activation_matches_torch() -> None:
    acts = ["relu", "tanh", "gelu", "leaky_relu", "elu", "selu", "silu", "softplus", "sigmoid"]
    layers = [_dense(f"h{i}", 24, 24, a) for i, a in enumerate(acts)]
    layers[3]["activation_param"] = 0.1
    layers[4]["activation_param"] = 0.7
    layers.append(_dense("out", 24, 7, "softmax", role="output"))
    network, plan = _setup({"seed": 11, "dtype": "float64", "layers": layers})
    _compare(network, plan, 16)


def test_convs_grouped_strided_transposed_match_torch() -> None:
    layers = [
        {
            "name": "c1",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 8,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {
            "name": "c2",
            "kind": "conv",
            "channels_in": 8,
            "channels_out": 8,
            "kernel": [3, 3],
            "groups": 2,
            "stride": [2, 2],
            "activation": "tanh",
        },
        {
            "name": "c3",
            "kind": "conv",
            "channels_in": 8,
            "channels_out": 6,
            "kernel": [2, 3],
            "stride": [1, 2],
            "activation": "gelu",
        },
        {
            "name": "up",
            "kind": "conv",
            "channels_in": 6,
            "channels_out": 4,
            "kernel": [3, 2],
            "stride": [2, 2],
            "groups": 2,
            "transposed": True,
            "activation": "relu",
        },
        _dense("head", 4, 3, "linear", role="output"),
    ]
    network, plan = _setup({"seed": "conv-check", "layers": layers})
    assert network.input_grid == (8, 8)
    assert [s.grid_out for s in network.steps] == [(8, 8), (4, 4), (4, 2), (8, 4), (8, 4)]
    _compare(network, plan, 3)


def test_conv_1d_transposed_and_3d_match_torch() -> None:
    one = [
        {
            "name": "a",
            "kind": "conv",
            "channels_in": 2,
            "channels_out": 4,
            "kernel": [5],
            "activation": "silu",
        },
        {
            "name": "b",
            "kind": "conv",
            "channels_in": 4,
            "channels_out": 4,
            "kernel": [4],
            "stride": [3],
            "transposed": True,
            "groups": 4,
            "activation": "linear",
        },
    ]
    network, plan = _setup({"seed": 5, "layers": one})
    assert network.steps[-1].grid_out == (192,)
    _compare(network, plan, 2)
    three = [
        {
            "name": "v",
            "kind": "conv",
            "channels_in": 2,
            "channels_out": 3,
            "kernel": [3, 3, 3],
            "activation": "elu",
        },
        {
            "name": "w",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 2,
            "kernel": [1, 2, 3],
            "stride": [1, 2, 1],
            "activation": "sigmoid",
        },
    ]
    network, plan = _setup({"seed": 6, "layers": three})
    _compare(network, plan, 2)


TRANSFORMER = {
    "name": "enc",
    "kind": "transformer_block",
    "dim": 16,
    "heads": 4,
    "mlp_dim": 32,
    "repeat": 2,
}


def _lm(block: dict[str, Any], **request: Any) -> dict[str, Any]:
    return {
        "seed": "lm",
        "layers": [
            {"name": "tok", "kind": "embedding", "vocab": 50, "dim": 16},
            block,
            _dense("head", 16, 50, "linear", role="output"),
        ],
        **request,
    }


def test_pre_norm_transformer_matches_torch() -> None:
    network, plan = _setup(_lm(TRANSFORMER))
    assert any(s.branch_end for s in network.steps)
    _compare(network, plan, 3)


def test_deepnorm_residual_alpha_matches_torch() -> None:
    request = _lm(
        dict(TRANSFORMER, norm="post"), depth_policy={"name": "deepnorm", "architecture": "encoder"}
    )
    network, plan = _setup(request)
    alphas = [m for m in plan.multipliers if m["name"] == "residual_alpha"]
    assert alphas and alphas[0]["value"] > 1
    sim = _compare(network, plan, 3)
    assert sim.weights is not None
    assert sim.weights.skip_scale(alphas[0]["applies_to"][0]) == alphas[0]["value"]


def test_branch_gates_multiply_the_branch_output() -> None:
    layers = [
        _dense("in", 12, 12, "relu"),
        _dense("r.a", 12, 12, "relu", branch="r"),
        _dense("r.b", 12, 12, "linear", branch="r", role="residual_out"),
        _dense("out", 12, 2, "linear", role="output"),
    ]
    network, plan = _setup({"seed": 9, "layers": layers, "depth_policy": {"name": "skip_gate"}})
    gate = plan.tensor("r.gate")
    # the policy starts the gate at 0; a trained gate is what makes the product visible
    half = dataclasses.replace(gate, scale=0.5, value=0.5)
    plan = dataclasses.replace(
        plan, tensors=tuple(half if t.tensor == "r.gate" else t for t in plan.tensors)
    )
    sim = _compare(network, plan, 8)
    record = sim.records[2]
    assert record.branch_end and record.branch_output_std is not None
    assert record.branch_output_std > 0


def test_fixup_offsets_and_zero_layers_match_torch() -> None:
    layers = [
        {
            "name": "stem",
            "kind": "conv",
            "channels_in": 3,
            "channels_out": 8,
            "kernel": [3, 3],
            "activation": "relu",
        },
        {
            "name": "res",
            "kind": "residual_conv_block",
            "channels": 8,
            "kernel": [3, 3],
            "repeat": 2,
        },
        {
            "name": "cls",
            "kind": "conv",
            "channels_in": 8,
            "channels_out": 4,
            "kernel": [1, 1],
            "role": "output",
        },
    ]
    network, plan = _setup({"seed": 3, "layers": layers, "depth_policy": {"name": "fixup"}})
    assert any(t.tensor.endswith(".offset") for t in plan.tensors)
    sim = _compare(network, plan, 4)
    assert sim.records[-1].zero_weights  # Fixup's classifier starts at zero


# --- mean field -----------------------------------------------------------------------------


def test_wide_tanh_network_approaches_the_length_fixed_point() -> None:
    integrate = require_oracle("scipy.integrate")
    optimize = require_oracle("scipy.optimize")
    sw2, bias, width, depth = 1.5, 0.2, 512, 16
    layers = [
        _dense(
            f"t{i}",
            width,
            width,
            "tanh",
            init={"method": "lecun", "distribution": "normal", "gain": math.sqrt(sw2)},
            bias_init={"method": "constant", "value": bias},
        )
        for i in range(depth)
    ]
    network, plan = _setup({"seed": 21, "dtype": "float64", "layers": layers})
    sim = simulate(network, plan, 64, keep_arrays=True)

    def length(q: float) -> float:
        def f(z: float) -> float:
            return float(
                math.tanh(math.sqrt(q) * z) ** 2 * math.exp(-z * z / 2) / math.sqrt(2 * math.pi)
            )

        return sw2 * integrate.quad(f, -40, 40, limit=200)[0] + bias * bias

    q_star = optimize.brentq(lambda q: length(q) - q, 1e-6, 10.0)
    # pre-activation second moment of the last layer: sigma_w^2 E[x^2] of its input + b^2
    previous = sim.outputs[-2]
    measured = sw2 * float(np.mean(previous**2)) + bias * bias
    # finite width (Hanin & Rolnick 2018) and a finite batch leave a few percent
    assert measured == pytest.approx(q_star, rel=0.05)
