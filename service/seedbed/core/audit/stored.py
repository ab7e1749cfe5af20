"""A tensor as found in an uploaded file: its description, and a way to load its values."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

# Dtypes whose values are analysed as real numbers, with the unit roundoff of each (half the
# distance from 1 to the next representable number): the rank tolerance scales with it.
FLOAT_ROUNDOFF: dict[str, float] = {
    "float64": 2.0**-53,
    "float32": 2.0**-24,
    "float16": 2.0**-11,
    "bfloat16": 2.0**-8,
}
INTEGER_DTYPES = frozenset(
    {"int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64", "bool"}
)


@dataclass(frozen=True)
class StoredTensor:
    """One tensor of the upload.

    `dtype` is a float name from FLOAT_ROUNDOFF, an integer name from INTEGER_DTYPES, or the
    file's own spelling of a type we do not analyse (then `load` is None). `load()` returns the
    values as stored (C order, native byte order), reading them from the file only then, so
    one tensor at a time is in memory.
    """

    name: str
    dtype: str
    shape: tuple[int, ...]
    nbytes: int
    load: Callable[[], np.ndarray] | None
    note: str | None = None

    @property
    def count(self) -> int:
        n = 1
        for d in self.shape:
            n *= d
        return n

    @property
    def is_float(self) -> bool:
        return self.dtype in FLOAT_ROUNDOFF


@dataclass(frozen=True)
class Upload:
    """What a reader found: the container kind, the tensors in file order, and notes about
    members that are not tensors (kept, so nothing in the file is silently ignored)."""

    container: str  # "npz" | "safetensors"
    tensors: tuple[StoredTensor, ...]
    notes: tuple[str, ...] = ()
    skipped: tuple[str, ...] = ()  # names of members that are not tensors, in file order
