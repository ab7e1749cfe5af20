"""Numerical rank of a weight matrix (units x everything else), with bounded cost.

Tolerance. A singular value counts as zero when it is below

    tol = max(4 * u * rms * (sqrt(m) + sqrt(n)),  s_max * max(m, n) * eps64)

where u is the unit roundoff of the stored dtype (2^-24 for float32, 2^-11 float16, 2^-8
bfloat16, 2^-53 float64), rms the root mean square of the matrix, and eps64 = 2^-52. The first
term is four times the size rounding to the stored dtype could give a matrix's trailing
singular values: rounding perturbs each value by up to u times its size, and the spectral norm
of an m x n matrix of such independent errors is about u * rms * (sqrt(m) + sqrt(n)) / sqrt(3)
(the norm of a random matrix with independent entries, Bai & Yin 1993 [from memory]); the
audit's tests check this margin on planted low-rank matrices in every dtype. So an exactly
low-rank matrix stored in any of these dtypes shows its true rank. The second term is numpy's
default for float64 arithmetic (the precision the SVD runs in).

Severity. Near-square random matrices have a few genuinely tiny singular values (the smallest
of an n x n Gaussian matrix is about rms / sqrt(n), Edelman 1988 [from memory]), so in 16-bit
dtypes a handful can fall under the tolerance without any structure. A deficiency counts as
a finding only when more than max(1, 5% of min(m, n)) directions are missing; one or a few
are reported as near-degenerate.

Cost. An SVD of m x n costs about m * n * min(m, n). Up to `rank_full_work` the whole matrix is
decomposed. Above it, a seeded random sample of at most `rank_sample_short` rows of the short
side by `rank_sample_long` of the long side is: its rank is min(true rank, sample size) when
the rows are in general position, so a sample reveals deficiency only below its own smaller
side. The report says when a sample was used. Work beyond the per-audit budget is skipped with
a note.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

# Fixed, so the same file always gives the same report.
SAMPLE_SEED = 20240917
FLOAT64_EPS = 2.0**-52


@dataclass(frozen=True)
class RankResult:
    rows: int  # units of the matrix examined (the sample, when sampled)
    cols: int  # incoming values per unit of the matrix examined
    rank: int
    tolerance: float
    largest: float  # singular values, for the caller's message
    smallest: float
    sampled: bool
    work: int  # m * n * min(m, n) of what was decomposed

    @property
    def full(self) -> int:
        return min(self.rows, self.cols)

    @property
    def deficiency(self) -> int:
        return self.full - self.rank

    @property
    def allowance(self) -> int:
        """Missing directions tolerated before the deficiency is called structural."""
        return max(1, math.floor(0.05 * self.full))


def _sample(matrix: np.ndarray, short: int, long: int) -> tuple[np.ndarray, bool]:
    m, n = matrix.shape
    a = matrix if m <= n else matrix.T
    r, c = a.shape
    if r <= short and c <= long:
        return a, False
    rng = np.random.default_rng(SAMPLE_SEED)
    rows = np.sort(rng.choice(r, size=min(r, short), replace=False))
    cols = np.sort(rng.choice(c, size=min(c, long), replace=False))
    return a[np.ix_(rows, cols)], True


def work_of(rows: int, cols: int) -> int:
    return rows * cols * min(rows, cols)


def numerical_rank(
    matrix: np.ndarray, roundoff: float, full_work: int, sample_short: int, sample_long: int
) -> RankResult:
    """Rank of a finite 2-D matrix under the tolerance above (sampled when it is too big)."""
    m, n = matrix.shape
    if work_of(m, n) <= full_work:
        a, sampled = (matrix if m <= n else matrix.T), False
    else:
        a, sampled = _sample(matrix, sample_short, sample_long)
    a64 = np.asarray(a, dtype=np.float64)
    r, c = a64.shape
    transposed = m > n  # the short side was put first; report units x values again
    s = np.linalg.svd(a64, compute_uv=False)
    rms = float(np.sqrt(np.mean(np.square(a64)))) if a64.size else 0.0
    largest = float(s[0]) if s.size else 0.0
    rounding = 4.0 * roundoff * rms * (math.sqrt(r) + math.sqrt(c))
    tol = max(rounding, largest * max(r, c) * FLOAT64_EPS)
    rank = int(np.count_nonzero(s > tol))
    rows, cols = (c, r) if transposed else (r, c)
    return RankResult(
        rows, cols, rank, tol, largest, float(s[-1]) if s.size else 0.0, sampled, work_of(r, c)
    )
