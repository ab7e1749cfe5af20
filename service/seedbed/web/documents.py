"""JSON documents the service answers with (besides the weight containers)."""

from __future__ import annotations

from typing import Any

import numpy as np

from seedbed.core.plan_types import Plan, TensorPlan


def response_document(plan: Plan, selection: dict[str, Any] | None) -> dict[str, Any]:
    """Response-wide manifest fields; the numpy version is recorded because it is part of what
    the bytes were produced with (and of the ETag)."""
    doc: dict[str, Any] = {
        "algorithm": plan.algorithm,
        "numpy": np.__version__,
        "seed": plan.seed,
        "dtype": plan.dtype,
        "layout": plan.layout,
        "warnings": list(plan.warnings),
    }
    if plan.policy is not None:
        # What a depth/width policy decided, and the multipliers the training script must apply:
        # weights alone do not reproduce the policy's start without them.
        doc["depth_policy"] = plan.policy
        doc["multipliers"] = list(plan.multipliers)
    if selection is not None:
        doc["selection"] = selection
    return doc


def block_entry(t: TensorPlan, shape: tuple[int, ...], start: int, stop: int) -> dict[str, Any]:
    """A manifest entry for rows [start, stop) of `t`: `shape` is the block's, the full tensor's
    shape stays visible so nobody mistakes the block for the whole."""
    entry = t.manifest()
    entry["shape"] = list(shape)
    entry["full_shape"] = list(t.shape)
    entry["rows"] = [start, stop]
    return entry
