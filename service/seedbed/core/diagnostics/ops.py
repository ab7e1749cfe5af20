"""Forward and backward passes of each layer kind on the synthetic signal, in float64.

The signal is (batch, *grid, features). Each `forward` returns the layer's output before its
activation and whatever its `backward` needs; `backward` maps the gradient of that output to
the gradient of the layer's input. Weights are in logical order (output axis first).

What is simulated, and how (stated because it differs from some frameworks):

* dense: y = x W^T + b at every position.
* conv: cross-correlation, y[p] = sum_o W[:, :, o] x[p + o - c] + b with c = (k - 1) // 2 per
  dim, over a periodic ("circular") grid: every output position has the full fan-in, as the
  scale rules assume. Real networks pad with zeros and lose some scale at the borders; on the
  small simulated grid that loss would dominate, so it is left out on purpose. Groups split the
  channels into independent blocks. Stride s: the stride-1 result at every s-th position.
  Transposed (stride s): the input is spread onto a grid s times larger (zeros between) and
  correlated with the kernel mirrored, i.e. y[i*s + o - c] += W[:, :, o] x[i], the adjoint of a
  strided conv.
* attention: bidirectional self-attention over all positions (no mask, no dropout); q, k, v
  projections split into `heads` heads of dim/heads, softmax(q k^T / sqrt(dim/heads)) v
  (scaling by 1/sqrt(head dim) is common practice; a plan multiplier "attention_logit_scale"
  for the layer multiplies it), heads concatenated, output projection.
* norm: layer normalisation over the features at each position, (x - mean)/sqrt(var + 1e-5)
  (population variance; eps 1e-5 is common practice), times scale plus shift.
* embedding: rows of the table looked up by token id.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable
from typing import Any, Protocol

import numpy as np
import numpy.typing as npt

from seedbed.core.diagnostics.network import Step

FloatArray = npt.NDArray[np.float64]


class WeightLookup(Protocol):
    """Tensor name -> logical float64 values (None when the plan has no such tensor), and the
    factor a plan's multipliers put on an attention layer's 1/sqrt(head dim) logit scale."""

    def __call__(self, name: str) -> FloatArray | None: ...

    def logit_scale(self, layer: str) -> float: ...


NORM_EPS = 1e-5


def _rows(x: FloatArray) -> FloatArray:
    return x.reshape(-1, x.shape[-1])


def _need(w: WeightLookup, name: str) -> FloatArray:
    values = w(name)
    if values is None:  # pragma: no cover - the plan always has a layer's weight tensors
        raise KeyError(f"the plan has no tensor {name!r}")
    return values


# --- dense -----------------------------------------------------------------------------------


def dense_forward(step: Step, x: FloatArray, w: WeightLookup) -> tuple[FloatArray, Any]:
    weight = _need(w, f"{step.name}.weight")
    y = _rows(x) @ weight.T
    bias = w(f"{step.name}.bias")
    if bias is not None:
        y += bias
    return y.reshape(*x.shape[:-1], weight.shape[0]), None


def dense_backward(step: Step, dy: FloatArray, cache: Any, w: WeightLookup) -> FloatArray:
    weight = _need(w, f"{step.name}.weight")
    return (_rows(dy) @ weight).reshape(*dy.shape[:-1], weight.shape[1])


# --- conv ------------------------------------------------------------------------------------


def _grouped(x: FloatArray, kernel: FloatArray, groups: int) -> FloatArray:
    """(N, c_in) times one tap (c_out, c_in/groups) -> (N, c_out), group by group."""
    if groups == 1:
        return x @ kernel.T
    n = x.shape[0]
    c_out, c_in_g = kernel.shape
    xg = x.reshape(n, groups, c_in_g).transpose(1, 0, 2)
    kg = kernel.reshape(groups, c_out // groups, c_in_g).transpose(0, 2, 1)
    return np.matmul(xg, kg).transpose(1, 0, 2).reshape(n, c_out)


def _grouped_back(dy: FloatArray, kernel: FloatArray, groups: int) -> FloatArray:
    """Adjoint of `_grouped`: (N, c_out) -> (N, c_in)."""
    if groups == 1:
        return dy @ kernel
    n = dy.shape[0]
    c_out, c_in_g = kernel.shape
    dg = dy.reshape(n, groups, c_out // groups).transpose(1, 0, 2)
    kg = kernel.reshape(groups, c_out // groups, c_in_g)
    return np.matmul(dg, kg).transpose(1, 0, 2).reshape(n, groups * c_in_g)


def _taps(kernel_shape: tuple[int, ...]) -> list[tuple[tuple[int, ...], tuple[int, ...]]]:
    """(tap index, offset from the centre) for every kernel position."""
    centre = [(k - 1) // 2 for k in kernel_shape]
    out = []
    for tap in itertools.product(*(range(k) for k in kernel_shape)):
        out.append((tap, tuple(t - c for t, c in zip(tap, centre, strict=True))))
    return out


def _tap(weight: FloatArray, tap: tuple[int, ...]) -> FloatArray:
    """The (c_out, c_in/groups) matrix of one kernel position."""
    index: tuple[Any, ...] = (slice(None), slice(None), *tap)
    result: FloatArray = weight[index]
    return result


def _correlate(u: FloatArray, weight: FloatArray, groups: int, mirror: bool) -> FloatArray:
    """Stride-1 periodic correlation of u (B, *grid, c_in) with weight (c_out, c_in/g, *k)."""
    axes = tuple(range(1, u.ndim - 1))
    grid_shape = u.shape[:-1]
    out = np.zeros((*grid_shape, weight.shape[0]), dtype=np.float64)
    flat_out = out.reshape(-1, weight.shape[0])
    for tap, offset in _taps(tuple(weight.shape[2:])):
        # roll by -offset reads u[p + offset]; the mirrored kernel reads u[p - offset]
        shift = offset if mirror else tuple(-o for o in offset)
        moved = np.roll(u, shift, axis=axes) if any(shift) else u
        flat_out += _grouped(_rows(moved), _tap(weight, tap), groups)
    return out


def _correlate_back(
    dy: FloatArray, weight: FloatArray, groups: int, mirror: bool, c_in: int
) -> FloatArray:
    axes = tuple(range(1, dy.ndim - 1))
    du = np.zeros((*dy.shape[:-1], c_in), dtype=np.float64)
    rows = _rows(dy)
    for tap, offset in _taps(tuple(weight.shape[2:])):
        part = _grouped_back(rows, _tap(weight, tap), groups)
        part = part.reshape(du.shape)
        shift = tuple(-o for o in offset) if mirror else offset
        du += np.roll(part, shift, axis=axes) if any(shift) else part
    return du


def _every(stride: tuple[int, ...]) -> tuple[slice, ...]:
    return (slice(None), *(slice(None, None, s) for s in stride), slice(None))


def conv_forward(step: Step, x: FloatArray, w: WeightLookup) -> tuple[FloatArray, Any]:
    layer = step.layer
    weight = _need(w, f"{step.name}.weight")
    stride = tuple(layer.stride or [1] * len(layer.kernel))
    if layer.transposed:
        u = np.zeros((x.shape[0], *step.grid_out, x.shape[-1]), dtype=np.float64)
        u[_every(stride)] = x
        y = _correlate(u, weight, layer.groups, mirror=True)
    else:
        y = _correlate(x, weight, layer.groups, mirror=False)[_every(stride)]
    bias = w(f"{step.name}.bias")
    if bias is not None:
        y = y + bias
    return np.ascontiguousarray(y), None


def conv_backward(step: Step, dy: FloatArray, cache: Any, w: WeightLookup) -> FloatArray:
    layer = step.layer
    weight = _need(w, f"{step.name}.weight")
    stride = tuple(layer.stride or [1] * len(layer.kernel))
    c_in = step.in_features
    if layer.transposed:
        du = _correlate_back(dy, weight, layer.groups, mirror=True, c_in=c_in)
        return np.ascontiguousarray(du[_every(stride)])
    full = np.zeros((dy.shape[0], *step.grid_in, weight.shape[0]), dtype=np.float64)
    full[_every(stride)] = dy
    return _correlate_back(full, weight, layer.groups, mirror=False, c_in=c_in)


# --- attention -------------------------------------------------------------------------------


def _softmax(s: FloatArray) -> FloatArray:
    e = np.exp(s - np.max(s, axis=-1, keepdims=True))
    return e / np.sum(e, axis=-1, keepdims=True)


def _project(x: FloatArray, w: WeightLookup, name: str) -> FloatArray:
    y = x @ _need(w, f"{name}.weight").T
    bias = w(f"{name}.bias")
    if bias is not None:
        y += bias
    return y


def attention_forward(step: Step, x: FloatArray, w: WeightLookup) -> tuple[FloatArray, Any]:
    b, d, h = x.shape[0], x.shape[-1], step.layer.heads
    p = math.prod(x.shape[1:-1])
    dh = d // h
    flat = _rows(x)

    def heads(name: str) -> FloatArray:
        y = _project(flat, w, f"{step.name}.{name}")
        return y.reshape(b, p, h, dh).transpose(0, 2, 1, 3)  # (B, H, P, dh)

    q, k, v = heads("query"), heads("key"), heads("value")
    scale = w.logit_scale(step.name) / math.sqrt(dh)
    a = _softmax(np.matmul(q, k.transpose(0, 1, 3, 2)) * scale)
    ctx = np.matmul(a, v).transpose(0, 2, 1, 3).reshape(b * p, d)
    out = _project(ctx, w, f"{step.name}.output")
    return out.reshape(x.shape), (q, k, v, a, scale)


def attention_backward(step: Step, dy: FloatArray, cache: Any, w: WeightLookup) -> FloatArray:
    q, k, v, a, scale = cache
    b, h, p, dh = q.shape
    d = h * dh
    dctx = _rows(dy) @ _need(w, f"{step.name}.output.weight")
    dctx = dctx.reshape(b, p, h, dh).transpose(0, 2, 1, 3)
    da = np.matmul(dctx, v.transpose(0, 1, 3, 2))
    dv = np.matmul(a.transpose(0, 1, 3, 2), dctx)
    ds = a * (da - np.sum(da * a, axis=-1, keepdims=True)) * scale
    dq = np.matmul(ds, k)
    dk = np.matmul(ds.transpose(0, 1, 3, 2), q)

    def back(grad: FloatArray, name: str) -> FloatArray:
        flat = grad.transpose(0, 2, 1, 3).reshape(b * p, d)
        return flat @ _need(w, f"{step.name}.{name}.weight")

    dx = back(dq, "query") + back(dk, "key") + back(dv, "value")
    return dx.reshape(dy.shape)


# --- norm ------------------------------------------------------------------------------------


def norm_forward(step: Step, x: FloatArray, w: WeightLookup) -> tuple[FloatArray, Any]:
    mean = np.mean(x, axis=-1, keepdims=True)
    centred = x - mean
    inv = 1.0 / np.sqrt(np.mean(centred * centred, axis=-1, keepdims=True) + NORM_EPS)
    xhat = centred * inv
    scale = _need(w, f"{step.name}.scale")
    y = xhat * scale
    shift = w(f"{step.name}.shift")
    if shift is not None:
        y += shift
    return y, (xhat, inv)


def norm_backward(step: Step, dy: FloatArray, cache: Any, w: WeightLookup) -> FloatArray:
    xhat, inv = cache
    g = dy * _need(w, f"{step.name}.scale")
    mean_g = np.mean(g, axis=-1, keepdims=True)
    mean_gx = np.mean(g * xhat, axis=-1, keepdims=True)
    result: FloatArray = inv * (g - mean_g - xhat * mean_gx)
    return result


# --- embedding -------------------------------------------------------------------------------


def embedding_forward(
    step: Step, ids: npt.NDArray[np.int64], w: WeightLookup
) -> tuple[FloatArray, Any]:
    table = _need(w, f"{step.name}.weight")
    return table[ids], None


Forward = Callable[[Step, Any, WeightLookup], tuple[FloatArray, Any]]
Backward = Callable[[Step, FloatArray, Any, WeightLookup], FloatArray]

FORWARD: dict[str, Forward] = {
    "dense": dense_forward,
    "conv": conv_forward,
    "attention": attention_forward,
    "norm": norm_forward,
    "embedding": embedding_forward,
}
BACKWARD: dict[str, Backward] = {
    "dense": dense_backward,
    "conv": conv_backward,
    "attention": attention_backward,
    "norm": norm_backward,
}
