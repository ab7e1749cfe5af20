"""Comparing an uploaded tensor with the plan of the request that describes the network.

The plan (seedbed.core.plan.build_plan) says, per tensor, the served shape, the recommended
method and the std of the recommended distribution. Every recommended random distribution has
zero mean, so its std is also its root mean square; the ratio reported here divides the
tensor's root mean square (sqrt(mean^2 + std^2)) by it, so a shifted mean counts as scale too.

Ratio bands: within [0.8, 1.25] nothing is said; within [0.5, 2] a note; outside a warning,
because every layer multiplies the forward signal's scale by about its ratio and the factors
compound with depth (ratio^L after L such layers).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from seedbed.core.audit.findings import Finding
from seedbed.core.audit.stats import ValueStats
from seedbed.core.audit.stored import StoredTensor
from seedbed.core.plan_types import Plan, TensorPlan

QUIET_BAND = (0.8, 1.25)
NOTE_BAND = (0.5, 2.0)


def logical_units(values: np.ndarray, t: TensorPlan) -> np.ndarray:
    """The tensor as units x incoming values, units along the plan's output axis."""
    inverse = tuple(int(i) for i in np.argsort(t.served_axes))
    logical = values.transpose(inverse)
    return logical.reshape(logical.shape[0], -1)


def shape_finding(stored: StoredTensor, t: TensorPlan, layout: str) -> Finding | None:
    if stored.shape == t.shape:
        return None
    other = "in_out" if layout == "out_in" else "out_in"
    other_shape = _in_out_shape(t) if layout == "out_in" else t.logical_shape
    hint = (
        (
            f"; that is the {other} arrangement of this tensor, so the request's layout "
            f"({layout}) does not match the file"
        )
        if stored.shape == other_shape
        else ""
    )
    return Finding(
        stored.name,
        "error",
        "shape_mismatch",
        f"the file has shape {list(stored.shape)}; the request describes "
        f"{list(t.shape)}{hint}. Values were not compared with the plan",
    )


def _in_out_shape(t: TensorPlan) -> tuple[int, ...]:
    # From the logical (out_in) shape: 2-D and recurrent/attention transpose; conv puts the
    # kernel first, then in, then out (seedbed.core.tensors).
    logical = t.logical_shape
    if len(logical) < 2:
        return logical
    if t.layer_kind == "embedding":
        return logical
    if len(logical) == 2:
        return (logical[1], logical[0])
    return (*logical[2:], logical[1], logical[0])


def _planned_constants(t: TensorPlan) -> tuple[float, ...]:
    if t.block_values is not None:
        return t.block_values
    return (t.value if t.value is not None else t.scale,)


def _constant_check(stored: StoredTensor, values: np.ndarray, t: TensorPlan) -> Finding | None:
    wanted = _planned_constants(t)
    units = logical_units(values, t)
    blocks = np.array_split(units, len(wanted), axis=0)
    for b, (block, v) in enumerate(zip(blocks, wanted, strict=True)):
        # The planned value as the stored dtype holds it: 0.1 in float16 is not 0.1.
        target = np.asarray(v, dtype=np.float64).astype(values.dtype)
        if not np.array_equal(block, np.broadcast_to(target, block.shape)):
            where = f" in gate block {b}" if len(wanted) > 1 else ""
            return Finding(
                stored.name,
                "warning",
                "not_as_planned",
                f"the plan sets every value{where} to {v:g} ({t.method}); the file "
                "holds other values there",
            )
    return None


def _ratio_finding(name: str, ratio: float, observed: float, t: TensorPlan) -> Finding | None:
    if QUIET_BAND[0] <= ratio <= QUIET_BAND[1]:
        return None
    why = f"{t.method}" + (f", fan-in {t.fan_in}" if t.fan_in is not None else "")
    base = (
        f"root mean square {observed:.4g} is {ratio:.3g} times the recommended std "
        f"{t.std:.4g} ({why})"
    )
    if NOTE_BAND[0] <= ratio <= NOTE_BAND[1]:
        return Finding(name, "note", "scale_off", base + "; within a factor of 2")
    if ratio > 1:
        return Finding(
            name,
            "warning",
            "scale_too_large",
            base + f": each such layer multiplies the signal's scale by about "
            f"{ratio:.3g}, and over depth the factors compound, so activations "
            "and gradients grow (explode)",
        )
    return Finding(
        name,
        "warning",
        "scale_too_small",
        base + f": each such layer multiplies the signal's scale by about "
        f"{ratio:.3g}, and over depth the factors compound, so activations and "
        "gradients shrink (vanish)",
    )


def compare_with_plan(
    stored: StoredTensor, values: np.ndarray | None, stats: ValueStats | None, t: TensorPlan
) -> tuple[dict[str, Any], list[Finding]]:
    """The `planned` entry of a tensor's report and the findings of the comparison."""
    entry: dict[str, Any] = {
        "layer": t.layer,
        "method": t.method,
        "distribution": t.distribution,
        "dtype": t.dtype,
        "shape": list(t.shape),
        "recommended_std": t.std,
        "constant": None if t.sampler != "constant" else list(_planned_constants(t)),
        "observed_rms": None,
        "ratio": None,
    }
    findings: list[Finding] = []
    if stored.dtype != t.dtype:
        findings.append(
            Finding(
                stored.name,
                "note",
                "dtype_mismatch",
                f"stored as {stored.dtype}; the request says {t.dtype}",
            )
        )
    if values is None or stats is None or stats.mean is None or stats.std is None:
        return entry, findings
    rms = math.sqrt(stats.mean**2 + stats.std**2)
    entry["observed_rms"] = rms
    if t.sampler == "constant":
        found = _constant_check(stored, values, t)
        if found:
            findings.append(found)
        return entry, findings
    if t.std is None or t.std <= 0:
        return entry, findings
    ratio = rms / t.std
    entry["ratio"] = ratio
    if not stats.all_constant:  # a constant tensor already has its own, stronger finding
        found = _ratio_finding(stored.name, ratio, rms, t)
        if found:
            findings.append(found)
    return entry, findings


def plan_coverage(plan: Plan, names: list[str]) -> list[Finding]:
    """Tensors the request describes that the file lacks, and the reverse."""
    present = set(names)
    planned = {t.tensor for t in plan.tensors}
    out = [
        Finding(
            t.tensor,
            "warning",
            "missing_tensor",
            f"the request describes {t.tensor} ({list(t.shape)}, {t.method}); the file "
            "has no tensor of that name",
        )
        for t in plan.tensors
        if t.tensor not in present
    ]
    out += [
        Finding(
            n,
            "note",
            "not_in_request",
            "the request does not describe this tensor, so it has no recommended scale",
        )
        for n in names
        if n not in planned
    ]
    return out
