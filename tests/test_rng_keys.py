"""Key derivation: SHA-256 of a tagged, length-framed (seed, tensor name)."""

from __future__ import annotations

import hashlib

import pytest

from seedbed_client.generator import derive_key
from seedbed_client.generator.keys import key_digest


def _by_hand(seed_text: bytes, name: str) -> tuple[int, int]:
    # The construction as the specification states it, written out independently.
    name_b = name.encode("utf-8")
    message = (
        b"seedbed/philox4x64/v1\x00"
        + len(seed_text).to_bytes(8, "little")
        + seed_text
        + len(name_b).to_bytes(8, "little")
        + name_b
    )
    h = hashlib.sha256(message).digest()
    return int.from_bytes(h[:8], "little"), int.from_bytes(h[8:16], "little")


@pytest.mark.parametrize(
    ("seed", "seed_text", "name"),
    [
        (20261201, b"int:20261201", "encoder.0.weight"),
        (0, b"int:0", "stem.bias"),
        (2**63 - 1, b"int:9223372036854775807", "x"),
        ("harbour-survey", b"str:harbour-survey", "decoder.3.query.weight"),
        ("séance ☂", "str:séance ☂".encode(), "tête.weight"),
    ],
)
def test_key_matches_the_specified_construction(seed, seed_text, name) -> None:
    assert derive_key(seed, name) == _by_hand(seed_text, name)


def test_digest_is_full_sha256() -> None:
    assert len(key_digest(1, "a")) == 32


def test_int_and_string_seeds_differ() -> None:
    assert derive_key(5, "w") != derive_key("5", "w")


def test_names_and_seeds_change_the_key() -> None:
    keys = {
        derive_key(seed, name)
        for seed in (1, 2, "1", "2")
        for name in ("a.weight", "b.weight", "a.bias")
    }
    assert len(keys) == 12


def test_framing_separates_seed_and_name_boundaries() -> None:
    # Without length framing "ab"+"c" and "a"+"bc" would hash the same bytes.
    assert derive_key("ab", "c") != derive_key("a", "bc")


@pytest.mark.parametrize(
    ("seed", "name", "match"),
    [
        (-1, "w", "seed"),
        (2**63, "w", "seed"),
        (True, "w", "seed"),
        (1.0, "w", "seed"),
        ("", "w", "seed"),
        ("x" * 129, "w", "seed"),
        ("\ud800", "w", "seed"),
        (1, "", "tensor_name"),
        (1, 3, "tensor_name"),
    ],
)
def test_bad_seeds_and_names_are_refused(seed, name, match) -> None:
    with pytest.raises(ValueError, match=match):
        derive_key(seed, name)


def test_limits_are_accepted() -> None:
    derive_key("x" * 128, "w")
    derive_key(2**63 - 1, "w")
