"""seedbed's deterministic random streams (specification: docs/generator.md).

Philox4x64-10 keyed by SHA-256 of (seed, tensor name), one 64-bit draw per value at a fixed
counter position, transformed in float64 with only IEEE basic operations and exact bit
manipulation, then rounded once to the output dtype. Bit-identical across processes, CPU
feature levels, operating systems and supported numpy versions. Imports only numpy (and, for
bfloat16 arrays, ml_dtypes when installed).

This package is the one implementation of the generator: the service renders its responses with
it and the client uses it to generate a plan's tensors locally, so the two cannot drift.
"""

from .fill import DISTRIBUTIONS, fill_standard, standard_runs, standard_values
from .keys import derive_key
from .logarithm import deterministic_log
from .normal_inverse import normal_quantile
from .philox import raw_draws
from .rounding import OUTPUT_DTYPES, round_to_dtype
from .truncation import TRUNCATION_BOUND, TRUNCATION_MASS, TRUNCATION_STD_FACTOR

__all__ = [
    "DISTRIBUTIONS",
    "OUTPUT_DTYPES",
    "TRUNCATION_BOUND",
    "TRUNCATION_MASS",
    "TRUNCATION_STD_FACTOR",
    "derive_key",
    "deterministic_log",
    "fill_standard",
    "normal_quantile",
    "raw_draws",
    "round_to_dtype",
    "standard_runs",
    "standard_values",
]
