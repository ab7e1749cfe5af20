"""How much a diagnosis may cost, estimated from shapes before anything is allocated.

Three figures per request, each with a limit (`DiagnosticLimits`):

* multiply-adds over all runs: the forward and backward passes of every layer (a backward
  pass costs about what its forward pass does) plus elementwise work counted in multiply-add
  equivalents (`ACTIVATION_COST`: measured ratios on one core, GELU's exact erf form is the
  slow one);
* generated weight values over all runs: every random tensor is rendered once per run (about
  1e7 values a second on one core), which dominates for wide, shallow batches;
* peak memory of one run (runs go one after another): the rendered weights (4 bytes a value,
  8 for float64 requests), what each layer keeps for its backward pass, and a few working
  copies of the widest signal.

A request over any limit is refused with HTTP 413 and the numbers, before a weight is rendered.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, fields

from seedbed.core.diagnostics.network import Network, Step
from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.request.limits import SETTING_PREFIX, raised_by
from seedbed.core.request.problems import Problem

# Elementwise cost of an activation (forward and derivative) in multiply-add equivalents.
ACTIVATION_COST: dict[str, int] = {"linear": 4, "relu": 60, "gelu": 3000}
DEFAULT_ACTIVATION_COST = 200
RANDOM_SAMPLERS = frozenset({"uniform", "normal", "truncated_normal", "orthogonal"})


# The service reads these limits from SEEDBED_DIAGNOSE_<NAME> (seedbed.settings).
DIAGNOSE_SETTING_PREFIX = SETTING_PREFIX + "DIAGNOSE_"


@dataclass(frozen=True)
class DiagnosticLimits:
    """Defaults and why:

    - max_batch = 1024 samples: statistics over more samples add nothing a user would act on.
    - max_alternatives = 8: a chart with more lines is unreadable.
    - max_multiply_adds = 2**36 (6.9e10) over all runs: about 5-10 s of one core.
    - max_generated_values = 2**27 (1.3e8) over all runs: about 10 s of one core.
    - max_memory_bytes = 2**30 (1 GiB) for the largest run.
    """

    max_batch: int = 1024
    max_alternatives: int = 8
    max_multiply_adds: int = 1 << 36
    max_generated_values: int = 1 << 27
    max_memory_bytes: int = 1 << 30

    def __post_init__(self) -> None:
        for f in fields(self):
            value = getattr(self, f.name)
            if isinstance(value, bool) or not isinstance(value, int) or value < 1:
                raise ValueError(
                    f"DiagnosticLimits.{f.name} must be a positive integer, got {value!r}"
                )


@dataclass(frozen=True)
class Cost:
    multiply_adds: int
    generated_values: int
    memory_bytes: int


def _step_work(step: Step, batch: int) -> tuple[int, int]:
    """(multiply-adds of forward + backward, bytes kept for the backward pass)."""
    lay = step.layer
    n_in = batch * math.prod(step.grid_in)
    n_out = batch * math.prod(step.grid_out)
    f_in, f_out = step.in_features, step.out_features
    kept = 0
    if step.kind == "dense":
        work = 2 * n_in * f_in * f_out
    elif step.kind == "conv":
        taps = math.prod(lay.kernel)
        full = n_out if lay.transposed else n_in  # the stride-1 grid that is computed
        work = 2 * full * (f_in // lay.groups) * f_out * taps
    elif step.kind == "attention":
        p = math.prod(step.grid_in)
        work = 8 * n_in * f_in * f_in + 6 * batch * p * p * f_in
        kept = 8 * (3 * n_in * f_in + batch * lay.heads * p * p)
    elif step.kind == "norm":
        work = 20 * n_in * f_in
        kept = 8 * (n_in * f_in + n_in)
    else:  # embedding
        work = n_out * f_out
    act = step.activation
    work += n_out * f_out * ACTIVATION_COST.get(act, DEFAULT_ACTIVATION_COST)
    kept += n_out * f_out * (0 if act == "linear" else 1 if act == "relu" else 8)
    return work, kept


def tensors_read(network: Network, plan: Plan) -> list[TensorPlan]:
    """The plan's tensors a run of `network` reads: its layers' own and its branches'."""
    names = {s.name for s in network.steps}
    branches = {s.branch for s in network.steps if s.branch is not None}
    read = []
    for t in plan.tensors:
        owner = t.layer if t.layer in names else t.tensor.rsplit(".", 1)[0]
        if owner in names or owner in branches:
            read.append(t)
    return read


def run_cost(network: Network, plan: Plan, batch: int) -> Cost:
    """The cost of one run of `network` with `plan`'s weights at `batch` samples."""
    work = 0
    generated = 0
    weight_bytes = 0
    for t in tensors_read(network, plan):
        weight_bytes += t.count * (8 if t.dtype == "float64" else 4)
        if t.sampler in RANDOM_SAMPLERS:
            generated += t.count
        if t.sampler == "orthogonal" and len(t.logical_shape) >= 2:
            rows = t.logical_shape[0] // max(t.gate_blocks, 1)
            cols = t.count // t.logical_shape[0]
            work += 2 * t.gate_blocks * rows * cols * min(rows, cols)
        work += 10 * t.count  # twin detection and conversions
    kept_total = 0
    widest = batch * network.input_features * math.prod(network.input_grid)
    for step in network.steps:
        w, kept = _step_work(step, batch)
        work += w
        kept_total += kept
        widest = max(
            widest,
            batch * step.out_features * math.prod(step.grid_out),
            batch * step.in_features * math.prod(step.grid_out),
        )
    memory = weight_bytes + kept_total + 6 * 8 * widest
    return Cost(work, generated, memory)


def cost_problems(costs: list[Cost], batch: int, limits: DiagnosticLimits) -> list[Problem]:
    """413-style problems for a list of run costs (one per run), with the numbers."""
    problems: list[Problem] = []
    runs = len(costs)
    work = sum(c.multiply_adds for c in costs)
    generated = sum(c.generated_values for c in costs)
    memory = max(c.memory_bytes for c in costs)
    if work > limits.max_multiply_adds:
        fit = max(1, int(batch * limits.max_multiply_adds / work))
        problems.append(
            Problem(
                "batch",
                "too_large",
                f"these diagnostics would take about {work:.3g} multiply-adds ({runs} run(s) at "
                f"batch {batch}); the limit is {limits.max_multiply_adds} "
                f"({limits.max_multiply_adds:.3g}); try a batch of at most about {fit}, fewer "
                "alternatives or a smaller network"
                f"{raised_by('max_multiply_adds', DIAGNOSE_SETTING_PREFIX)}",
            )
        )
    if generated > limits.max_generated_values:
        problems.append(
            Problem(
                "alternatives",
                "too_large",
                f"these diagnostics would generate {generated} random weight values ({runs} run(s) "
                f"of the whole network); the limit is {limits.max_generated_values}; use fewer "
                "alternatives or a smaller network"
                f"{raised_by('max_generated_values', DIAGNOSE_SETTING_PREFIX)}",
            )
        )
    if memory > limits.max_memory_bytes:
        problems.append(
            Problem(
                "batch",
                "too_large",
                f"one run would need about {memory} bytes of memory (weights and the values kept "
                f"for the backward pass at batch {batch}); the limit is {limits.max_memory_bytes} "
                "bytes; use a smaller batch or a smaller network"
                f"{raised_by('max_memory_bytes', DIAGNOSE_SETTING_PREFIX)}",
            )
        )
    return problems


__all__ = ["ACTIVATION_COST", "Cost", "DiagnosticLimits", "cost_problems", "run_cost"]
