"""Rounding float64 to the output dtypes: compared with exact rational round-half-even."""

from __future__ import annotations

from fractions import Fraction

import ml_dtypes
import numpy as np
import pytest

from seedbed_client.generator import round_to_dtype

# (stored fraction bits, smallest normal exponent, largest finite) per IEEE 754-2008 binary16
# and binary32, and bfloat16 (8-bit exponent like binary32, 7 stored fraction bits).
FORMATS = {
    "float16": (10, -14, Fraction(65504)),
    "bfloat16": (7, -126, Fraction(2**8 - 1, 2**7) * 2**127),
    "float32": (23, -126, Fraction(2**24 - 1, 2**23) * 2**127),
}


def exact_round(x: float, fraction_bits: int, min_exp: int) -> Fraction:
    """Nearest point of the format's grid to x, ties to even, with Python's exact rationals."""
    v = Fraction(x)
    if v == 0:
        return v
    mag = abs(v)
    e = mag.numerator.bit_length() - mag.denominator.bit_length()
    if Fraction(2) ** e > mag:
        e -= 1
    quantum = Fraction(2) ** (max(e, min_exp) - fraction_bits)
    units = mag / quantum
    low = units.numerator // units.denominator
    rest = units - low
    if rest > Fraction(1, 2) or (rest == Fraction(1, 2) and low % 2 == 1):
        low += 1
    result = low * quantum
    return result if v > 0 else -result


def _sample(fraction_bits: int, min_exp: int, max_finite: Fraction) -> np.ndarray:
    rng = np.random.default_rng(fraction_bits * 1000 + abs(min_exp))
    top = float(max_finite) * 0.999
    logs = rng.uniform(np.log2(2.0**min_exp) - fraction_bits - 3, np.log2(top), 6000)
    values = np.exp2(logs) * rng.choice([-1.0, 1.0], size=logs.size)
    # Exact ties and near-ties on normal and subnormal grids.
    k = rng.integers(1, 2**fraction_bits, size=1000)
    expo = rng.integers(min_exp - fraction_bits, min_exp + 12, size=1000).astype(float)
    ties = (k + 0.5) * np.exp2(expo - fraction_bits)
    near = np.nextafter(ties, np.inf), np.nextafter(ties, -np.inf)
    tiny = np.exp2(float(min_exp - fraction_bits - 1)) * np.array(
        [1.0, 0.5, 1.5, 0.999, -1.0, -1.5]
    )
    return np.concatenate([values, ties, -ties, *near, tiny, [0.0, -0.0]])


@pytest.mark.parametrize("dtype", ["float16", "bfloat16", "float32"])
def test_matches_exact_round_half_even(dtype) -> None:
    fraction_bits, min_exp, max_finite = FORMATS[dtype]
    x = _sample(fraction_bits, min_exp, max_finite)
    x = x[np.abs(x) <= float(max_finite)]
    got = round_to_dtype(x, dtype).astype(np.float64)
    expected = [exact_round(v, fraction_bits, min_exp) for v in x.tolist()]
    mismatches = [
        (v, g, float(e))
        for v, g, e in zip(x.tolist(), got.tolist(), expected, strict=True)
        if Fraction(g) != e
    ]
    assert not mismatches, mismatches[:5]
    # Signed zeros keep their sign, as IEEE conversion does.
    zeros = got == 0
    assert np.array_equal(np.signbit(got[zeros]), np.signbit(x[zeros]))


def test_float16_agrees_with_numpys_scalar_double_to_half() -> None:
    # numpy's scalar conversion from a Python float rounds double -> half directly in
    # software (npy_double_to_half), correctly rounded [from memory]; a second opinion.
    fraction_bits, min_exp, max_finite = FORMATS["float16"]
    x = _sample(fraction_bits, min_exp, max_finite)
    x = x[np.abs(x) < 65504]
    got = round_to_dtype(x, "float16")
    ref = np.array([np.float16(v) for v in x.tolist()], dtype=np.float16)
    assert np.array_equal(got.view(np.uint16), ref.view(np.uint16))


def test_output_dtypes() -> None:
    x = np.array([0.1, -2.5, 3.0])
    assert round_to_dtype(x, "float64").dtype == np.float64
    assert round_to_dtype(x, "float32").dtype == np.float32
    assert round_to_dtype(x, "float16").dtype == np.float16
    assert round_to_dtype(x, "bfloat16").dtype == np.dtype(ml_dtypes.bfloat16)
    assert np.array_equal(round_to_dtype(x, "float64"), x)
    assert round_to_dtype(x.reshape(3, 1), "float16").shape == (3, 1)


def test_double_rounding_case_is_avoided() -> None:
    # 1 + 2**-11 + 2**-40 lies just above a float16 tie. Rounding to float32 first would drop
    # the 2**-40 (leaving an exact tie that goes to even, 1.0); one rounding gives 1 + 2**-10.
    x = np.array([1.0 + 2.0**-11 + 2.0**-40])
    assert float(round_to_dtype(x, "float16")[0]) == 1.0 + 2.0**-10
    y = np.array([1.0 + 2.0**-8 + 2.0**-40])
    assert float(round_to_dtype(y, "bfloat16")[0]) == 1.0 + 2.0**-7


@pytest.mark.parametrize(
    ("dtype", "value"),
    [
        ("float16", 65520.0),
        ("float16", -1e6),
        ("bfloat16", 3.4e38),
        ("float32", 3.5e38),
        ("float32", -1e300),
    ],
)
def test_overflow_is_refused(dtype, value) -> None:
    with pytest.raises(ValueError, match="exceed the largest"):
        round_to_dtype(np.array([1.0, value]), dtype)


def test_largest_values_just_below_overflow_are_kept() -> None:
    assert float(round_to_dtype(np.array([65519.99]), "float16")[0]) == 65504.0


@pytest.mark.parametrize("dtype", ["float64", "float32", "float16", "bfloat16"])
def test_non_finite_is_refused(dtype) -> None:
    with pytest.raises(ValueError, match="finite"):
        round_to_dtype(np.array([1.0, np.nan]), dtype)


def test_bad_dtype_and_input_type() -> None:
    with pytest.raises(ValueError, match="dtype must be one of"):
        round_to_dtype(np.array([1.0]), "int8")
    with pytest.raises(ValueError, match="float64"):
        round_to_dtype(np.array([1.0], dtype=np.float32), "float16")
