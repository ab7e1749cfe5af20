"""From a plan (and an optional block selection) to an encoded response body.

This is the seam between the core, which produces a tensor's bytes on demand, and the format
writers, which arrange them in a container. Nothing here holds a whole tensor, with one bounded
exception: safetensors needs every digest in its header, so its body walks the tensors twice
(a hashing pass, then the data). Tensors that fit a per-response budget
(`HOLD_BUDGET_BYTES`) keep the bytes of the first walk for the second instead of being
generated again; larger ones are generated twice, so memory stays bounded.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator
from dataclasses import dataclass

from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.render import block_shape, iter_tensor_bytes
from seedbed.formats import EncodedBody, OutgoingTensor, encode_body, json_size
from seedbed.web.documents import block_entry, response_document
from seedbed.web.read_ahead import read_ahead

# Bytes a safetensors response may hold between its hashing pass and its data pass. One 4096 x
# 4096 float32 tensor fits; a 1 GiB response still raises memory by less than the 128 MiB the
# service promises.
HOLD_BUDGET_BYTES = 64 << 20


class _HoldBudget:
    def __init__(self, total: int) -> None:
        self.left = total

    def take(self, nbytes: int) -> bool:
        if nbytes > self.left:
            return False
        self.left -= nbytes
        return True


def _held_once(produce: Callable[[], Iterator[bytes]], nbytes: int,
               budget: _HoldBudget) -> Callable[[], Iterator[bytes]]:
    """chunks() for a tensor walked twice: the first walk keeps its pieces (if the budget
    allows) and the second replays and releases them; any further walk generates anew."""
    held: list[bytes] | None = None
    walks = 0

    def chunks() -> Iterator[bytes]:
        nonlocal held, walks
        walks += 1
        if walks == 1 and budget.take(nbytes):
            kept: list[bytes] = []
            for piece in produce():
                kept.append(piece)
                yield piece
            held = kept
            return
        if held is not None:
            replay, held = held, None
            budget.left += nbytes
            yield from replay
            return
        yield from produce()

    return chunks


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
    plan: Plan, selection: Selection | None, chunk_bytes: int, threads: int,
    hold: _HoldBudget | None = None,
) -> list[OutgoingTensor]:
    def producer(t: TensorPlan, start: int, stop: int | None) -> OutgoingTensor:
        def generate() -> Iterator[bytes]:
            return iter_tensor_bytes(plan, t, start, stop, chunk_bytes=chunk_bytes, threads=threads)

        if stop is None:
            shape, entry = t.shape, t.manifest()
        else:
            shape = tuple(block_shape(t, start, stop))
            entry = block_entry(t, shape, start, stop)
        nbytes = math.prod(shape) * t.itemsize
        # Tensors of several pieces generate the next piece while this one is hashed and sent.
        source = read_ahead(generate) if nbytes >= 2 * chunk_bytes else generate
        chunks = source if hold is None else _held_once(source, nbytes, hold)
        return OutgoingTensor(
            name=t.tensor,
            dtype=t.dtype,
            shape=shape,
            nbytes=nbytes,
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
    hold = _HoldBudget(HOLD_BUDGET_BYTES) if fmt == "safetensors" else None
    tensors = outgoing_tensors(plan, selection, chunk_bytes, threads, hold)
    doc = response_document(plan, None if selection is None else selection.describe())
    # Without digests, safetensors runs its hashing pass lazily, at the body's first step
    # (in the threadpool, after the headers went out).
    return encode_body(fmt, doc, tensors)
