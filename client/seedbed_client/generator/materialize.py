"""Values of one planned tensor — whole, a block of served rows, or a stream of bytes — from a
plain recipe that the service publishes with every plan entry.

Random tensors are generated in logical order (output axis first) from the tensor's own
counter-based stream, so a block of served rows is computed without the rest of the tensor and
equals the same slice of the whole, byte for byte:

* served axes in logical order (layout out_in, 1-D tensors, embeddings): the block is one
  contiguous run of logical indices;
* transposed layouts (in_out): the block is a slice along a later logical axis. When the pieces
  it needs from each leading index are long, each piece is drawn on its own (one run per output
  unit); when they are short (convolution kernels), leading rows are drawn in bounded contiguous
  batches and the slice kept, which costs the whole tensor but never more memory than a batch.

Orthogonal tensors need a QR factorisation of the whole matrix, so a block of one costs the whole
tensor; their bits may differ between LAPACK builds (`reproducible: platform`).
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np

from .fill import fill_scaled, fill_standard, standard_runs
from .keys import derive_key
from .rounding import round_to_dtype

# How values are produced (the recipe's `sampler`):
#   uniform            scale * U[-1, 1)                      (bound = scale)
#   normal             scale * N(0, 1)                       (std = scale)
#   truncated_normal   scale * N(0, 1) truncated to [-2, 2]  (std = scale * truncation factor)
#   orthogonal         scale * Haar-orthogonal blocks (one per gate block along the output axis)
#   identity           scale * identity / Dirac delta (per gate block for recurrent weights)
#   constant           every element equals `scale` (or one value per gate block)
SAMPLERS = ("uniform", "normal", "truncated_normal", "orthogonal", "identity", "constant")
RANDOM_SAMPLERS = ("uniform", "normal", "truncated_normal")

# Runs shorter than this are cheaper to draw as part of whole contiguous batches.
_MIN_RUN = 256
# Logical values per contiguous batch on the slicing path (8 bytes each, plus the transform's).
_BATCH_VALUES = 1 << 20
_LITTLE_ENDIAN = {"float64": "<f8", "float32": "<f4", "float16": "<u2", "bfloat16": "<u2"}
ITEMSIZE = {"float64": 8, "float32": 4, "float16": 2, "bfloat16": 2}


@dataclass(frozen=True)
class TensorRecipe:
    """Everything the generator needs for one tensor; nothing about why it was chosen."""

    seed: int | str
    tensor: str  # the stream's name: "<layer>.weight", ...
    sampler: str  # one of SAMPLERS
    scale: float
    dtype: str  # float32 | float64 | float16 | bfloat16
    logical_shape: tuple[int, ...]  # generation order: output axis first
    served_axes: tuple[int, ...]  # served array = logical array.transpose(served_axes)
    gate_blocks: int = 1
    block_values: tuple[float, ...] | None = None

    @property
    def shape(self) -> tuple[int, ...]:
        """The served shape."""
        return tuple(self.logical_shape[a] for a in self.served_axes)

    @property
    def itemsize(self) -> int:
        return ITEMSIZE[self.dtype]

    @property
    def platform_dependent(self) -> bool:
        """True where the bits come from LAPACK (QR) and may differ between builds."""
        return self.sampler == "orthogonal"

    def document(self) -> dict[str, Any]:
        """The JSON form published in each plan entry (`generation`); the seed is plan-wide."""
        return {
            "sampler": self.sampler,
            "scale": self.scale,
            "logical_shape": list(self.logical_shape),
            "served_axes": list(self.served_axes),
            "gate_blocks": self.gate_blocks,
            "block_values": None if self.block_values is None else list(self.block_values),
        }

    @classmethod
    def from_plan_entry(cls, seed: int | str, dtype: str, entry: Mapping[str, Any]) -> TensorRecipe:
        """The recipe of one entry of a plan response (`seed` and `dtype` from the plan)."""
        try:
            gen = entry["generation"]
            block = gen.get("block_values")
            recipe = cls(
                seed=seed,
                tensor=str(entry["tensor"]),
                sampler=str(gen["sampler"]),
                scale=float(gen["scale"]),
                dtype=str(entry.get("dtype", dtype)),
                logical_shape=tuple(int(d) for d in gen["logical_shape"]),
                served_axes=tuple(int(a) for a in gen["served_axes"]),
                gate_blocks=int(gen.get("gate_blocks", 1)),
                block_values=None if block is None else tuple(float(v) for v in block),
            )
        except (KeyError, TypeError, ValueError, AttributeError) as exc:
            raise ValueError(
                f"plan entry {entry.get('tensor')!r} has no usable 'generation' recipe: {exc}"
            ) from None
        if recipe.sampler not in SAMPLERS:
            raise ValueError(f"unknown sampler {recipe.sampler!r} in the plan entry")
        if sorted(recipe.served_axes) != list(range(len(recipe.logical_shape))):
            raise ValueError(f"served_axes {recipe.served_axes} is not a permutation")
        if list(recipe.shape) != [int(d) for d in entry.get("shape", recipe.shape)]:
            raise ValueError(f"the recipe of {recipe.tensor!r} does not give its served shape")
        return recipe


def block_shape(r: TensorRecipe, start: int, stop: int) -> tuple[int, ...]:
    """Served shape of rows [start, stop)."""
    return (stop - start, *r.shape[1:])


def check_block(r: TensorRecipe, start: int, stop: int | None) -> int:
    end = r.shape[0] if stop is None else stop
    if not 0 <= start <= end <= r.shape[0]:
        raise ValueError(f"rows [{start}, {end}) outside 0..{r.shape[0]} for {r.tensor}")
    return end


def _standard_block(r: TensorRecipe, start: int, stop: int, threads: int) -> np.ndarray:
    """Standard (unscaled) float64 values of served rows [start, stop), in served layout."""
    key = derive_key(r.seed, r.tensor)
    logical = r.logical_shape
    axes = r.served_axes
    if axes == tuple(range(len(logical))):
        row = math.prod(logical[1:])
        out = np.empty((stop - start) * row, dtype=np.float64)
        fill_standard(r.sampler, key, out, start * row, threads=threads)
        return out.reshape(block_shape(r, start, stop))

    # The served first axis is logical axis p; the block is logical[..., start:stop, ...] on p.
    p = axes[0]
    lead = math.prod(logical[:p])
    span = logical[p]
    inner = math.prod(logical[p + 1 :])
    run = (stop - start) * inner
    sliced_shape = (*logical[:p], stop - start, *logical[p + 1 :])
    if run >= _MIN_RUN:
        starts = np.arange(lead, dtype=np.int64) * (span * inner) + start * inner
        values = standard_runs(r.sampler, key, starts, run)
    else:
        values = np.empty((lead, run), dtype=np.float64)
        per_lead = span * inner
        batch = max(1, _BATCH_VALUES // per_lead)
        for a in range(0, lead, batch):
            b = min(lead, a + batch)
            chunk = np.empty((b - a) * per_lead, dtype=np.float64)
            fill_standard(r.sampler, key, chunk, a * per_lead, threads=threads)
            values[a:b] = chunk.reshape(b - a, span, inner)[:, start:stop, :].reshape(b - a, run)
    return values.reshape(sliced_shape).transpose(axes)


def _orthogonal_logical(r: TensorRecipe) -> np.ndarray:
    """gain * Haar-distributed (semi-)orthogonal blocks, stacked along the logical output axis.

    Each gate block is flattened to (rows, cols) = (block outputs, everything else); the Gaussian
    matrix comes from the tensor's own stream and Q of its QR factorisation is sign-corrected
    with diag(R) so that the result is Haar-distributed (Mezzadri 2007). For rows > cols the
    factorisation runs on the transpose, so the columns are orthonormal instead.
    """
    key = derive_key(r.seed, r.tensor)
    total = math.prod(r.logical_shape)
    gauss = np.empty(total, dtype=np.float64)
    fill_standard("normal", key, gauss, 0)
    blocks = r.gate_blocks
    rows = r.logical_shape[0] // blocks
    cols = total // r.logical_shape[0]
    mats = gauss.reshape(blocks, rows, cols)
    out = np.empty_like(mats)
    for k in range(blocks):
        g = mats[k] if rows <= cols else mats[k].T
        q, rr = np.linalg.qr(g.T)  # q: (cols, rows) with orthonormal columns
        q = q * np.sign(np.diagonal(rr))
        out[k] = q.T if rows <= cols else q
    return (out * r.scale).reshape(r.logical_shape)


def _identity_block(r: TensorRecipe, start: int, stop: int) -> np.ndarray:
    """gain on the identity (dense, recurrent gate blocks) or the centre tap (conv Dirac delta)."""
    logical = r.logical_shape
    blocks = r.gate_blocks
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
    served = [coords[a] for a in r.served_axes]
    inside = (served[0] >= start) & (served[0] < stop)
    out = np.zeros(block_shape(r, start, stop), dtype=np.float64)
    out[(served[0][inside] - start, *(s[inside] for s in served[1:]))] = r.scale
    return out


def _block_values(r: TensorRecipe, start: int, stop: int) -> np.ndarray:
    """Per-gate constants (an LSTM bias with its forget block at 1) for rows of a 1-D tensor."""
    assert r.block_values is not None
    per_block = r.logical_shape[0] // len(r.block_values)
    full = np.repeat(np.asarray(r.block_values, dtype=np.float64), per_block)
    return full[start:stop]


def _flat_values(r: TensorRecipe, first: int, last: int, threads: int = 1) -> np.ndarray:
    """Logical elements [first, last) of a tensor served in generation order, in r.dtype."""
    if r.sampler == "constant":
        if r.block_values is not None:
            values = _block_values(r, first, last)
        else:
            values = np.full(last - first, r.scale, dtype=np.float64)
    elif r.dtype in ("float32", "float64"):
        # The scaling and the one rounding happen inside the generator: no float64 copy.
        out = np.empty(last - first, dtype=r.dtype)
        fill_scaled(r.sampler, derive_key(r.seed, r.tensor), out, first, r.scale, threads=threads)
        return out
    else:
        values = np.empty(last - first, dtype=np.float64)
        fill_standard(r.sampler, derive_key(r.seed, r.tensor), values, first, threads=threads)
        values *= r.scale
    return round_to_dtype(values, r.dtype)


def render_float64(
    r: TensorRecipe, start: int = 0, stop: int | None = None, *, threads: int = 1
) -> np.ndarray:
    """float64 values of served rows [start, stop) before the single rounding to r.dtype."""
    end = check_block(r, start, stop)
    if r.sampler == "constant":
        if r.block_values is not None:
            return _block_values(r, start, end)
        return np.full(block_shape(r, start, end), r.scale, dtype=np.float64)
    if r.sampler == "identity":
        return _identity_block(r, start, end)
    if r.sampler == "orthogonal":
        whole = _orthogonal_logical(r).transpose(r.served_axes)
        return np.ascontiguousarray(whole[start:end])
    values = _standard_block(r, start, end, threads)
    values *= r.scale  # one correctly rounded product per value: identical everywhere
    return values


def render_rows(
    r: TensorRecipe, start: int = 0, stop: int | None = None, *, threads: int = 1
) -> np.ndarray:
    """Rows [start, stop) of the served first axis, in r.dtype (ml_dtypes.bfloat16 for bfloat16)."""
    end = check_block(r, start, stop)
    if r.sampler not in ("orthogonal", "identity") and r.served_axes == tuple(
        range(len(r.logical_shape))
    ):
        # Served in generation order: the path the streamed bytes take (for float32/float64 the
        # generator scales and rounds once, straight into the output dtype), the same values as
        # below without a float64 copy and a second pass.
        row = math.prod(r.logical_shape[1:])
        return _flat_values(r, start * row, end * row, threads).reshape(block_shape(r, start, end))
    values = render_float64(r, start, stop, threads=threads)
    return round_to_dtype(np.ascontiguousarray(values), r.dtype)


def to_little_endian_bytes(values: np.ndarray, dtype: str) -> bytes:
    """Raw little-endian C-order bytes (16-bit formats by their bit patterns)."""
    target = _LITTLE_ENDIAN[dtype]
    if dtype in ("float16", "bfloat16"):
        values = values.view(np.uint16)
    return np.ascontiguousarray(values).astype(target, copy=False).tobytes()


def iter_tensor_bytes(
    r: TensorRecipe,
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
    end = check_block(r, start, stop)
    if r.sampler == "orthogonal":
        whole = round_to_dtype(render_float64(r, start, end), r.dtype)
        data = to_little_endian_bytes(whole, r.dtype)
        for i in range(0, len(data), chunk_bytes):
            yield data[i : i + chunk_bytes]
        return
    if r.sampler != "identity" and r.served_axes == tuple(range(len(r.logical_shape))):
        # Served order is generation order: cut by elements, so even one huge row stays bounded.
        row = math.prod(r.shape[1:])
        step = max(1, chunk_bytes // r.itemsize)
        first, last = start * row, end * row
        for a in range(first, last, step):
            b = min(last, a + step)
            yield to_little_endian_bytes(_flat_values(r, a, b, threads), r.dtype)
        return
    row_bytes = max(1, math.prod(r.shape[1:]) * r.itemsize)
    step = max(1, chunk_bytes // row_bytes)
    for a in range(start, end, step):
        b = min(end, a + step)
        yield to_little_endian_bytes(render_rows(r, a, b, threads=threads), r.dtype)
