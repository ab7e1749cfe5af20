"""Values for a planned tensor: whole, as a block of served rows, or as a stream of bytes.

The generation itself lives in `seedbed_client.generator.materialize`, the one implementation
shared with the client (which generates a plan's tensors locally from the same recipes); this
module adapts the service's `TensorPlan` to it and keeps the service-side signatures.
"""

from __future__ import annotations

from collections.abc import Iterator

import numpy as np

from seedbed.core.plan_types import Plan, TensorPlan
from seedbed_client.generator import materialize
from seedbed_client.generator.materialize import to_little_endian_bytes


def block_shape(t: TensorPlan, start: int, stop: int) -> tuple[int, ...]:
    """Served shape of rows [start, stop) of `t`."""
    return (stop - start, *t.shape[1:])


def render_float64(
    plan: Plan, t: TensorPlan, start: int = 0, stop: int | None = None, *, threads: int = 1
) -> np.ndarray:
    """float64 values of served rows [start, stop) before the single rounding to t.dtype."""
    return materialize.render_float64(t.recipe(plan.seed), start, stop, threads=threads)


def render_rows(
    plan: Plan, t: TensorPlan, start: int = 0, stop: int | None = None, *, threads: int = 1
) -> np.ndarray:
    """Rows [start, stop) of the served first axis, in t.dtype (ml_dtypes.bfloat16 for bfloat16)."""
    return materialize.render_rows(t.recipe(plan.seed), start, stop, threads=threads)


def iter_tensor_bytes(
    plan: Plan,
    t: TensorPlan,
    start: int = 0,
    stop: int | None = None,
    *,
    chunk_bytes: int = 8 << 20,
    threads: int = 1,
) -> Iterator[bytes]:
    """The block's raw bytes in pieces of about `chunk_bytes` (at least one served row each)."""
    return materialize.iter_tensor_bytes(
        t.recipe(plan.seed), start, stop, chunk_bytes=chunk_bytes, threads=threads
    )


__all__ = [
    "block_shape",
    "iter_tensor_bytes",
    "render_float64",
    "render_rows",
    "to_little_endian_bytes",
]
