"""From a plan (and an optional block selection) to an encoded response body.

This is the seam between the core, which produces a tensor's bytes on demand, and the format
writers, which arrange them in a container; nothing here holds a whole tensor.
"""

from __future__ import annotations

import math
from collections.abc import Iterator
from dataclasses import dataclass

from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.render import block_shape, iter_tensor_bytes
from seedbed.formats import EncodedBody, OutgoingTensor, encode_body, json_size
from seedbed.web.documents import block_entry, response_document


@dataclass(frozen=True)
class Selection:
    """Rows [start, stop) of one tensor's served first axis."""

    tensor: TensorPlan
    start: int
    stop: int

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(block_shape(self.tensor, self.start, self.stop))

    @property
    def count(self) -> int:
        return math.prod(self.shape)

    def describe(self) -> dict[str, object]:
        return {"tensor": self.tensor.tensor, "rows": [self.start, self.stop]}


def outgoing_tensors(
    plan: Plan, selection: Selection | None, chunk_bytes: int, threads: int
) -> list[OutgoingTensor]:
    def producer(t: TensorPlan, start: int, stop: int | None) -> OutgoingTensor:
        def chunks() -> Iterator[bytes]:
            return iter_tensor_bytes(plan, t, start, stop, chunk_bytes=chunk_bytes, threads=threads)

        if stop is None:
            shape, entry = t.shape, t.manifest()
        else:
            shape = tuple(block_shape(t, start, stop))
            entry = block_entry(t, shape, start, stop)
        return OutgoingTensor(
            name=t.tensor,
            dtype=t.dtype,
            shape=shape,
            nbytes=math.prod(shape) * t.itemsize,
            entry=entry,
            chunks=chunks,
        )

    if selection is None:
        return [producer(t, 0, None) for t in plan.tensors]
    return [producer(selection.tensor, selection.start, selection.stop)]


def json_size_of(plan: Plan, selection: Selection | None) -> int:
    """Exact size of the JSON response, computed without generating any value."""
    tensors = outgoing_tensors(plan, selection, 1 << 20, 1)
    doc = response_document(plan, None if selection is None else selection.describe())
    return int(json_size(doc, tensors))


def encode_weights(
    plan: Plan, selection: Selection | None, fmt: str, chunk_bytes: int, threads: int
) -> EncodedBody:
    tensors = outgoing_tensors(plan, selection, chunk_bytes, threads)
    doc = response_document(plan, None if selection is None else selection.describe())
    # Without digests, safetensors runs its hashing pass lazily, at the body's first step
    # (in the threadpool, after the headers went out).
    return encode_body(fmt, doc, tensors)
