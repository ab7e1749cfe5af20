"""Standard values (uniform on [-1, 1), normal, normal truncated to [-2, 2]) for any range
of logical indices, in bounded chunks, optionally on several threads.

Every value depends only on (key, stream, its own index): one 64-bit draw each, and every
transform is elementwise. So chunk size, thread count and where a block starts cannot change
a single byte, and any block equals the same slice of the whole tensor.
"""

from __future__ import annotations

import operator
import os
import threading
from collections.abc import Callable, Sequence
from concurrent.futures import Future, ThreadPoolExecutor

import numpy as np

from . import kernel
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


# A block handed to another thread must be worth the hand-off (tens of microseconds).
_MIN_BLOCK = 1 << 16
_BLOCKS_PER_THREAD = 8
_pool_lock = threading.Lock()
_pool: ThreadPoolExecutor | None = None


def _shared_pool() -> ThreadPoolExecutor:
    """One pool per process, as large as the machine: however many requests ask for threads
    at once, at most cpu_count blocks run beside the requests' own threads."""
    global _pool
    with _pool_lock:
        if _pool is None:
            _pool = ThreadPoolExecutor(
                max_workers=max(1, os.cpu_count() or 1), thread_name_prefix="seedbed-fill"
            )
        return _pool


def _in_blocks(count: int, threads: int, work: Callable[[int, int], None]) -> None:
    """work(lo, hi) over [0, count) on up to `threads` threads, the caller's among them. Each
    value depends only on its own index, so the cut cannot change a byte.

    The range is cut into more blocks than threads, taken in turn: a thread whose core is also
    busy with something else (the response's hashing, another request) takes fewer blocks
    instead of the others waiting for its one large block."""
    workers = max(1, min(threads, count // _MIN_BLOCK))
    if workers == 1:
        work(0, count)
        return
    parts = max(workers, min(workers * _BLOCKS_PER_THREAD, count // _MIN_BLOCK))
    bounds = [count * k // parts for k in range(parts + 1)]
    turn = [0]
    turn_lock = threading.Lock()

    def take_blocks() -> None:
        while True:
            with turn_lock:
                k = turn[0]
                turn[0] += 1
            if k >= parts:
                return
            work(bounds[k], bounds[k + 1])

    pool = _shared_pool()
    futures: list[Future[None]] = [pool.submit(take_blocks) for _ in range(workers - 1)]
    try:
        take_blocks()
    finally:
        for f in futures:
            f.result()


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

    Uses the compiled kernel when it is loaded (kernel.status()), else the numpy reference
    (fill_reference); both give the same bytes. With the kernel, `threads` blocks run at once
    and `chunk` does not matter (the kernel's scratch is a few tens of KiB per thread).
    """
    module = kernel.active()
    if module is None or (isinstance(out, np.ndarray) and not out.flags.c_contiguous):
        fill_reference(dist, key, out, start, threads=threads, chunk=chunk, stream=stream)
        return
    code = _dist_code(dist)
    k0, k1 = check_key(key)
    _check_out(out, (np.float64,))
    first, count = check_range(start, out.shape[0])
    n_threads = _positive_int("threads", threads)
    _positive_int("chunk", chunk)
    stream_id = check_stream(stream)

    def work(lo: int, hi: int) -> None:
        module.fill(code, k0, k1, stream_id, first + lo, 1.0, out[lo:hi])

    _in_blocks(count, n_threads, work)


def fill_scaled(
    dist: str,
    key: PhiloxKey,
    out: np.ndarray,
    start: int,
    scale: float,
    *,
    threads: int = 1,
    stream: int = 0,
) -> None:
    """out[j] = round_to_dtype(standard value of index start + j * scale), for float64 or
    float32 `out`: the same bytes as fill_standard, a multiply and round_to_dtype, without the
    float64 intermediate when the kernel is loaded. Raises ValueError where round_to_dtype
    would (a product beyond the largest float32, a non-finite scale)."""
    code = _dist_code(dist)
    k0, k1 = check_key(key)
    _check_out(out, (np.float64, np.float32))
    first, count = check_range(start, out.shape[0])
    n_threads = _positive_int("threads", threads)
    stream_id = check_stream(stream)
    factor = float(scale)
    if not np.isfinite(factor):
        raise ValueError("values must be finite")
    module = kernel.active()
    overflow: list[bool] = []

    def work(lo: int, hi: int) -> None:
        if module is not None:
            if module.fill(code, k0, k1, stream_id, first + lo, factor, out[lo:hi]):
                overflow.append(True)
            return
        for a in range(lo, hi, DEFAULT_CHUNK):
            b = min(hi, a + DEFAULT_CHUNK)
            values = np.empty(b - a, dtype=np.float64)
            fill_reference(dist, (k0, k1), values, first + a, stream=stream_id)
            values *= factor
            with np.errstate(over="ignore"):
                out[a:b] = values  # float32: one IEEE conversion, as round_to_dtype does
            if not np.isfinite(out[a:b]).all():
                overflow.append(True)

    _in_blocks(count, n_threads, work)
    if overflow:
        raise ValueError("values exceed the largest float32 (about 3.4e38) and would become inf")
    # |standard value| < 8.3, so only a scale near float64's top can overflow a product.
    if out.dtype == np.float64 and abs(factor) > 2.0**1000 and not np.isfinite(out).all():
        raise ValueError("values must be finite")


def _dist_code(dist: str) -> int:
    _transform(dist)
    return kernel.DIST_CODES[dist]


def _check_out(out: object, dtypes: tuple[type, ...]) -> None:
    names = " or ".join(np.dtype(d).name for d in dtypes)
    if (
        not isinstance(out, np.ndarray)
        or out.dtype not in [np.dtype(d) for d in dtypes]
        or out.ndim != 1
        or not out.flags.c_contiguous
    ):
        raise ValueError(f"out must be a one-dimensional contiguous {names} numpy array")
    if not out.flags.writeable:
        raise ValueError("out must be writable")


def fill_reference(
    dist: str,
    key: PhiloxKey,
    out: np.ndarray,
    start: int,
    *,
    threads: int = 1,
    chunk: int = DEFAULT_CHUNK,
    stream: int = 0,
) -> None:
    """The numpy reference of fill_standard (the specification's executable form).

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

    module = kernel.active()
    if module is not None:
        code = kernel.DIST_CODES[dist]
        values = np.empty((len(run_starts), n), dtype=np.float64)
        for row, s in enumerate(run_starts):
            module.fill(code, checked_key[0], checked_key[1], stream_id, s, 1.0, values[row])
        return values

    raw = np.empty((len(run_starts), n), dtype=np.uint64)
    source = DrawSource(checked_key)
    for row, s in enumerate(run_starts):
        raw[row] = source.draws(s, n, stream_id)
    values = np.empty(raw.shape, dtype=np.float64)
    _transform_all(transform, raw.reshape(-1), values.reshape(-1))
    return values
