"""Raw 64-bit draws: Philox4x64-10 (Salmon et al. 2011) through numpy's bit generator.

Counter layout: the element with logical index i takes lane i % 4 of the block produced for
the 256-bit counter (i // 4, stream, 0, 0), word 0 least significant. numpy's Philox adds one
to its counter *before* producing each block, so to get block b first we hand it b - 1
(mod 2**256). numpy promises (NEP 19) that a bit generator's raw stream does not change
between versions; only the raw stream is used here.
"""

from __future__ import annotations

import operator

import numpy as np

from .keys import WORD_MASK, PhiloxKey, check_key

LANES = 4
# Logical indices are kept below 2**63 so they fit numpy's int64 everywhere.
INDEX_LIMIT = 2**63
STREAM_LIMIT = 2**64
_COUNTER_MOD = 1 << 256


def check_range(start: object, count: object) -> tuple[int, int]:
    """Validate a range of logical indices [start, start + count)."""
    try:
        s = operator.index(start)  # type: ignore[arg-type]
        c = operator.index(count)  # type: ignore[arg-type]
    except TypeError:
        raise ValueError("start and count must be integers") from None
    if s < 0:
        raise ValueError(f"start must be >= 0, got {s}")
    if c < 0:
        raise ValueError(f"count must be >= 0, got {c}")
    if s + c > INDEX_LIMIT:
        raise ValueError(f"start + count must be <= 2**63, got {s + c}")
    return s, c


def check_stream(stream: object) -> int:
    try:
        value = operator.index(stream)  # type: ignore[arg-type]
    except TypeError:
        raise ValueError("stream must be an integer 0..2**64-1") from None
    if not 0 <= value < STREAM_LIMIT:
        raise ValueError(f"stream must be an integer 0..2**64-1, got {value}")
    return value


def numpy_counter_words(counter: int) -> np.ndarray:
    """The counter to give numpy so that the first block it produces is for `counter`.

    This is the pre-increment trap: numpy adds one before generating, so we subtract one.
    """
    value = (counter - 1) % _COUNTER_MOD
    return np.array([(value >> (64 * w)) & WORD_MASK for w in range(4)], dtype=np.uint64)


def block_counter(block: int, stream: int) -> int:
    """The 256-bit counter (block, stream, 0, 0), word 0 least significant."""
    return block | (stream << 64)


class DrawSource:
    """One reusable Philox bit generator for a fixed key; each call repositions it.

    Repositioning by assigning the documented state dict costs a few microseconds, far less
    than building a new generator, which matters when producing thousands of short runs.
    Not thread-safe: give each thread its own instance.
    """

    def __init__(self, key: PhiloxKey) -> None:
        k0, k1 = check_key(key)
        self._key = np.array([k0, k1], dtype=np.uint64)
        self._bitgen = np.random.Philox(key=self._key, counter=np.zeros(4, dtype=np.uint64))

    def _blocks_from(self, counter: int, count: int) -> np.ndarray:
        self._bitgen.state = {
            "bit_generator": "Philox",
            "state": {"counter": numpy_counter_words(counter), "key": self._key},
            "buffer": np.zeros(LANES, dtype=np.uint64),
            "buffer_pos": LANES,  # empty buffer: the next draw starts a fresh block
            "has_uint32": 0,
            "uinteger": 0,
        }
        raw = self._bitgen.random_raw(count)
        assert isinstance(raw, np.ndarray)
        return raw

    def block(self, counter: int) -> np.ndarray:
        """The four output words of Philox4x64-10(key, counter), counter in 0..2**256-1."""
        return self._blocks_from(counter, LANES)

    def draws(self, start: int, count: int, stream: int = 0) -> np.ndarray:
        """uint64 draws for logical indices [start, start + count) (arguments pre-validated)."""
        block, lane = divmod(start, LANES)
        raw = self._blocks_from(block_counter(block, stream), lane + count)
        return raw[lane:] if lane else raw


def raw_draws(key: PhiloxKey, start: int, count: int, stream: int = 0) -> np.ndarray:
    """The raw uint64 draws x_i for logical indices i in [start, start + count)."""
    s, c = check_range(start, count)
    return DrawSource(key).draws(s, c, check_stream(stream))
