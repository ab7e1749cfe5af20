"""The published test vectors: the code reproduces them, and docs/generator.md shows them."""

from __future__ import annotations

import hashlib
import json
import re
from pathlib import Path

import numpy as np
import pytest

from seedbed_client.generator import (
    TRUNCATION_MASS,
    TRUNCATION_STD_FACTOR,
    derive_key,
    raw_draws,
    round_to_dtype,
    standard_values,
)
from seedbed_client.generator.logarithm import LN2_HI, LN2_LO, SERIES
from seedbed_client.generator.normal_inverse import (
    AS241_A,
    AS241_B,
    AS241_C,
    AS241_D,
    AS241_E,
    AS241_F,
)
from test_rng_philox import reference_philox4x64_10

ROOT = Path(__file__).resolve().parents[1]
VECTORS = json.loads((ROOT / "tests" / "vectors" / "rng_vectors.json").read_text(encoding="utf-8"))
DOC = (ROOT / "docs" / "generator.md").read_text(encoding="utf-8")
CASES = VECTORS["cases"]
BITS = {"float32": np.uint32, "float16": np.uint16, "bfloat16": np.uint16}


def test_document_shows_exactly_the_vector_file() -> None:
    block = re.search(
        r"<!-- vectors:begin -->\s*```json\n(.*?)```\s*<!-- vectors:end -->", DOC, re.S
    )
    assert block, "docs/generator.md must hold the vectors between the vectors markers"
    assert json.loads(block.group(1)) == VECTORS


def test_document_prints_the_constants_the_code_uses() -> None:
    for value in (TRUNCATION_MASS, TRUNCATION_STD_FACTOR):
        assert f"{value:.17g}" in DOC
    for value in (LN2_HI, LN2_LO, *SERIES):
        assert value.hex() in DOC
    for coeffs in (AS241_A, AS241_B, AS241_C, AS241_D, AS241_E, AS241_F):
        for c in coeffs:  # as float.hex: the exact doubles
            assert c.hex() in DOC, c


@pytest.mark.parametrize("case", CASES, ids=lambda c: str(c["seed"]))
def test_key_derivation(case) -> None:
    message = bytes.fromhex(case["hash_input_hex"])
    assert hashlib.sha256(message).hexdigest() == case["sha256_hex"]
    digest = bytes.fromhex(case["sha256_hex"])
    words = [int.from_bytes(digest[i : i + 8], "little") for i in (0, 8)]
    assert [f"{w:016x}" for w in words] == case["key_words_hex"]
    assert derive_key(case["seed"], case["tensor_name"]) == tuple(words)


@pytest.mark.parametrize("case", CASES, ids=lambda c: str(c["seed"]))
def test_raw_draws(case) -> None:
    key = derive_key(case["seed"], case["tensor_name"])
    n = VECTORS["count"]
    assert [f"{int(x):016x}" for x in raw_draws(key, 0, n)] == case["raw_first_hex"]
    far = case["raw_far_start"]
    got = [f"{int(x):016x}" for x in raw_draws(key, far, len(case["raw_far_hex"]))]
    assert got == case["raw_far_hex"]
    # And the plain-integer Philox4x64-10 (checked against Random123's known answers).
    expected = [reference_philox4x64_10(i // 4, key)[i % 4] for i in range(n)]
    assert [int(h, 16) for h in case["raw_first_hex"]] == expected


@pytest.mark.parametrize("case", CASES, ids=lambda c: str(c["seed"]))
@pytest.mark.parametrize("dist", ["uniform", "normal", "truncated_normal"])
def test_values_and_rounded_bits(case, dist) -> None:
    key = derive_key(case["seed"], case["tensor_name"])
    values = standard_values(dist, key, VECTORS["first_index"], VECTORS["count"])
    assert [float(v).hex() for v in values] == case[f"{dist}_float64"]
    for dtype, view in BITS.items():
        width = np.dtype(view).itemsize * 2
        bits = round_to_dtype(values, dtype).view(view)
        assert [f"{int(b):0{width}x}" for b in bits] == case[f"{dist}_{dtype}_bits"]


@pytest.mark.parametrize("case", CASES, ids=lambda c: str(c["seed"]))
def test_uniform_vectors_follow_from_the_raw_draws_exactly(case) -> None:
    for raw_hex, value_hex in zip(case["raw_first_hex"], case["uniform_float64"], strict=True):
        x = int(raw_hex, 16)
        assert float.fromhex(value_hex) == 2 * ((x >> 11) / 2**53) - 1
