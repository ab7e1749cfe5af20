"""Per-tensor analysis of the audit: statistics, twin units, numerical rank.

Outside references: numpy's own mean/std/isnan (population std, ddof=0) for the statistics;
a brute-force pairwise comparison of row bytes written here for twins; for ranks, matrices of
known rank built as products of Gaussian factors (rank r almost surely) and
numpy.linalg.matrix_rank as an oracle on float64 matrices.
"""

from __future__ import annotations

import ml_dtypes
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from seedbed.core.audit import stats as stats_module
from seedbed.core.audit.identical_units import twin_units
from seedbed.core.audit.rank import numerical_rank
from seedbed.core.audit.stats import value_stats
from seedbed.core.audit.stored import FLOAT_ROUNDOFF

DTYPES = {
    "float64": np.float64,
    "float32": np.float32,
    "float16": np.float16,
    "bfloat16": ml_dtypes.bfloat16,
}


def test_statistics_match_numpy_across_piece_boundaries(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setattr(stats_module, "PIECE", 7)  # many pieces, ragged last one
    rng = np.random.default_rng(3)
    x = (rng.standard_normal((13, 11)) * 0.3 + 5.0).astype(np.float32)
    x[2, 3], x[4, 4], x[9, 0] = np.nan, np.inf, -np.inf
    s = value_stats(x)
    finite = x[np.isfinite(x)].astype(np.float64)
    assert (s.nan, s.posinf, s.neginf) == (1, 1, 1)
    assert s.mean == pytest.approx(np.mean(finite), rel=1e-12)
    assert s.std == pytest.approx(np.std(finite), rel=1e-12)
    assert (s.min, s.max) == (finite.min(), finite.max())
    assert not s.all_constant


def test_a_large_mean_does_not_swallow_a_small_spread() -> None:
    # Two-pass variance: 1e8 + tiny noise in float64 keeps its std (one-pass E[x^2]-E[x]^2
    # would cancel catastrophically).
    x = 1e8 + np.array([-1e-3, 1e-3] * 500, dtype=np.float64)
    assert value_stats(x).std == pytest.approx(np.std(x), rel=1e-9)
    assert value_stats(x).std == pytest.approx(1e-3, rel=1e-4)  # 1e8 +- 1e-3 as stored


def test_constant_zero_and_single_values() -> None:
    assert value_stats(np.zeros((3, 4), np.float16)).all_zero
    c = value_stats(np.full((3, 4), 0.25, np.float32))
    assert c.all_constant and not c.all_zero
    assert not value_stats(np.ones(1, np.float32)).all_constant  # one value is not "constant"
    nan = value_stats(np.full(4, np.nan, np.float32))
    assert nan.mean is None and nan.std is None and not nan.all_constant
    signed = value_stats(np.array([0.0, -0.0], np.float32))
    assert signed.all_zero  # equal in value, although not in bytes


def _brute_twins(rows: np.ndarray, blocks: int) -> list[tuple[int, ...]]:
    per = rows.shape[0] // blocks
    found: dict[tuple[int, bytes], list[int]] = {}
    for i in range(rows.shape[0]):
        found.setdefault((i // per, rows[i].tobytes()), []).append(i)
    return sorted(tuple(v) for v in found.values() if len(v) > 1)


@settings(max_examples=40, deadline=None)
@given(
    seed=st.integers(0, 2**32 - 1),
    n=st.integers(2, 40),
    width=st.integers(1, 6),
    blocks=st.sampled_from([1, 2, 4]),
    copies=st.lists(st.tuples(st.integers(0, 39), st.integers(0, 39)), max_size=8),
)
def test_twins_equal_a_brute_force_comparison(
    seed: int, n: int, width: int, blocks: int, copies: list[tuple[int, int]]
) -> None:
    n = n - n % blocks or blocks
    rng = np.random.default_rng(seed)
    rows = rng.standard_normal((n, width)).astype(np.float32)
    for src, dst in copies:
        rows[dst % n] = rows[src % n]
    got = twin_units(rows, blocks)
    assert sorted(got.groups) == _brute_twins(rows, blocks)
    assert list(got.groups) == sorted(got.groups, key=lambda g: g[0])


def test_twins_compare_bytes_not_values() -> None:
    rows = np.array([[0.0, 1.0], [-0.0, 1.0], [0.0, 1.0]], np.float32)
    assert twin_units(rows).groups == ((0, 2),)


def test_equal_rows_in_different_gate_blocks_are_not_twins() -> None:
    rows = np.tile(np.arange(3, dtype=np.float32), (4, 1))  # four equal rows
    rows[1] += 1
    rows[3] += 1  # blocks {0,1} and {2,3}: rows 0,2 equal and rows 1,3 equal, across blocks
    assert twin_units(rows, blocks=2).groups == ()
    assert twin_units(rows, blocks=1).groups == ((0, 2), (1, 3))


def _low_rank(rng: np.random.Generator, m: int, n: int, r: int) -> np.ndarray:
    # A product of m x r and r x n Gaussian factors has rank r with probability 1.
    return rng.standard_normal((m, r)) @ rng.standard_normal((r, n)) / np.sqrt(r)


@pytest.mark.parametrize("dtype", list(DTYPES))
@pytest.mark.parametrize(("m", "n", "r"), [(48, 40, 4), (40, 96, 1), (64, 64, 20)])
def test_planted_low_rank_is_found_in_every_dtype(dtype: str, m: int, n: int, r: int) -> None:
    rng = np.random.default_rng(m * n + r)
    stored = _low_rank(rng, m, n, r).astype(DTYPES[dtype])
    res = numerical_rank(stored, FLOAT_ROUNDOFF[dtype], 1 << 25, 256, 512)
    assert res.rank == r
    assert not res.sampled


@pytest.mark.parametrize("dtype", list(DTYPES))
def test_random_rectangular_matrices_are_full_rank(dtype: str) -> None:
    rng = np.random.default_rng(11)
    stored = (rng.standard_normal((64, 160)) * 0.05).astype(DTYPES[dtype])
    res = numerical_rank(stored, FLOAT_ROUNDOFF[dtype], 1 << 25, 256, 512)
    assert res.rank == res.full == 64
    assert res.deficiency == 0


def test_float64_rank_agrees_with_numpy_matrix_rank() -> None:
    rng = np.random.default_rng(5)
    for m, n, r in [(30, 50, 7), (50, 30, 30), (20, 20, 19)]:
        a = _low_rank(rng, m, n, r)
        res = numerical_rank(a, FLOAT_ROUNDOFF["float64"], 1 << 25, 256, 512)
        assert res.rank == np.linalg.matrix_rank(a) == r
        assert (res.rows, res.cols) == (m, n)


def test_large_matrices_are_sampled_and_still_reveal_low_rank() -> None:
    rng = np.random.default_rng(8)
    a = _low_rank(rng, 300, 700, 12).astype(np.float32)
    res = numerical_rank(
        a, FLOAT_ROUNDOFF["float32"], full_work=1 << 20, sample_short=64, sample_long=128
    )
    assert res.sampled and (res.rows, res.cols) == (64, 128)
    assert res.rank == 12
    # A full-rank matrix of the same shape: the sample is full rank too.
    full = rng.standard_normal((300, 700)).astype(np.float32)
    res = numerical_rank(full, FLOAT_ROUNDOFF["float32"], 1 << 20, 64, 128)
    assert res.rank == 64


def test_deficiency_allowance() -> None:
    rng = np.random.default_rng(2)
    # One dependent row in a 40-row matrix: deficiency 1, within the allowance (a note only).
    a = rng.standard_normal((40, 60))
    a[7] = a[3] - 2 * a[5]
    res = numerical_rank(a, FLOAT_ROUNDOFF["float64"], 1 << 25, 256, 512)
    assert res.deficiency == 1
    assert res.allowance == 2  # 5% of the 40 possible directions
    # Planting 3 dependent rows exceeds it.
    a[9] = a[1] + a[2]
    a[11] = a[0] * 0.5
    res = numerical_rank(a, FLOAT_ROUNDOFF["float64"], 1 << 25, 256, 512)
    assert res.deficiency == 3 > res.allowance


def test_chance_twins_estimate_matches_the_birthday_count() -> None:
    # Rows of 2 values drawn uniformly from 10 levels: two given rows are equal with probability
    # (1/10)^2, so C(n, 2) / 100 equal pairs are expected (the birthday problem).
    from seedbed.core.audit.report import _chance_pairs

    rng = np.random.default_rng(21)
    n = 400
    rows = rng.integers(0, 10, (n, 2)).astype(np.float32)
    expected = n * (n - 1) / 2 / 100
    estimate = _chance_pairs(rows, rows, 1)
    assert estimate == pytest.approx(expected, rel=0.1)  # frequencies estimated from the data
    observed = sum(len(g) * (len(g) - 1) // 2 for g in twin_units(rows).groups)
    assert observed == pytest.approx(expected, rel=0.25)


def test_short_low_precision_rows_repeating_by_chance_are_only_a_warning() -> None:
    import io

    from seedbed.formats.upload_in import audit_upload

    rng = np.random.default_rng(22)
    w = (rng.standard_normal((3000, 1)) * 0.1).astype(np.float16)
    buf = io.BytesIO()
    np.savez(buf, w=w)
    data = buf.getvalue()
    report = audit_upload(io.BytesIO(data), len(data))
    (twin,) = [f for f in report["findings"] if f["code"] == "twin_units"]
    assert twin["severity"] == "warning" and "expected by chance" in twin["message"]


def test_wide_rows_are_grouped_the_same_way(monkeypatch: pytest.MonkeyPatch) -> None:
    from seedbed.core.audit import identical_units as twins_module

    rng = np.random.default_rng(30)
    rows = rng.standard_normal((12, 40)).astype(np.float32)
    rows[[4, 8]] = rows[1]
    narrow = twin_units(rows).groups
    monkeypatch.setattr(twins_module, "WIDE_ROW_BYTES", 16)  # take the digest path
    assert twin_units(rows).groups == narrow == ((1, 4, 8),)
