"""Philox4x64-10 draws: known-answer vectors, counter layout, the numpy pre-increment trap."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seedbed_client.generator import raw_draws
from seedbed_client.generator.philox import DrawSource, numpy_counter_words

M64 = (1 << 64) - 1

# Known-answer vectors of Philox4x64-10 from the Random123 distribution (Salmon, Moraes, Dror
# & Shaw 2011, "Parallel Random Numbers: As Easy as 1, 2, 3", SC'11; kat_vectors)
# [recalled from the distribution]. (counter words c0..c3, key words k0, k1) -> output words.
KAT = [
    (
        (0, 0, 0, 0),
        (0, 0),
        (0x16554D9ECA36314C, 0xDB20FE9D672D0FDC, 0xD7E772CEE186176B, 0x7E68B68AEC7BA23B),
    ),
    (
        (M64, M64, M64, M64),
        (M64, M64),
        (0x87B092C3013FE90B, 0x438C3C67BE8D0224, 0x9CC7D7C69CD777B6, 0xA09CAEBF594F0BA0),
    ),
    (
        (0x243F6A8885A308D3, 0x13198A2E03707344, 0xA4093822299F31D0, 0x082EFA98EC4E6C89),
        (0x452821E638D01377, 0xBE5466CF34E90C6C),
        (0xA528F45403E61D95, 0x38C72DBD566E9788, 0xA5A1610E72FD18B5, 0x57BD43B5E52B7FE6),
    ),
]


def _counter_value(words: tuple[int, int, int, int]) -> int:
    return sum(w << (64 * i) for i, w in enumerate(words))


def reference_philox4x64_10(counter: int, key: tuple[int, int]) -> list[int]:
    """A plain-integer Philox4x64-10 written from the algorithm's description (Salmon et al.
    2011, sec. 4: two 64x64->128 multiplications per round, key bumped by the Weyl constants;
    multipliers and Weyl constants are the published Philox4x64 values [from memory], and
    the known-answer vectors above confirm them)."""
    c = [(counter >> (64 * i)) & M64 for i in range(4)]
    k0, k1 = key
    for _ in range(10):
        p0 = 0xD2E7470EE14C6C93 * c[0]
        p1 = 0xCA5A826395121157 * c[2]
        c = [
            (p1 >> 64) ^ c[1] ^ k0,
            p1 & M64,
            (p0 >> 64) ^ c[3] ^ k1,
            p0 & M64,
        ]
        k0 = (k0 + 0x9E3779B97F4A7C15) & M64
        k1 = (k1 + 0xBB67AE8584CAA73B) & M64
    return c


@pytest.mark.parametrize(("counter", "key", "expected"), KAT)
def test_reference_implementation_matches_known_answers(counter, key, expected) -> None:
    assert reference_philox4x64_10(_counter_value(counter), key) == list(expected)


@pytest.mark.parametrize(("counter", "key", "expected"), KAT)
def test_generator_block_matches_known_answers(counter, key, expected) -> None:
    got = DrawSource(key).block(_counter_value(counter))
    assert [int(w) for w in got] == list(expected)


def test_raw_draws_zero_key_zero_counter_known_answer() -> None:
    # Counter (0, 0, 0, 0) is logical block 0 of stream 0: indices 0..3.
    _counter, key, expected = KAT[0]
    assert [int(w) for w in raw_draws(key, 0, 4)] == list(expected)


def test_raw_draws_element_layout_follows_block_and_lane() -> None:
    key = (0x452821E638D01377, 0xBE5466CF34E90C6C)
    draws = raw_draws(key, 37, 11)  # blocks 9..11, starting at lane 1
    for j, value in enumerate(draws):
        i = 37 + j
        block = reference_philox4x64_10(i // 4, key)
        assert int(value) == block[i % 4]


def test_stream_occupies_counter_word_one() -> None:
    key = (12345, 678910)
    for stream in (1, 7, M64):
        got = [int(w) for w in raw_draws(key, 8, 4, stream=stream)]
        assert got == reference_philox4x64_10(2 | (stream << 64), key)


def test_numpy_pre_increment_trap() -> None:
    # Handing numpy the counter b itself yields block b + 1: numpy increments first.
    key = np.array([3, 4], dtype=np.uint64)
    b = 5
    naive = np.random.Philox(key=key, counter=np.array([b, 0, 0, 0], dtype=np.uint64))
    assert [int(w) for w in naive.random_raw(4)] == reference_philox4x64_10(b + 1, (3, 4))
    assert [int(w) for w in raw_draws((3, 4), 4 * b, 4)] == reference_philox4x64_10(b, (3, 4))
    # The helper's words for counter 0 are all ones (0 - 1 wraps around 2**256).
    assert [int(w) for w in numpy_counter_words(0)] == [M64] * 4


@settings(max_examples=40, deadline=None)
@given(
    start=st.integers(min_value=0, max_value=2**62),
    count=st.integers(min_value=0, max_value=9),
    k0=st.integers(min_value=0, max_value=M64),
    k1=st.integers(min_value=0, max_value=M64),
)
def test_raw_draws_agree_with_reference_anywhere(start, count, k0, k1) -> None:
    draws = raw_draws((k0, k1), start, count)
    expected = [
        reference_philox4x64_10(i // 4, (k0, k1))[i % 4] for i in range(start, start + count)
    ]
    assert draws.dtype == np.uint64
    assert [int(v) for v in draws] == expected


@pytest.mark.parametrize(
    ("args", "match"),
    [
        (((1, 2), -1, 3), "start"),
        (((1, 2), 0, -3), "count"),
        (((1, 2), 2**63, 1), "start \\+ count"),
        (((1, 2), 0, 1, -1), "stream"),
        (((1, 2), 0, 1, 2**64), "stream"),
        (((1, 2, 3), 0, 1), "key"),
        (((1, 2**64), 0, 1), "key"),
        (("ab", 0, 1), "key"),
        (((1, 2), 1.5, 1), "integers"),
    ],
)
def test_bad_arguments_are_refused(args, match) -> None:
    with pytest.raises(ValueError, match=match):
        raw_draws(*args)
