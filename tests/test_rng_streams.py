"""Standard values: distribution checks, block = slice, runs, chunking and threads."""

from __future__ import annotations

import tracemalloc

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from conftest import require_oracle
from seedbed_client.generator import (
    TRUNCATION_MASS,
    TRUNCATION_STD_FACTOR,
    derive_key,
    fill_standard,
    normal_quantile,
    raw_draws,
    standard_runs,
    standard_values,
)
from seedbed_client.generator.unit import open_probability, unit_uniform

KEY = derive_key(20261201, "harbour.encoder.0.weight")
N = 100_000
DISTS = ("uniform", "normal", "truncated_normal")


def _frozen(dist: str):
    stats = require_oracle("scipy.stats")
    return {
        "uniform": stats.uniform(loc=-1.0, scale=2.0),
        "normal": stats.norm(),
        "truncated_normal": stats.truncnorm(-2.0, 2.0),
    }[dist]


@pytest.mark.parametrize("dist", DISTS)
def test_kolmogorov_smirnov(dist) -> None:
    stats = require_oracle("scipy.stats")
    values = standard_values(dist, KEY, 0, N)
    result = stats.kstest(values, _frozen(dist).cdf)
    # Fixed seed, so this is a fixed number; a broken transform gives p ~ 0.
    assert result.pvalue > 1e-3, result


@pytest.mark.parametrize("dist", DISTS)
def test_mean_and_variance_within_four_standard_errors(dist) -> None:
    frozen = _frozen(dist)
    values = standard_values(dist, derive_key(7, f"moments.{dist}"), 0, N)
    var = frozen.var()
    fourth = frozen.moment(4)  # about the mean, which is 0 for all three
    se_mean = np.sqrt(var / N)
    se_var = np.sqrt((fourth - var**2) / N)
    assert abs(values.mean()) < 4 * se_mean
    assert abs(values.var() - var) < 4 * se_var


def test_ranges() -> None:
    u = standard_values("uniform", KEY, 0, N)
    assert u.min() >= -1.0 and u.max() < 1.0
    t = standard_values("truncated_normal", KEY, 0, N)
    assert t.min() >= -2.0 and t.max() <= 2.0
    assert np.isfinite(standard_values("normal", KEY, 0, N)).all()


def test_truncated_std_factor_matches_the_sample() -> None:
    t = standard_values("truncated_normal", derive_key(3, "t"), 0, N)
    # Sample std of 1e5 values: relative standard error about 0.3 %.
    assert t.std() == pytest.approx(TRUNCATION_STD_FACTOR, rel=0.012)


def test_transforms_follow_the_specified_bit_recipes() -> None:
    raw = raw_draws(KEY, 1000, 4000)
    u = unit_uniform(raw)
    assert np.array_equal(standard_values("uniform", KEY, 1000, 4000), 2.0 * u - 1.0)
    # Exact integer check of u = (x >> 11) / 2**53 for a few draws.
    for x, ui in zip(raw[:20].tolist(), u[:20].tolist(), strict=True):
        assert ui == (x >> 11) / 2**53
    p = open_probability(raw)
    assert np.array_equal(standard_values("normal", KEY, 1000, 4000), normal_quantile(p))


def test_truncated_values_against_mpmath() -> None:
    mpmath = require_oracle("mpmath")
    raw = raw_draws(KEY, 0, 40)
    p = open_probability(raw)
    got = standard_values("truncated_normal", KEY, 0, 40)
    with mpmath.workdps(30):
        lo = mpmath.ncdf(-2)
        mass = mpmath.ncdf(2) - lo
        for pi, zi in zip(p.tolist(), got.tolist(), strict=True):
            # Inverse-CDF method on [-2, 2]: z = Phi^-1(Phi(-2) + p * (Phi(2) - Phi(-2))).
            target = lo + mpmath.mpf(pi) * mass
            exact = mpmath.findroot(lambda x, t=target: mpmath.ncdf(x) - t, mpmath.mpf(zi))
            assert abs(zi - exact) < 1e-14
    assert pytest.approx(float(mass), rel=1e-15) == TRUNCATION_MASS


@settings(max_examples=30, deadline=None)
@given(
    dist=st.sampled_from(DISTS),
    start=st.integers(min_value=0, max_value=2**45),
    length=st.integers(min_value=1, max_value=3000),
    data=st.data(),
)
def test_any_block_equals_the_slice(dist, start, length, data) -> None:
    whole = standard_values(dist, KEY, start, length)
    lo = data.draw(st.integers(min_value=0, max_value=length))
    hi = data.draw(st.integers(min_value=lo, max_value=length))
    part = standard_values(dist, KEY, start + lo, hi - lo)
    assert part.tobytes() == whole[lo:hi].tobytes()


@settings(max_examples=25, deadline=None)
@given(
    dist=st.sampled_from(DISTS),
    start=st.integers(min_value=0, max_value=2**40),
    count=st.integers(min_value=0, max_value=5000),
    chunk=st.integers(min_value=1, max_value=4096),
    threads=st.integers(min_value=1, max_value=3),
)
def test_chunks_and_threads_do_not_change_bytes(dist, start, count, chunk, threads) -> None:
    reference = standard_values(dist, KEY, start, count)
    out = np.full(count, np.nan)
    fill_standard(dist, KEY, out, start, threads=threads, chunk=chunk)
    assert out.tobytes() == reference.tobytes()


def test_threads_on_a_large_fill() -> None:
    count = (1 << 19) + 12345
    outs = []
    for threads, chunk in ((1, 1 << 18), (2, 1 << 18), (2, 1 << 14), (4, 77_777)):
        out = np.empty(count)
        fill_standard("normal", KEY, out, 99, threads=threads, chunk=chunk)
        outs.append(out.tobytes())
    assert all(o == outs[0] for o in outs)


def test_fill_writes_into_a_strided_view() -> None:
    base = np.zeros(2000)
    fill_standard("uniform", KEY, base[::2], 10)
    assert np.array_equal(base[::2], standard_values("uniform", KEY, 10, 1000))
    assert not base[1::2].any()


@settings(max_examples=20, deadline=None)
@given(
    dist=st.sampled_from(DISTS),
    starts=st.lists(st.integers(min_value=0, max_value=2**50), min_size=0, max_size=20),
    length=st.integers(min_value=0, max_value=300),
)
def test_runs_equal_the_slices(dist, starts, length) -> None:
    runs = standard_runs(dist, KEY, starts, length)
    assert runs.shape == (len(starts), length)
    for row, s in zip(runs, starts, strict=True):
        assert row.tobytes() == standard_values(dist, KEY, s, length).tobytes()


def test_runs_build_a_transposed_block() -> None:
    # A (n_out, n_in) tensor served as (n_in, n_out): served rows [a, b) are, for every
    # output unit o, the logical run [o*n_in + a, o*n_in + b).
    n_out, n_in, a, b = 37, 50, 11, 29
    whole = standard_values("normal", KEY, 0, n_out * n_in).reshape(n_out, n_in)
    runs = standard_runs("normal", KEY, np.arange(n_out) * n_in + a, b - a)
    assert np.array_equal(runs.T, whole.T[a:b])


def _peak_scratch(count: int, chunk: int) -> int:
    out = np.empty(count)
    tracemalloc.start()
    try:
        fill_standard("normal", KEY, out, 0, chunk=chunk)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    return peak


def test_fill_memory_is_bounded_by_the_chunk_not_the_output() -> None:
    small = _peak_scratch(1 << 19, 1 << 14)
    large = _peak_scratch(1 << 21, 1 << 14)
    # Scratch is a fixed multiple of the chunk (about 12 float64 arrays of 16k values):
    # quadrupling the output must not grow it, and it stays far below the 16 MB output.
    assert large < 1.1 * small + 50_000, (small, large)
    assert large < 16 * 8 * (1 << 14), large


@pytest.mark.parametrize(
    ("call", "match"),
    [
        (lambda: standard_values("gaussian", KEY, 0, 3), "dist must be one of"),
        (lambda: standard_values("normal", KEY, -1, 3), "start"),
        (lambda: fill_standard("normal", KEY, np.empty(3, np.float32), 0), "float64"),
        (lambda: fill_standard("normal", KEY, np.empty((3, 2)), 0), "one-dimensional"),
        (lambda: fill_standard("normal", KEY, np.empty(3), 0, threads=0), "threads"),
        (lambda: fill_standard("normal", KEY, np.empty(3), 0, chunk=0), "chunk"),
        (lambda: standard_runs("normal", KEY, [1, -2], 3), "start"),
        (lambda: standard_runs("normal", KEY, [1.5], 3), "integers"),
        (lambda: standard_runs("normal", KEY, [1], -3), "length"),
    ],
)
def test_bad_arguments(call, match) -> None:
    with pytest.raises(ValueError, match=match):
        call()


def test_read_only_output_is_refused() -> None:
    out = np.empty(4)
    out.flags.writeable = False
    with pytest.raises(ValueError, match="writable"):
        fill_standard("normal", KEY, out, 0)
