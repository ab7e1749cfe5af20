"""Values for a planned tensor: whole, as a block of served rows, or as a stream of bytes.

Random tensors are generated in logical order (output axis first, see `TensorPlan`) from the
tensor's own counter-based stream, so a block of served rows is computed without the rest of
the tensor and equals the same slice of the whole, byte for byte:

* served axes in logical order (layout out_in, 1-D tensors, embeddings): the block is one
  contiguous run of logical indices;
* transposed layouts (in_out): the block is a slice along a later logical axis. When the pieces
  it needs from each leading index are long, each piece is drawn on its own (one run per output
  unit); when they are short (convolution kernels), leading rows are drawn in bounded contiguous
  batches and the slice kept, which costs the whole tensor but never more memory than a batch.

Orthogonal tensors need a QR factorisation of the whole matrix, so a block of one costs the whole
tensor; their bits may differ between BLAS builds (`reproducible: platform`).
"""

from __future__ import annotations

import math
from collections.abc import Iterator

import numpy as np

from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.problems import Problem, RequestRejected
from seedbed.core.rng import derive_key, fill_standard, round_to_dtype, standard_runs
from seedbed.core.rng.fill import fill_scaled

# Runs shorter than this are cheaper to draw as part of whole contiguous batches.
_MIN_RUN = 256
# Logical values per contiguous batch on the slicing path (8 bytes each, plus the transform's).
_BATCH_VALUES = 1 << 20
_LITTLE_ENDIAN = {"float64": "<f8", "float32": "<f4", "float16": "<u2", "bfloat16": "<u2"}


def _prod(shape: tuple[int, ...]) -> int:
    return math.prod(shape)


def block_shape(t: TensorPlan, start: int, stop: int) -> tuple[int, ...]:
    """Served shape of rows [start, stop) of `t`."""
    return (stop - start, *t.shape[1:])


def parse_rows(text: str, t: TensorPlan) -> tuple[int, int]:
    """Parse 'START:STOP' for the served first axis of `t` (STOP exclusive, both required)."""
    rows = t.shape[0]
    allowed = (f"START:STOP with 0 <= START < STOP <= {rows} "
               f"(rows of {t.tensor}, shape {list(t.shape)})")
    parts = text.split(":")
    if len(parts) != 2 or not all(p.isdigit() and len(p) <= 19 for p in parts):
        problem = Problem("rows", "invalid_value", f"rows must be {allowed}; got {text!r}")
        raise RequestRejected([problem])
    start, stop = int(parts[0]), int(parts[1])
    if not 0 <= start < stop <= rows:
        problem = Problem("rows", "out_of_range", f"rows must be {allowed}; got {text!r}")
        raise RequestRejected([problem])
    return start, stop


def _check_block(t: TensorPlan, start: int, stop: int | None) -> int:
    end = t.shape[0] if stop is None else stop
    if not 0 <= start <= end <= t.shape[0]:
        raise ValueError(f"rows [{start}, {end}) outside 0..{t.shape[0]} for {t.tensor}")
    return end


def _standard_block(plan: Plan, t: TensorPlan, start: int, stop: int, threads: int) -> np.ndarray:
    """Standard (unscaled) float64 values of served rows [start, stop), in served layout."""
    assert t.distribution is not None
    dist = t.sampler
    key = derive_key(plan.seed, t.tensor)
    logical = t.logical_shape
    axes = t.served_axes
    if axes == tuple(range(len(logical))):
        row = _prod(logical[1:])
        out = np.empty((stop - start) * row, dtype=np.float64)
        fill_standard(dist, key, out, start * row, threads=threads)
        return out.reshape(block_shape(t, start, stop))

    # The served first axis is logical axis p; the block is logical[..., start:stop, ...] on p.
    p = axes[0]
    lead = _prod(logical[:p])
    span = logical[p]
    inner = _prod(logical[p + 1 :])
    run = (stop - start) * inner
    sliced_shape = (*logical[:p], stop - start, *logical[p + 1 :])
    if run >= _MIN_RUN:
        starts = np.arange(lead, dtype=np.int64) * (span * inner) + start * inner
        values = standard_runs(dist, key, starts, run)
    else:
        values = np.empty((lead, run), dtype=np.float64)
        per_lead = span * inner
        batch = max(1, _BATCH_VALUES // per_lead)
        for a in range(0, lead, batch):
            b = min(lead, a + batch)
            chunk = np.empty((b - a) * per_lead, dtype=np.float64)
            fill_standard(dist, key, chunk, a * per_lead, threads=threads)
            values[a:b] = chunk.reshape(b - a, span, inner)[:, start:stop, :].reshape(b - a, run)
    return values.reshape(sliced_shape).transpose(axes)


def _orthogonal_logical(plan: Plan, t: TensorPlan) -> np.ndarray:
    """gain * Haar-distributed (semi-)orthogonal blocks, stacked along the logical output axis.

    Each gate block is flattened to (rows, cols) = (block outputs, everything else); the Gaussian
    matrix comes from the tensor's own stream and Q of its QR factorisation is sign-corrected
    with diag(R) so that the result is Haar-distributed (Mezzadri 2007). For rows > cols the
    factorisation runs on the transpose, so the columns are orthonormal instead.
    """
    key = derive_key(plan.seed, t.tensor)
    total = _prod(t.logical_shape)
    gauss = np.empty(total, dtype=np.float64)
    fill_standard("normal", key, gauss, 0)
    blocks = t.gate_blocks
    rows = t.logical_shape[0] // blocks
    cols = total // t.logical_shape[0]
    mats = gauss.reshape(blocks, rows, cols)
    out = np.empty_like(mats)
    for k in range(blocks):
        g = mats[k] if rows <= cols else mats[k].T
        q, r = np.linalg.qr(g.T)  # q: (cols, rows) with orthonormal columns
        q = q * np.sign(np.diagonal(r))
        out[k] = q.T if rows <= cols else q
    return (out * t.scale).reshape(t.logical_shape)


def _identity_block(t: TensorPlan, start: int, stop: int) -> np.ndarray:
    """gain on the identity (dense, recurrent gate blocks) or the centre tap (conv Dirac delta)."""
    logical = t.logical_shape
    blocks = t.gate_blocks
    rows = logical[0] // blocks
    channels_in = logical[1]
    centre = tuple(k // 2 for k in logical[2:])
    unit = np.arange(rows)
    keep = unit < channels_in  # rectangular cases leave extra outputs at zero
    coords = [
        np.concatenate([unit[keep] + k * rows for k in range(blocks)]),
        np.tile(unit[keep], blocks),
        *(np.full(int(keep.sum()) * blocks, c) for c in centre),
    ]
    served = [coords[a] for a in t.served_axes]
    inside = (served[0] >= start) & (served[0] < stop)
    out = np.zeros(block_shape(t, start, stop), dtype=np.float64)
    out[(served[0][inside] - start, *(s[inside] for s in served[1:]))] = t.scale
    return out


def _block_values(t: TensorPlan, start: int, stop: int) -> np.ndarray:
    """Per-gate constants (an LSTM bias with its forget block at 1) for rows of a 1-D tensor."""
    assert t.block_values is not None
    per_block = t.logical_shape[0] // len(t.block_values)
    full = np.repeat(np.asarray(t.block_values, dtype=np.float64), per_block)
    return full[start:stop]


def _flat_values(plan: Plan, t: TensorPlan, first: int, last: int, threads: int = 1) -> np.ndarray:
    """Logical elements [first, last) of a tensor served in generation order, in t.dtype."""
    if t.sampler == "constant":
        if t.block_values is not None:
            values = _block_values(t, first, last)
        else:
            values = np.full(last - first, t.scale, dtype=np.float64)
    elif t.dtype in ("float32", "float64"):
        # Scaling and the one rounding happen inside the generator: no float64 copy.
        out = np.empty(last - first, dtype=t.dtype)
        key = derive_key(plan.seed, t.tensor)
        fill_scaled(t.sampler, key, out, first, t.scale, threads=threads)
        return out
    else:
        values = np.empty(last - first, dtype=np.float64)
        fill_standard(t.sampler, derive_key(plan.seed, t.tensor), values, first, threads=threads)
        values *= t.scale
    return round_to_dtype(values, t.dtype)


def render_float64(
    plan: Plan, t: TensorPlan, start: int = 0, stop: int | None = None, *, threads: int = 1
) -> np.ndarray:
    """float64 values of served rows [start, stop) before the single rounding to t.dtype."""
    end = _check_block(t, start, stop)
    if t.sampler == "constant":
        if t.block_values is not None:
            return _block_values(t, start, end)
        return np.full(block_shape(t, start, end), t.scale, dtype=np.float64)
    if t.sampler == "identity":
        return _identity_block(t, start, end)
    if t.sampler == "orthogonal":
        whole = _orthogonal_logical(plan, t).transpose(t.served_axes)
        return np.ascontiguousarray(whole[start:end])
    values = _standard_block(plan, t, start, end, threads)
    values *= t.scale  # one correctly rounded product per value: identical everywhere
    return values


def render_rows(
    plan: Plan, t: TensorPlan, start: int = 0, stop: int | None = None, *, threads: int = 1
) -> np.ndarray:
    """Rows [start, stop) of the served first axis, in t.dtype (ml_dtypes.bfloat16 for bfloat16)."""
    values = render_float64(plan, t, start, stop, threads=threads)
    return round_to_dtype(np.ascontiguousarray(values), t.dtype)


def to_little_endian_bytes(values: np.ndarray, dtype: str) -> bytes:
    """Raw little-endian C-order bytes (16-bit formats by their bit patterns)."""
    target = _LITTLE_ENDIAN[dtype]
    if dtype in ("float16", "bfloat16"):
        values = values.view(np.uint16)
    return np.ascontiguousarray(values).astype(target, copy=False).tobytes()


def iter_tensor_bytes(
    plan: Plan,
    t: TensorPlan,
    start: int = 0,
    stop: int | None = None,
    *,
    chunk_bytes: int = 8 << 20,
    threads: int = 1,
) -> Iterator[bytes]:
    """The block's raw bytes in pieces of about `chunk_bytes` (at least one served row each).

    Memory stays near `chunk_bytes` times the float64 expansion (8 / itemsize) for every sampler
    except orthogonal, which computes its whole matrix once per call.
    """
    end = _check_block(t, start, stop)
    if t.sampler == "orthogonal":
        whole = round_to_dtype(render_float64(plan, t, start, end), t.dtype)
        data = to_little_endian_bytes(whole, t.dtype)
        for i in range(0, len(data), chunk_bytes):
            yield data[i : i + chunk_bytes]
        return
    if t.sampler != "identity" and t.served_axes == tuple(range(len(t.logical_shape))):
        # Served order is generation order: cut by elements, so even one huge row stays bounded.
        row = _prod(t.shape[1:])
        step = max(1, chunk_bytes // t.itemsize)
        first, last = start * row, end * row
        for a in range(first, last, step):
            b = min(last, a + step)
            yield to_little_endian_bytes(_flat_values(plan, t, a, b, threads), t.dtype)
        return
    row_bytes = max(1, _prod(t.shape[1:]) * t.itemsize)
    step = max(1, chunk_bytes // row_bytes)
    for a in range(start, end, step):
        b = min(end, a + step)
        yield to_little_endian_bytes(render_rows(plan, t, a, b, threads=threads), t.dtype)
