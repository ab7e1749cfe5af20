"""safetensors needs every digest before its first byte; tensors within the hold budget are
generated and hashed once, larger ones generated again and checked against the first digest."""

from __future__ import annotations

import hashlib
from collections.abc import Iterator

import pytest
import safetensors.numpy

from seedbed.core.plan import build_plan
from seedbed.formats import OutgoingTensor, ProducerContractError, encode_body
from seedbed.formats.safetensors_out import safetensors_body
from seedbed.web.documents import response_document
from seedbed.web.weights_response import encode_weights, outgoing_tensors


def _counting(name: str, pieces: list[bytes]) -> tuple[list[int], OutgoingTensor]:
    calls = [0]

    def produce() -> Iterator[bytes]:
        calls[0] += 1
        yield from pieces

    size = sum(len(p) for p in pieces)
    tensor = OutgoingTensor(name, "float32", (size // 4,), size, {}, produce)
    return calls, tensor


def _document() -> dict[str, object]:
    return {"algorithm": "test"}


def test_tensors_within_the_budget_are_generated_once() -> None:
    calls_a, a = _counting("a", [b"abcd", b"efgh"])
    calls_b, b = _counting("b", [b"ijkl" * 4])
    body = b"".join(safetensors_body(_document(), [a, b], hold_bytes=8).body)
    # a (8 bytes) fits the budget and is sent from the hashing pass; b (16) is generated again.
    assert calls_a[0] == 1 and calls_b[0] == 2
    unheld = b"".join(safetensors_body(_document(), [a, b]).body)
    assert body == unheld
    header = safetensors.numpy.load(body)
    assert header["a"].tobytes() == b"abcdefgh" and header["b"].tobytes() == b"ijkl" * 4


def test_a_regenerated_tensor_is_still_checked_against_its_first_digest() -> None:
    walks = [0]

    def drifting() -> Iterator[bytes]:
        walks[0] += 1
        yield bytes([walks[0]]) * 8

    tensor = OutgoingTensor("w", "float32", (2,), 8, {}, drifting)
    with pytest.raises(ProducerContractError, match="not repeatable"):
        b"".join(safetensors_body(_document(), [tensor], hold_bytes=4).body)
    # Held, the second walk never happens, so the same producer yields a consistent body.
    walks[0] = 0
    body = b"".join(safetensors_body(_document(), [tensor], hold_bytes=8).body)
    assert safetensors.numpy.load(body)["w"].tobytes() == b"\x01" * 8


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
