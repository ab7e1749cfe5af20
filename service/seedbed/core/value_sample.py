"""A bounded sample of one tensor's served values, its histogram and the density it should follow.

The sample is taken from the values exactly as served (the same rendering that produces the
weights' bytes, rounded to the tensor's dtype), never from a fresh draw of the intended
distribution: the point is to show that the real numbers follow the rationale. It is bounded:
at most `limit` values, read from up to `MAX_BLOCKS` evenly spaced blocks of consecutive served
rows, so the cost does not grow with the tensor beyond rendering the rows it reads. A row longer
than the whole sample is cut to its leading values and read from the start of its byte stream
(which stops at the sample's size where served order is generation order; transposed layouts
render that one row, as serving it does). Orthogonal tensors come out of one factorisation of
the whole matrix, as when they are served.

The intended density is drawn on the histogram's count scale (expected values per bin width at
each x) from the plan's own figures: normal std, uniform bound, the truncated normal's scale and
cut at two standard deviations. Entries of a random orthogonal matrix are only approximately
normal; constants and identities are point masses. Floating point here only draws a picture:
nothing computed in this module feeds a served value.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.render import iter_tensor_bytes, render_rows

DEFAULT_VALUES = 4096
MAX_VALUES = 65536
DEFAULT_BINS = 40
MIN_BINS, MAX_BINS = 5, 200
MAX_BLOCKS = 16
CURVE_POINTS = 161
# The truncated normal is cut at +-2 of its untruncated std (docs/generator.md).
_CUT = 2.0

NOTICE = (
    "A bounded sample of the served values (rounded to the tensor's dtype), read from evenly "
    "spaced blocks of rows; the curve is the density the plan intends, on the histogram's "
    "count scale. Statistics of a sample, not of the whole tensor."
)


def _layout(t: TensorPlan, limit: int) -> tuple[list[tuple[int, int]], int]:
    """([start, stop) row blocks, values kept per row) for at most `limit` values."""
    rows = t.shape[0] if t.shape else 1
    row_len = math.prod(t.shape[1:]) if t.shape else 1
    if rows * row_len <= limit:
        return [(0, rows)], row_len
    per_row = min(row_len, limit)
    wanted = max(1, min(rows, limit // per_row))
    blocks = min(MAX_BLOCKS, wanted)
    each = wanted // blocks
    # floor(i * rows / blocks) are strictly increasing and at least `each` apart here, because
    # blocks * each <= wanted <= rows: the blocks never overlap.
    starts = [i * rows // blocks for i in range(blocks)]
    return [(s, s + each) for s in starts], per_row


def _from_bytes(data: bytes, dtype: str) -> np.ndarray:
    """float64 values of raw little-endian bytes as served (16-bit formats as bit patterns)."""
    if dtype == "bfloat16":
        bits = np.frombuffer(data, dtype="<u2").astype(np.uint32) << 16
        return bits.view(np.float32).astype(np.float64)
    code = {"float64": "<f8", "float32": "<f4", "float16": "<f2"}[dtype]
    return np.frombuffer(data, dtype=code).astype(np.float64)


def _served_rows(
    plan: Plan, t: TensorPlan, blocks: list[tuple[int, int]], per_row: int
) -> list[np.ndarray]:
    """(rows, per_row) float64 arrays of the served values, one per block."""
    if t.sampler == "orthogonal":
        whole = render_rows(plan, t)
        return [
            np.asarray(whole[a:b], dtype=np.float64).reshape(b - a, -1)[:, :per_row]
            for a, b in blocks
        ]
    row_len = math.prod(t.shape[1:]) if t.shape else 1
    if per_row < row_len:
        # One row longer than the whole sample (_layout): read only its first chunk of bytes,
        # which the byte stream cuts at `per_row` values wherever served order is generation
        # order, instead of rendering a row that may hold millions of values.
        ((a, b),) = blocks
        first = next(iter_tensor_bytes(plan, t, a, b, chunk_bytes=per_row * t.itemsize))
        return [_from_bytes(first, t.dtype)[:per_row].reshape(1, per_row)]
    return [
        np.asarray(render_rows(plan, t, a, b), dtype=np.float64).reshape(b - a, -1)
        for a, b in blocks
    ]


def _normal_pdf(x: np.ndarray, std: float) -> np.ndarray:
    z = x / std
    return np.exp(-0.5 * z * z) / (std * math.sqrt(2.0 * math.pi))


def _intended(t: TensorPlan) -> dict[str, Any]:
    """Which law the plan intends, with the figures that fix it."""
    if t.sampler == "normal":
        return {"law": "normal", "std": t.std, "bound": None}
    if t.sampler == "uniform":
        return {"law": "uniform", "std": t.std, "bound": t.bound}
    if t.sampler == "truncated_normal":
        return {"law": "truncated_normal", "std": t.std, "bound": t.bound, "scale": t.scale}
    if t.sampler == "orthogonal":
        return {
            "law": "approximately_normal",
            "std": t.std,
            "bound": None,
            "note": "entries of a random orthogonal matrix are close to normal with this "
            "std, not exactly normal",
        }
    points = sorted(set(t.block_values)) if t.block_values else [t.scale]
    if t.sampler == "identity":
        points = sorted({0.0, t.scale})
    return {"law": "point", "std": t.std, "bound": None, "points": points}


def _support(intended: dict[str, Any]) -> tuple[float, float] | None:
    law = intended["law"]
    if law in ("normal", "approximately_normal") and intended["std"]:
        return -4.0 * intended["std"], 4.0 * intended["std"]
    if law in ("uniform", "truncated_normal") and intended["bound"]:
        return -intended["bound"], intended["bound"]
    return None


def _density(intended: dict[str, Any], x: np.ndarray) -> np.ndarray | None:
    law = intended["law"]
    if law in ("normal", "approximately_normal") and intended["std"]:
        return _normal_pdf(x, float(intended["std"]))
    if law == "uniform" and intended["bound"]:
        b = float(intended["bound"])
        return np.where((x >= -b) & (x <= b), 1.0 / (2.0 * b), 0.0)
    if law == "truncated_normal" and intended["scale"]:
        s = float(intended["scale"])
        mass = math.erf(_CUT / math.sqrt(2.0))
        return np.where(np.abs(x) <= _CUT * s, _normal_pdf(x, s) / mass, 0.0)
    return None


def _edges(values: np.ndarray, intended: dict[str, Any], bins: int) -> np.ndarray:
    lo, hi = float(values.min()), float(values.max())
    support = _support(intended)
    if support is not None:
        lo, hi = min(lo, support[0]), max(hi, support[1])
    if hi <= lo:  # one value only (a constant): a window around it
        half = abs(lo) * 0.5 if lo != 0.0 else 1.0
        lo, hi = lo - half, hi + half
    return np.linspace(lo, hi, bins + 1)


def sample_document(
    plan: Plan, t: TensorPlan, limit: int = DEFAULT_VALUES, bins: int = DEFAULT_BINS
) -> dict[str, Any]:
    """The JSON-ready sample of `t`: where the values came from, the values, their summary, a
    histogram and the intended density on the histogram's count scale."""
    blocks, per_row = _layout(t, limit)
    pieces = _served_rows(plan, t, blocks, per_row)
    values = np.concatenate([p.reshape(-1) for p in pieces])
    finite = values[np.isfinite(values)]
    intended = _intended(t)
    edges = _edges(finite if finite.size else np.zeros(1), intended, bins)
    counts, _ = np.histogram(finite, bins=edges)
    width = float(edges[1] - edges[0])
    curve = None
    x = np.linspace(float(edges[0]), float(edges[-1]), CURVE_POINTS)
    density = _density(intended, x)
    if density is not None:
        curve = {"x": x.tolist(), "y": (density * finite.size * width).tolist()}
    return {
        "tensor": t.tensor,
        "dtype": t.dtype,
        "shape": list(t.shape),
        "total_values": t.count,
        "blocks": [[a, b] for a, b in blocks],
        "values_per_row": per_row,
        "values": values.tolist(),
        "summary": {
            "count": int(values.size),
            "mean": float(finite.mean()) if finite.size else None,
            "std": float(finite.std()) if finite.size else None,
            "min": float(finite.min()) if finite.size else None,
            "max": float(finite.max()) if finite.size else None,
        },
        "histogram": {"edges": edges.tolist(), "counts": counts.tolist()},
        "intended": {**intended, "curve": curve},
        "notice": NOTICE,
    }
