"""Standard values (uniform on [-1, 1), normal, normal truncated to [-2, 2]) for any range
of logical indices, in bounded chunks, optionally on several threads.

Every value depends only on (key, stream, its own index): one 64-bit draw each, and every
transform is elementwise. So chunk size, thread count and where a block starts cannot change
a single byte, and any block equals the same slice of the whole tensor.
"""

from __future__ import annotations

import operator
from collections.abc import Callable, Sequence
from concurrent.futures import ThreadPoolExecutor

import numpy as np

from .keys import PhiloxKey, check_key
from .normal_inverse import quantile_from_centered
from .philox import INDEX_LIMIT, DrawSource, check_range, check_stream
from .truncation import TRUNCATION_BOUND, TRUNCATION_MASS
from .unit import centered_probability_into, symmetric_uniform_into

DISTRIBUTIONS = ("uniform", "normal", "truncated_normal")
DEFAULT_CHUNK = 1 << 18
# Transforms run on slices this long so their float64 temporaries stay in the CPU cache.
_PIECE = 1 << 15


def _uniform_piece(raw: np.ndarray, out: np.ndarray) -> None:
    symmetric_uniform_into(raw, out)


def _normal_piece(raw: np.ndarray, out: np.ndarray) -> None:
    centered_probability_into(raw, out)
    quantile_from_centered(out, out)


def _truncated_piece(raw: np.ndarray, out: np.ndarray) -> None:
    # q' = (p - 1/2) * (Phi(2) - Phi(-2)) maps (0, 1) symmetrically into (Phi(-2), Phi(2));
    # the clamp only guards against the approximation's last-bit error at the ends.
    centered_probability_into(raw, out)
    np.multiply(out, TRUNCATION_MASS, out=out)
    quantile_from_centered(out, out)
    np.minimum(out, TRUNCATION_BOUND, out=out)
    np.maximum(out, -TRUNCATION_BOUND, out=out)


_TRANSFORMS: dict[str, Callable[[np.ndarray, np.ndarray], None]] = {
    "uniform": _uniform_piece,
    "normal": _normal_piece,
    "truncated_normal": _truncated_piece,
}


def _transform(dist: str) -> Callable[[np.ndarray, np.ndarray], None]:
    try:
        return _TRANSFORMS[dist]
    except (KeyError, TypeError):
        raise ValueError(f"dist must be one of {', '.join(DISTRIBUTIONS)}, got {dist!r}") from None


def _transform_all(
    transform: Callable[[np.ndarray, np.ndarray], None], raw: np.ndarray, out: np.ndarray
) -> None:
    for lo in range(0, raw.shape[0], _PIECE):
        hi = min(lo + _PIECE, raw.shape[0])
        transform(raw[lo:hi], out[lo:hi])


def _positive_int(name: str, value: object) -> int:
    try:
        v = operator.index(value)  # type: ignore[arg-type]
    except TypeError:
        raise ValueError(f"{name} must be a positive integer") from None
    if v < 1:
        raise ValueError(f"{name} must be a positive integer, got {v}")
    return v


def fill_standard(
    dist: str,
    key: PhiloxKey,
    out: np.ndarray,
    start: int,
    *,
    threads: int = 1,
    chunk: int = DEFAULT_CHUNK,
    stream: int = 0,
) -> None:
    """out[j] = standard value of logical index start + j, for j in range(len(out)).

    Work is cut into chunks of `chunk` values; up to `threads` chunks are in flight. Each
    holds its raw draws (8 bytes per value) and the transform's float64 temporaries for at
    most 32768 values at a time (about 100 bytes per value), so memory beyond `out` is
    bounded by about threads * (8 * chunk + 100 * min(chunk, 32768)) bytes, whatever the
    size of `out`.
    """
    transform = _transform(dist)
    checked_key = check_key(key)
    if not isinstance(out, np.ndarray) or out.dtype != np.float64 or out.ndim != 1:
        raise ValueError("out must be a one-dimensional float64 numpy array")
    if not out.flags.writeable:
        raise ValueError("out must be writable")
    first, count = check_range(start, out.shape[0])
    n_threads = _positive_int("threads", threads)
    chunk_len = _positive_int("chunk", chunk)
    stream_id = check_stream(stream)

    def work(offset: int) -> None:
        n = min(chunk_len, count - offset)
        raw = DrawSource(checked_key).draws(first + offset, n, stream_id)
        _transform_all(transform, raw, out[offset : offset + n])

    offsets = range(0, count, chunk_len)
    if n_threads == 1 or len(offsets) <= 1:
        for offset in offsets:
            work(offset)
        return
    with ThreadPoolExecutor(max_workers=min(n_threads, len(offsets))) as pool:
        for _ in pool.map(work, offsets):
            pass  # drains the iterator so that worker exceptions are raised here


def standard_values(
    dist: str, key: PhiloxKey, start: int, count: int, stream: int = 0
) -> np.ndarray:
    """float64 standard values for logical indices [start, start + count)."""
    _transform(dist)
    _, n = check_range(start, count)
    out = np.empty(n, dtype=np.float64)
    fill_standard(dist, key, out, start, stream=stream)
    return out


def standard_runs(
    dist: str,
    key: PhiloxKey,
    starts: Sequence[int] | np.ndarray,
    length: int,
    stream: int = 0,
) -> np.ndarray:
    """Row i holds the standard values of logical indices [starts[i], starts[i] + length).

    Used to build blocks of transposed layouts, where each output unit contributes one run.
    One generator is repositioned per run; the transform then runs once over all of them.
    """
    transform = _transform(dist)
    checked_key = check_key(key)
    stream_id = check_stream(stream)
    try:
        n = operator.index(length)
    except TypeError:
        raise ValueError("length must be a non-negative integer") from None
    if n < 0:
        raise ValueError(f"length must be a non-negative integer, got {n}")
    begin = np.asarray(starts)
    if begin.ndim != 1 or (begin.size and begin.dtype.kind not in "iu"):
        raise ValueError("starts must be a one-dimensional sequence of integers")
    run_starts = [int(s) for s in begin]
    if run_starts and (min(run_starts) < 0 or max(run_starts) + n > INDEX_LIMIT):
        raise ValueError("every start must be >= 0 and start + length <= 2**63")

    raw = np.empty((len(run_starts), n), dtype=np.uint64)
    source = DrawSource(checked_key)
    for row, s in enumerate(run_starts):
        raw[row] = source.draws(s, n, stream_id)
    values = np.empty(raw.shape, dtype=np.float64)
    _transform_all(transform, raw.reshape(-1), values.reshape(-1))
    return values
