"""Streaming keeps memory bounded by a piece, never a tensor or the whole body.

The payload repeats one pre-built 1 MiB block, so producing it allocates nothing; tracemalloc
then measures what the formats themselves hold while the body is consumed and counted.
"""

from __future__ import annotations

import tracemalloc
from collections.abc import Callable, Iterator

import pytest

from seedbed.formats import EncodedBody, OutgoingTensor, encode_body
from support.format_helpers import DEMO_DOCUMENT

BLOCK = bytes(range(256)) * 4096  # 1 MiB
PEAK_LIMIT = 64 << 20


def _repeated(name: str, blocks: int) -> OutgoingTensor:
    def chunks() -> Iterator[bytes]:
        for _ in range(blocks):
            yield BLOCK

    n = blocks * len(BLOCK)
    return OutgoingTensor(name, "float32", (n // 4,), n, {"layer": name.split(".")[0]}, chunks)


def _consume(make: Callable[[], EncodedBody]) -> tuple[int, int, int]:
    tracemalloc.start()
    try:
        encoded = make()
        total = 0
        for piece in encoded.body:
            total += len(piece)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return total, encoded.content_length, peak


@pytest.mark.slow
@pytest.mark.parametrize("fmt", ["safetensors", "npz"])
def test_one_gib_streams_through_binary_formats_in_bounded_memory(fmt: str) -> None:
    tensors = [
        _repeated("trunk.weight", 768),
        _repeated("trunk.bias", 1),
        _repeated("branch.weight", 255),
    ]  # 1 GiB in three tensors

    total, announced, peak = _consume(lambda: encode_body(fmt, DEMO_DOCUMENT, tensors))
    assert total == announced > 1 << 30
    assert peak < PEAK_LIMIT, f"{fmt}: peak {peak / 2**20:.1f} MiB"


@pytest.mark.slow
def test_json_streams_in_bounded_memory() -> None:
    # Smaller than the binary case (base64 costs about 3 s per GiB on one core), but the body
    # (~133 MiB) is still larger than the limit, so holding it would fail the check.
    tensors = [_repeated("trunk.weight", 100)]
    total, announced, peak = _consume(lambda: encode_body("json", DEMO_DOCUMENT, tensors))
    assert total == announced > PEAK_LIMIT * 2
    assert peak < PEAK_LIMIT, f"json: peak {peak / 2**20:.1f} MiB"
