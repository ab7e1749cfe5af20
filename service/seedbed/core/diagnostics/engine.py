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

Per layer (`LayerRecord`), for its output y (after its activation; for the last layer of a
residual branch, the stream after the residual sum, whose own branch output std is given too):
std and mean over every value, the std of dL/dy, dead and saturated units (see unit_stats),
and twin units (see twins).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import numpy.typing as npt

from seedbed.core.diagnostics.network import Network, Step
from seedbed.core.diagnostics.ops import BACKWARD, FORWARD
from seedbed.core.diagnostics.twins import (
    TwinSummary,
    incoming_rows,
    locked_groups,
    summarise,
    twin_groups,
)
from seedbed.core.diagnostics.unit_stats import activate, activation_backward
from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.render import render_rows

FloatArray = npt.NDArray[np.float64]

_RECENT = 6  # float64 copies kept by WeightStore
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
        self._by_name: dict[str, TensorPlan] = {t.tensor: t for t in plan.tensors}
        self._values: dict[str, np.ndarray] = {}
        self._threads = threads
        # float64 copies of the most recently read float32 tensors: a layer reads its weight
        # in the forward pass and for twin detection, one conversion serves both
        self._recent: dict[str, FloatArray] = {}

    def has(self, name: str) -> bool:
        return name in self._by_name

    def __call__(self, name: str) -> FloatArray | None:
        t = self._by_name.get(name)
        if t is None:
            return None
        stored = self._values.get(name)
        if stored is None:
            served = render_rows(self._plan, t, threads=self._threads)
            keep = np.float64 if t.dtype == "float64" else np.float32  # both exact
            logical = np.transpose(np.asarray(served, dtype=keep),
                                   tuple(int(a) for a in np.argsort(t.served_axes)))
            stored = np.ascontiguousarray(logical)
            self._values[name] = stored
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
        values = store(f"{branch}.{part}")
        if values is not None:
            m *= float(values.reshape(-1)[0])
    return m


def synthetic_inputs(network: Network, batch: int,
                     rng: np.random.Generator) -> np.ndarray:
    if network.vocab is not None:
        return rng.integers(0, network.vocab, size=(batch, *network.input_grid))
    return rng.standard_normal((batch, *network.input_grid, network.input_features))


def simulate(network: Network, plan: Plan, batch: int, *, keep_arrays: bool = False,
             threads: int = 1) -> Simulation:
    """Run the synthetic batch forward and the loss gradient back (see module doc)."""
    store = WeightStore(plan, threads)
    rng = np.random.default_rng(INPUT_SEED)
    x: Any = synthetic_inputs(network, batch, rng)
    sim = Simulation(records=[], batch=batch, grid=network.input_grid)
    if keep_arrays:
        sim.inputs = x
        sim.weights = store
    saved: list[tuple[Any, Any, float, list[npt.NDArray[np.int64]]]] = []
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


def _forward_step(step: Step, x: Any, skip: FloatArray | None, store: WeightStore
                  ) -> tuple[FloatArray, tuple[Any, Any, float, list[npt.NDArray[np.int64]]],
                             LayerRecord]:
    pre, cache = FORWARD[step.kind](step, x, store)
    act = activate(step.activation, step.activation_param, pre)
    del pre
    rows = incoming_rows(step, store)
    groups = twin_groups(rows) if rows is not None else []
    zero = rows is not None and step.kind != "embedding" and not np.any(rows[0])
    del rows
    own = act.post
    record = LayerRecord(
        layer=step.name, index=step.index, kind=step.kind, activation=step.activation,
        role=step.role, branch=step.branch, branch_end=step.branch_end,
        main_path=step.on_main_path, units=step.out_features,
        dead_fraction=float(np.mean(act.dead)) if act.dead.size else 0.0,
        saturated_fraction=act.saturated, zero_weights=zero,
    )
    m = 1.0
    if step.branch_end and step.branch is not None:
        assert skip is not None
        m = _multiplier(store, step.branch)
        record.branch_output_std = _finite(_std(own))
        out = skip + m * own if m != 1.0 else skip + own
    else:
        out = own
    std, mean = _std(out), _mean(out)
    record.activation_std, record.activation_mean = _finite(std), _finite(mean)
    record.non_finite = not (np.isfinite(std) and np.isfinite(mean))
    return out, (cache, act.slope, m, groups), record


def _backward(network: Network, saved: list[tuple[Any, Any, float, list[Any]]],
              sim: Simulation, store: Callable[[str], FloatArray | None],
              projection: FloatArray, keep_arrays: bool) -> None:
    g: FloatArray = projection
    pending: list[FloatArray] = []
    grads: list[FloatArray] = []
    for pos in range(len(network.steps) - 1, -1, -1):
        step = network.steps[pos]
        cache, slope, m, groups = saved[pos]
        record = sim.records[pos]
        std = _std(g)
        record.gradient_std = _finite(std)
        record.non_finite = record.non_finite or not np.isfinite(std)
        if keep_arrays:
            grads.append(g)
        if step.branch_end:
            pending.append(g)
            g_own = g * m if m != 1.0 else g
        else:
            g_own = g
        locked = locked_groups(groups, g_own) if groups else []
        record.twins = summarise(step.out_features, groups, locked)
        d_pre = activation_backward(step.activation, slope, g_own)
        saved[pos] = (None, None, m, [])  # free the layer's cache as soon as it is used
        if step.kind == "embedding":
            break
        g = BACKWARD[step.kind](step, d_pre, cache, store)
        if step.branch_start:
            g = g + pending.pop()
    if keep_arrays:
        sim.gradients = grads[::-1]


__all__ = ["INPUT_SEED", "LayerRecord", "Simulation", "WeightStore", "simulate",
           "synthetic_inputs"]
