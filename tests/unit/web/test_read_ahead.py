"""Reading ahead changes when pieces are ready, never the bytes, and stops when the reader
leaves."""

from __future__ import annotations

import hashlib
import threading
from collections.abc import Iterator

import pytest

from seedbed.core.plan import build_plan
from seedbed.core.render import iter_tensor_bytes
from seedbed.web.read_ahead import read_ahead

REQUEST = {
    "seed": "estuary-9",
    "layers": [{"name": "pump", "kind": "dense", "n_in": 300, "n_out": 700, "activation": "tanh"}],
}


def _pieces() -> Iterator[bytes]:
    plan = build_plan(REQUEST)
    return iter_tensor_bytes(plan, plan.tensors[0], chunk_bytes=16384, threads=2)


def test_same_pieces_in_the_same_order() -> None:
    direct = list(_pieces())
    ahead = list(read_ahead(_pieces, depth=2)())
    assert len(direct) > 10
    assert ahead == direct
    assert hashlib.sha256(b"".join(ahead)).digest() == hashlib.sha256(b"".join(direct)).digest()


def test_a_failure_reaches_the_reader() -> None:
    def broken() -> Iterator[bytes]:
        yield b"first"
        raise ValueError("the producer broke")

    got = read_ahead(broken)()
    assert next(got) == b"first"
    with pytest.raises(ValueError, match="producer broke"):
        next(got)


def test_a_reader_that_leaves_stops_the_producer() -> None:
    produced = []
    finished = threading.Event()

    def endless() -> Iterator[bytes]:
        try:
            for piece in _pieces():
                produced.append(piece)
                yield piece
        finally:
            finished.set()

    reader = read_ahead(endless, depth=1)()
    next(reader)
    reader.close()  # what a dropped connection does to the response body
    assert finished.wait(5)
    assert len(produced) <= 3  # one read, one queued, at most one in hand
