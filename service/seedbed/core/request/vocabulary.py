"""The request's vocabulary: the names a request may use and the numeric bounds they imply.

Literal types (dtypes, layouts, roles, cells, methods ...), the dtype ranges explicit values
must fit, gate orders, and which methods are random. No models here: the models in the
sibling modules are built from these.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Literal

from seedbed_client import wire_facts

DType = Literal["float32", "float64", "float16", "bfloat16"]
Layout = Literal["out_in", "in_out"]
Role = Literal["hidden", "output", "residual_out"]
Cell = Literal["simple", "lstm", "gru"]
WeightMethod = Literal[
    "symmetric_uniform", "glorot", "he", "lecun", "orthogonal", "identity", "constant"
]
Distribution = Literal["uniform", "normal", "truncated_normal"]
Fan = Literal["in", "out", "mean"]


# Largest finite value of each dtype (IEEE 754 binary16/32/64; bfloat16 keeps float32's
# exponent with an 8-bit significand). A test checks these against numpy/ml_dtypes finfo.
DTYPE_MAX: dict[str, float] = {
    "float64": 1.7976931348623157e308,
    "float32": 3.4028234663852886e38,
    "float16": 65504.0,
    "bfloat16": 3.3895313892515355e38,
}
# Smallest positive normal number of each dtype. An explicit std or bound below it would give
# values that are subnormal (a few bits of precision) or round to zero, making units identical.
DTYPE_TINY: dict[str, float] = {
    "float64": 2.2250738585072014e-308,
    "float32": 1.1754943508222875e-38,
    "float16": 6.103515625e-05,
    "bfloat16": 1.1754943508222875e-38,
}
# An explicit gain is a multiplier of order one in every published rule (sqrt(2) for ReLU,
# ~1.59 for tanh, 1 for SELU; branch down-scaling goes to ~1e-2). 1e-6 .. 1e6 leaves ample
# room while keeping every scale derived from it finite and non-zero in float64 arithmetic.
GAIN_MIN = 1e-6
GAIN_MAX = 1e6

# Normal draws come from probabilities no closer to 0 or 1 than 2**-53, whose normal quantile
# is about -8.21 (scipy.special.ndtri); 8.3 bounds |z| with a margin. A std is refused when
# 8.3 * std would not fit the dtype.
NORMAL_EXTREME = 8.3

GATES: Mapping[str, tuple[str, ...]] = wire_facts.GATES
LSTM_GATES: tuple[str, ...] = GATES["lstm"]
GRU_GATES: tuple[str, ...] = GATES["gru"]

RANDOM_METHODS = frozenset({"symmetric_uniform", "glorot", "he", "lecun"})
FAN_METHODS = frozenset({"symmetric_uniform", "he", "lecun"})  # glorot's fan is fixed: mean
# Distribution a random method uses when the override names none: Glorot & Bengio (2010)
# derive their normalised init as a uniform (eq. 16); He et al. (2015) draw from a zero-mean
# Gaussian (eq. 10); LeCun et al. (1998) state the target std, normal is the usual reading.
DEFAULT_DISTRIBUTION: dict[str, str] = {
    "symmetric_uniform": "uniform",
    "glorot": "uniform",
    "he": "normal",
    "lecun": "normal",
}
