"""safetensors walks its tensors twice (digests first); small tensors are generated once."""

from __future__ import annotations

import hashlib
from collections.abc import Iterator

from seedbed.core.plan import build_plan
from seedbed.formats import encode_body
from seedbed.web.documents import response_document
from seedbed.web.weights_response import _held_once, _HoldBudget, encode_weights, outgoing_tensors


def _counting(pieces: list[bytes]) -> tuple[list[int], object]:
    calls = [0]

    def produce() -> Iterator[bytes]:
        calls[0] += 1
        yield from pieces

    return calls, produce


def test_first_walk_is_replayed_once_then_regenerated() -> None:
    calls, produce = _counting([b"ab", b"cd"])
    budget = _HoldBudget(10)
    chunks = _held_once(produce, 4, budget)  # type: ignore[arg-type]
    assert b"".join(chunks()) == b"abcd" and budget.left == 6
    assert b"".join(chunks()) == b"abcd" and calls[0] == 1 and budget.left == 10
    assert b"".join(chunks()) == b"abcd" and calls[0] == 2  # a third walk generates anew


def test_tensor_over_budget_is_generated_each_walk() -> None:
    calls, produce = _counting([b"xyz"])
    chunks = _held_once(produce, 3, _HoldBudget(2))  # type: ignore[arg-type]
    assert b"".join(chunks()) + b"".join(chunks()) == b"xyzxyz"
    assert calls[0] == 2


def test_held_body_equals_the_body_generated_twice() -> None:
    plan = build_plan(
        {
            "seed": "hold",
            "layers": [
                {"name": "a", "kind": "dense", "n_in": 300, "n_out": 200, "activation": "relu"},
                {
                    "name": "b",
                    "kind": "conv",
                    "channels_in": 8,
                    "channels_out": 16,
                    "kernel": [3, 3],
                },
            ],
        }
    )
    held = b"".join(encode_weights(plan, None, "safetensors", 4096, 1).body)
    plain_tensors = outgoing_tensors(plan, None, 4096, 1)
    plain = b"".join(encode_body("safetensors", response_document(plan, None), plain_tensors).body)
    assert hashlib.sha256(held).digest() == hashlib.sha256(plain).digest()
