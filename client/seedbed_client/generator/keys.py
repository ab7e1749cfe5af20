"""Key derivation: (seed, tensor name) -> the two 64-bit words of a Philox4x64-10 key.

The key depends on nothing else, so a tensor's values do not change when other layers are
added, removed or reordered. Both inputs are length-framed before hashing, which keeps
different (seed, name) pairs from ever producing the same byte string.
"""

from __future__ import annotations

import hashlib
import operator

# Changing this tag changes every key, and therefore every output byte (bump ALGORITHM).
KEY_DOMAIN_TAG = b"seedbed/philox4x64/v1\x00"

SEED_INT_MAX = 2**63 - 1
SEED_STR_MAX_CHARS = 128
WORD_MASK = (1 << 64) - 1

PhiloxKey = tuple[int, int]


def _frame(data: bytes) -> bytes:
    return len(data).to_bytes(8, "little") + data


def seed_bytes(seed: int | str) -> bytes:
    """The byte form of a seed that enters the key hash (validated)."""
    # bool is an int subclass; True as a seed is almost certainly a caller's mistake.
    if isinstance(seed, bool) or not isinstance(seed, int | str):
        raise ValueError(
            f"seed must be an integer 0..{SEED_INT_MAX} or a string of 1..{SEED_STR_MAX_CHARS} "
            f"characters, got {type(seed).__name__}"
        )
    if isinstance(seed, int):
        if not 0 <= seed <= SEED_INT_MAX:
            raise ValueError(f"seed must be an integer 0..{SEED_INT_MAX} (2**63-1), got {seed}")
        return b"int:" + str(seed).encode("ascii")
    if not 1 <= len(seed) <= SEED_STR_MAX_CHARS:
        raise ValueError(
            f"seed as a string must have 1..{SEED_STR_MAX_CHARS} characters, got {len(seed)}"
        )
    try:
        return b"str:" + seed.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ValueError("seed must be valid Unicode text (no lone surrogates)") from exc


def _name_bytes(tensor_name: str) -> bytes:
    if not isinstance(tensor_name, str) or not tensor_name:
        raise ValueError("tensor_name must be a non-empty string")
    try:
        return tensor_name.encode("utf-8")
    except UnicodeEncodeError as exc:
        raise ValueError("tensor_name must be valid Unicode text (no lone surrogates)") from exc


def key_digest(seed: int | str, tensor_name: str) -> bytes:
    """SHA-256 of tag + frame(seed bytes) + frame(name bytes); the key is its first 16 bytes."""
    message = KEY_DOMAIN_TAG + _frame(seed_bytes(seed)) + _frame(_name_bytes(tensor_name))
    return hashlib.sha256(message).digest()


def derive_key(seed: int | str, tensor_name: str) -> PhiloxKey:
    """The Philox key words (k0, k1) for one tensor: little-endian uint64s of digest[0:16]."""
    digest = key_digest(seed, tensor_name)
    return (int.from_bytes(digest[0:8], "little"), int.from_bytes(digest[8:16], "little"))


def check_key(key: object) -> PhiloxKey:
    """Validate a key given by a caller (a pair of integers, each 0..2**64-1)."""
    message = "key must be a pair (k0, k1) of integers in 0..2**64-1, as derive_key returns"
    if not isinstance(key, tuple | list) or len(key) != 2:
        raise ValueError(message)
    words = []
    for w in key:
        if isinstance(w, bool):
            raise ValueError(message)
        try:
            value = operator.index(w)  # accepts numpy integers too
        except TypeError:
            raise ValueError(message) from None
        if not 0 <= value <= WORD_MASK:
            raise ValueError(message)
        words.append(value)
    return (words[0], words[1])
