"""Make a plan's tensors in this process: the service decides (one plan call), we make the bytes.

Every plan entry carries its `generation` recipe; `seedbed_client.generator.materialize` is the
same code the service renders its responses with, so a tensor made here has the bytes
/v1/weights serves for it, byte for byte (docs/generator.md).

Orthogonal tensors are the exception: their bits come from LAPACK's QR and may differ in the
last place between builds (`reproducible: platform`). By default they are fetched from the
service (one `tensor=` call each, cached like any weights response), so a local result always
equals the service's; `platform_tensors="generate"` makes them here instead and lists them in
`WeightSet.platform_made`, for machines that cannot reach the service for them.
"""

from __future__ import annotations

import hashlib
import importlib.util
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np

from seedbed_client.containers import numpy_dtype
from seedbed_client.errors import IntegrityError, Problem, SpecInvalid
from seedbed_client.generator.materialize import TensorRecipe, iter_tensor_bytes

Origin = Literal["service", "local"]
ORIGINS: tuple[Origin, ...] = ("service", "local")
PlatformChoice = Literal["fetch", "generate"]
PLATFORM_CHOICES: tuple[PlatformChoice, ...] = ("fetch", "generate")
# Bytes generated per piece: bounds the float64 working set next to the output array.
CHUNK_BYTES = 8 << 20


def check_origin(origin: str) -> Origin:
    if origin not in ORIGINS:
        raise SpecInvalid(
            [Problem("origin", "not_allowed", f"got {origin!r}; allowed: service, local")]
        )
    return origin


def check_platform(choice: str) -> PlatformChoice:
    if choice not in PLATFORM_CHOICES:
        raise SpecInvalid(
            [
                Problem(
                    "platform_tensors", "not_allowed", f"got {choice!r}; allowed: fetch, generate"
                )
            ]
        )
    return choice


@dataclass(frozen=True)
class MadeTensor:
    name: str
    array: np.ndarray
    sha256: str
    platform: bool  # made here although its bits depend on the platform


def recipes_of(plan: Mapping[str, Any]) -> list[tuple[dict[str, Any], TensorRecipe]]:
    """(plan entry, recipe) for every tensor; IntegrityError when the plan cannot be used."""
    seed, dtype = plan.get("seed"), plan.get("dtype")
    if not isinstance(seed, int | str) or not isinstance(dtype, str):
        raise IntegrityError("the plan has no usable seed and dtype; cannot generate locally")
    if dtype == "bfloat16" and importlib.util.find_spec("ml_dtypes") is None:
        raise SpecInvalid(
            [
                Problem(
                    "origin",
                    "needs_extra",
                    "generating bfloat16 locally rounds with ml_dtypes, which is not installed: "
                    "pip install 'seedbed-client[bfloat16]', or use origin='service'",
                )
            ]
        )
    out = []
    for entry in plan.get("tensors", []):
        try:
            out.append((dict(entry), TensorRecipe.from_plan_entry(seed, dtype, entry)))
        except ValueError as exc:
            raise IntegrityError(
                f"cannot generate locally: {exc}; a service older than the shared generator "
                "does not publish recipes, so use origin='service'"
            ) from None
    return out


def platform_names(plan: Mapping[str, Any], only: str | None, choice: PlatformChoice) -> list[str]:
    """The platform-dependent tensors to fetch from the service (none when generating)."""
    if choice != "fetch":
        return []
    return [
        str(e["tensor"])
        for e in plan.get("tensors", [])
        if (only is None or e.get("tensor") == only)
        and (e.get("generation") or {}).get("sampler") == "orthogonal"
    ]


def make_tensor(
    recipe: TensorRecipe, rows: tuple[int, int] | None = None, threads: int = 1
) -> tuple[np.ndarray, str]:
    """One tensor (or its rows [start, stop)) as an array of its dtype, and its sha256.

    Generated piece by piece straight into the output array: memory is the result plus one
    piece's float64 working set (orthogonal tensors: their whole matrix)."""
    start, stop = (0, recipe.shape[0]) if rows is None else rows
    if not 0 <= start < stop <= recipe.shape[0]:
        raise SpecInvalid(
            [
                Problem(
                    "rows",
                    "out_of_range",
                    f"rows {start}:{stop} of {recipe.tensor!r}; allowed: "
                    f"0 <= START < STOP <= {recipe.shape[0]}",
                )
            ]
        )
    shape = (stop - start, *recipe.shape[1:])
    out = np.empty(shape, dtype=numpy_dtype(recipe.dtype))
    flat = memoryview(out.reshape(-1).view(np.uint8).data)
    sha = hashlib.sha256()
    at = 0
    for piece in iter_tensor_bytes(recipe, start, stop, chunk_bytes=CHUNK_BYTES, threads=threads):
        flat[at : at + len(piece)] = piece
        sha.update(piece)
        at += len(piece)
    if at != len(flat):
        raise IntegrityError(f"{recipe.tensor}: generated {at} bytes, expected {len(flat)}")
    return out, sha.hexdigest()


def make_tensors(
    plan: Mapping[str, Any],
    *,
    only: str | None = None,
    rows: tuple[int, int] | None = None,
    platform_tensors: PlatformChoice = "fetch",
    fetch: Callable[[str, tuple[int, int] | None], np.ndarray] | None = None,
    threads: int = 1,
) -> tuple[list[dict[str, Any]], list[MadeTensor]]:
    """Every tensor of the plan (or `only`, optionally its `rows`): (manifest entries, tensors).

    Platform-dependent tensors are fetched with `fetch(name, rows)` when `platform_tensors` is
    "fetch", else generated and marked."""
    chosen = recipes_of(plan)
    if only is not None:
        chosen = [(e, r) for e, r in chosen if r.tensor == only]
        if not chosen:
            raise SpecInvalid(
                [Problem("tensor", "unknown_tensor", f"{only!r} is not a tensor of this request")]
            )
    entries: list[dict[str, Any]] = []
    made: list[MadeTensor] = []
    for entry, recipe in chosen:
        entry.pop("generation", None)
        if recipe.platform_dependent and platform_tensors == "fetch":
            if fetch is None:
                raise SpecInvalid(
                    [
                        Problem(
                            "platform_tensors",
                            "needs_service",
                            f"{recipe.tensor} is orthogonal (platform-dependent) "
                            "and nothing can fetch it",
                        )
                    ]
                )
            array = np.ascontiguousarray(fetch(recipe.tensor, rows))
            digest = hashlib.sha256(array.reshape(-1).view(np.uint8).data).hexdigest()
            made.append(MadeTensor(recipe.tensor, array, digest, False))
        else:
            array, digest = make_tensor(recipe, rows, threads)
            made.append(MadeTensor(recipe.tensor, array, digest, recipe.platform_dependent))
        if rows is not None:
            entry["shape"] = list(array.shape)
            entry["rows"] = [rows[0], rows[1]]
        entry["sha256"] = digest
        entries.append(entry)
    return entries, made


def local_manifest(plan: Mapping[str, Any], entries: Iterable[dict[str, Any]]) -> dict[str, Any]:
    return {
        "algorithm": plan.get("algorithm"),
        "seed": plan.get("seed"),
        "dtype": plan.get("dtype"),
        "layout": plan.get("layout"),
        "made_locally": True,
        "tensors": list(entries),
    }


def expected_digests(
    plan: Mapping[str, Any],
    fetch_digest: Callable[[str], str] | None = None,
    threads: int = 1,
) -> dict[str, tuple[str, bool]]:
    """Tensor name -> (sha256 of its bytes, made here although platform-dependent), computed
    piece by piece without holding any tensor (orthogonal: one matrix at a time).

    Platform-dependent tensors are asked of `fetch_digest(name)` when given (the service's
    bytes are the reference), else generated here and marked."""
    out: dict[str, tuple[str, bool]] = {}
    for _, recipe in recipes_of(plan):
        if recipe.platform_dependent and fetch_digest is not None:
            out[recipe.tensor] = (fetch_digest(recipe.tensor), False)
            continue
        sha = hashlib.sha256()
        for piece in iter_tensor_bytes(recipe, chunk_bytes=CHUNK_BYTES, threads=threads):
            sha.update(piece)
        out[recipe.tensor] = (sha.hexdigest(), recipe.platform_dependent)
    return out
