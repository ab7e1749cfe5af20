"""The simulation: a seeded synthetic batch forward through the planned weights, then back.

Inputs: standard normal values of shape (batch, *grid, features) from numpy's PCG64 generator
with the fixed seed `INPUT_SEED` (token ids uniform over the vocabulary when the first layer is
an embedding). They only need to be repeatable, not bit-reproducible across numpy versions, so
numpy's own Generator is used rather than the weight streams.

Loss: L = sum(P * y) over the network's final output y, with P a fixed standard normal array
from the same generator. Its gradient with respect to y is P itself, so the backward pass
starts from unit-variance gradients whatever the output looks like; the gradient of each layer
is then what that start becomes on its way back.

Weights: each tensor exactly as served in the request's dtype (seedbed.core.render), held in
logical (out_in) order; float16/bfloat16/float32 values are kept as float32 (exact) and every
computation runs in float64.

What a depth policy adds is applied the way the plan tells the model to apply it: a branch's
output is multiplied by its 1-element "<branch>.gate" and "<branch>.multiplier" tensors, its
input by the plan multiplier "residual_alpha" (DeepNorm: alpha * x + branch(x)); Fixup's
scalar "<layer>.offset" is added to a layer's input and "<layer>.activation_offset" before its
activation (both 0 at the start); "attention_logit_scale" multiplies an attention layer's
logit scale. Learning-rate multipliers do not matter at initialisation.

Per layer (`LayerRecord`), for its output y (after its activation; for the last layer of a
residual branch, the stream after the residual sum, whose own branch output std is given too):
std and mean over every value, the std of dL/dy, dead and saturated units (see unit_stats),
and twin units (see twins).
"""

from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from seedbed.core.diagnostics.budget import tensors_read
from seedbed.core.diagnostics.network import Network, Step
from seedbed.core.diagnostics.ops import BACKWARD, FORWARD
from seedbed.core.diagnostics.twin_groups import (
    TwinSummary,
    incoming_rows,
    locked_groups,
    outgoing_rows,
    same_rows,
    summarise,
    twin_groups,
)
from seedbed.core.diagnostics.unit_stats import activate, activation_backward
from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.render import render_rows

FloatArray = npt.NDArray[np.float64]

_RECENT = 6  # float64 copies kept by WeightStore
# A tensor this large is rendered on all of a store's threads by itself.
_ALONE_VALUES = 1 << 22
INPUT_SEED = 20260917  # the synthetic batch and the loss projection; any fixed value would do


def _finite(value: float) -> float | None:
    return value if np.isfinite(value) else None


def _std(a: FloatArray) -> float:
    with np.errstate(all="ignore"):
        return float(np.std(a))


def _mean(a: FloatArray) -> float:
    with np.errstate(all="ignore"):
        return float(np.mean(a))


class WeightStore:
    """Rendered tensors of one plan in logical order, rendered once and read as float64."""

    def __init__(self, plan: Plan, threads: int = 1) -> None:
        self._plan = plan
        self._logit: dict[str, float] = {}
        self._skip: dict[str, float] = {}
        for entry in plan.multipliers:
            target = {"attention_logit_scale": self._logit, "residual_alpha": self._skip}.get(
                str(entry.get("name"))
            )
            if target is not None:
                for name in entry.get("applies_to", ()):
                    target[str(name)] = float(entry["value"])
        self._by_name: dict[str, TensorPlan] = {t.tensor: t for t in plan.tensors}
        self._values: dict[str, np.ndarray] = {}
        self._threads = threads
        # float64 copies of the most recently read float32 tensors: a layer reads its weight
        # in the forward pass and for twin detection, one conversion serves both
        self._recent: dict[str, FloatArray] = {}

    def render(self, tensors: list[TensorPlan]) -> None:
        """Render `tensors` now. The run keeps every tensor it reads until it ends anyway (the
        budget counts them all); rendering them before the first matrix product keeps
        generation from sharing the cores with BLAS. Large tensors take the store's threads one
        at a time; the others render side by side, a thread each (less hand-off per value)."""
        large = [t for t in tensors if t.count >= _ALONE_VALUES]
        small = [t for t in tensors if t.count < _ALONE_VALUES]
        for t in large:
            self._stored(t, self._threads)
        if self._threads > 1 and len(small) > 1:
            with ThreadPoolExecutor(self._threads, thread_name_prefix="seedbed-render") as pool:
                for _ in pool.map(lambda t: self._stored(t, 1), small):
                    pass
        else:
            for t in small:
                self._stored(t, self._threads)

    def _stored(self, t: TensorPlan, threads: int | None = None) -> np.ndarray:
        stored = self._values.get(t.tensor)
        if stored is None:
            served = render_rows(
                self._plan, t, threads=self._threads if threads is None else threads
            )
            keep = np.float64 if t.dtype == "float64" else np.float32  # both exact
            logical = np.transpose(
                np.asarray(served, dtype=keep), tuple(int(a) for a in np.argsort(t.served_axes))
            )
            stored = np.ascontiguousarray(logical)
            self._values[t.tensor] = stored
        return stored

    def logit_scale(self, layer: str) -> float:
        """The plan's factor on attention layer `layer`'s logit scale (1 when none)."""
        return self._logit.get(layer, 1.0)

    def skip_scale(self, branch: str) -> float:
        """The plan's factor on the residual input of `branch` (DeepNorm's alpha; 1 when none)."""
        return self._skip.get(branch, 1.0)

    def scalar(self, name: str) -> float | None:
        values = self(name)
        return None if values is None else float(values.reshape(-1)[0])

    def __call__(self, name: str) -> FloatArray | None:
        t = self._by_name.get(name)
        if t is None:
            return None
        stored = self._stored(t)
        if stored.dtype == np.float64:
            return stored
        wide = self._recent.get(name)
        if wide is None:
            wide = stored.astype(np.float64)
            if len(self._recent) >= _RECENT:
                self._recent.pop(next(iter(self._recent)))
            self._recent[name] = wide
        return wide


@dataclass
class LayerRecord:
    layer: str
    index: int
    kind: str
    activation: str
    role: str
    branch: str | None
    branch_end: bool
    main_path: bool
    units: int
    activation_std: float | None = None
    activation_mean: float | None = None
    branch_output_std: float | None = None
    gradient_std: float | None = None
    dead_fraction: float | None = None
    saturated_fraction: float | None = None
    twins: TwinSummary | None = None
    non_finite: bool = False
    # every weight that determines the units is exactly 0 (e.g. Fixup's classifier): the
    # output is constant and no gradient passes below it until the first update
    zero_weights: bool = False


@dataclass
class Simulation:
    records: list[LayerRecord]
    batch: int
    grid: tuple[int, ...]
    # only with keep_arrays=True (tests): the network input, every layer's output (after the
    # residual sum for branch ends), the gradient of the loss with respect to each, the loss
    # projection, and the weights used
    inputs: np.ndarray | None = None
    outputs: list[FloatArray] = field(default_factory=list)
    gradients: list[FloatArray] = field(default_factory=list)
    projection: FloatArray | None = None
    weights: WeightStore | None = None


def _multiplier(store: WeightStore, branch: str) -> float:
    """Product of the branch's 1-element gate and multiplier tensors (1 when absent)."""
    m = 1.0
    for part in ("gate", "multiplier"):
        value = store.scalar(f"{branch}.{part}")
        if value is not None:
            m *= value
    return m


def synthetic_inputs(network: Network, batch: int, rng: np.random.Generator) -> np.ndarray:
    if network.vocab is not None:
        return rng.integers(0, network.vocab, size=(batch, *network.input_grid))
    return rng.standard_normal((batch, *network.input_grid, network.input_features))


def simulate(
    network: Network, plan: Plan, batch: int, *, keep_arrays: bool = False, threads: int = 1
) -> Simulation:
    """Run the synthetic batch forward and the loss gradient back (see module doc)."""
    store = WeightStore(plan, threads)
    store.render(tensors_read(network, plan))
    rng = np.random.default_rng(INPUT_SEED)
    x: Any = synthetic_inputs(network, batch, rng)
    sim = Simulation(records=[], batch=batch, grid=network.input_grid)
    if keep_arrays:
        sim.inputs = x
        sim.weights = store
    saved: list[_Saved] = []
    skip: FloatArray | None = None
    with np.errstate(all="ignore"):
        for step in network.steps:
            if step.branch_start:
                skip = x
            x, entry, record = _forward_step(step, x, skip, store)
            saved.append(entry)
            sim.records.append(record)
            if keep_arrays:
                sim.outputs.append(x)
        projection = rng.standard_normal(np.shape(x))
        sim.projection = projection if keep_arrays else None
        _backward(network, saved, sim, store, projection, keep_arrays)
    return sim


@dataclass
class _Saved:
    """What the backward pass needs from one layer's forward pass."""

    cache: Any
    slope: Any
    branch_scale: float  # gate * multiplier on the branch output (branch ends)
    skip_scale: float  # factor on the branch input in the residual sum (branch ends)
    groups: list[npt.NDArray[np.int64]]


def _forward_step(
    step: Step, x: Any, skip: FloatArray | None, store: WeightStore
) -> tuple[FloatArray, _Saved, LayerRecord]:
    offset = store.scalar(f"{step.name}.offset")  # Fixup's scalar before the layer (0 at start)
    if offset is not None and step.kind != "embedding":
        x = x + offset
    pre, cache = FORWARD[step.kind](step, x, store)
    offset = store.scalar(f"{step.name}.activation_offset")  # Fixup, before the activation
    if offset is not None:
        pre = pre + offset
    act = activate(step.activation, step.activation_param, pre)
    del pre
    rows = incoming_rows(step, store)
    groups = twin_groups(rows) if rows is not None else []
    zero = rows is not None and step.kind != "embedding" and not np.any(rows[0])
    del rows
    own = act.post
    record = LayerRecord(
        layer=step.name,
        index=step.index,
        kind=step.kind,
        activation=step.activation,
        role=step.role,
        branch=step.branch,
        branch_end=step.branch_end,
        main_path=step.on_main_path,
        units=step.out_features,
        dead_fraction=float(np.mean(act.dead)) if act.dead.size else 0.0,
        saturated_fraction=act.saturated,
        zero_weights=zero,
    )
    m = alpha = 1.0
    if step.branch_end and step.branch is not None:
        assert skip is not None
        m = _multiplier(store, step.branch)
        alpha = store.skip_scale(step.branch)
        record.branch_output_std = _finite(_std(own))
        out = (alpha * skip if alpha != 1.0 else skip) + (m * own if m != 1.0 else own)
    else:
        out = own
    std, mean = _std(out), _mean(out)
    record.activation_std, record.activation_mean = _finite(std), _finite(mean)
    record.non_finite = not (np.isfinite(std) and np.isfinite(mean))
    return out, _Saved(cache, act.slope, m, alpha, groups), record


def _locked(
    network: Network,
    pos: int,
    groups: list[npt.NDArray[np.int64]],
    grad: FloatArray,
    store: WeightStore,
) -> list[bool]:
    """Locked twin groups of step `pos` given the gradient of its own output
    (see twin_groups.py)."""
    if np.any(grad):
        return locked_groups(groups, grad)
    step = network.steps[pos]
    following = network.steps[pos + 1] if pos + 1 < len(network.steps) else None
    if step.branch_end or following is None or following.branch_start:
        return [False] * len(groups)
    blocks = outgoing_rows(following, store)
    if blocks is None:
        return [False] * len(groups)
    return [same_rows(blocks, g) for g in groups]


def _backward(
    network: Network,
    saved: list[_Saved],
    sim: Simulation,
    store: WeightStore,
    projection: FloatArray,
    keep_arrays: bool,
) -> None:
    g: FloatArray = projection
    pending: list[FloatArray] = []
    grads: list[FloatArray] = []
    for pos in range(len(network.steps) - 1, -1, -1):
        step = network.steps[pos]
        entry = saved[pos]
        m, groups = entry.branch_scale, entry.groups
        record = sim.records[pos]
        std = _std(g)
        record.gradient_std = _finite(std)
        record.non_finite = record.non_finite or not np.isfinite(std)
        if keep_arrays:
            grads.append(g)
        if step.branch_end:
            pending.append(g * entry.skip_scale if entry.skip_scale != 1.0 else g)
            g_own = g * m if m != 1.0 else g
        else:
            g_own = g
        locked = _locked(network, pos, groups, g_own, store) if groups else []
        record.twins = summarise(step.out_features, groups, locked)
        d_pre = activation_backward(step.activation, entry.slope, g_own)
        cache = entry.cache
        entry.cache = entry.slope = None  # free the layer's cache as soon as it is used
        if step.kind == "embedding":
            break
        g = BACKWARD[step.kind](step, d_pre, cache, store)
        if step.branch_start:
            g = g + pending.pop()
    if keep_arrays:
        sim.gradients = grads[::-1]


__all__ = ["INPUT_SEED", "LayerRecord", "Simulation", "WeightStore", "simulate", "synthetic_inputs"]
