"""docs/diagnostics.md says what the code does: its example runs, its limits are the defaults,
and its tables name every rule the code applies."""

from __future__ import annotations

import json
import re
from pathlib import Path

from seedbed.core.diagnostics import DiagnosticLimits, diagnose, diagnosis_document
from seedbed.core.diagnostics.network import GRID_SIDE, SEQUENCE_LENGTH
from seedbed.core.diagnostics.ops import NORM_EPS
from seedbed.core.diagnostics.unit_stats import FLAT_WHEN_SATURATED, RECTIFIER_FAMILY
from seedbed.core.diagnostics.verdict import HIGH, LOW

DOC = (Path(__file__).resolve().parents[3] / "docs" / "diagnostics.md").read_text(encoding="utf-8")


def test_the_request_example_runs_as_documented() -> None:
    found = re.search(r"```json\n(\{.*?\})\n```", DOC, re.S)
    assert found is not None
    body = json.loads(found.group(1))
    runs = diagnosis_document(diagnose(body))["runs"]
    assert [r["label"] for r in runs] == ["recommended", "tiny uniform", "all constant"]
    assert [r["verdict"] for r in runs] == ["stable", "vanishing", "symmetric"]


def test_stated_limits_are_the_defaults() -> None:
    limits = DiagnosticLimits()
    for value in (
        limits.max_batch,
        limits.max_alternatives,
        limits.max_multiply_adds,
        limits.max_generated_values,
        limits.max_memory_bytes,
    ):
        assert f"| {value} " in DOC
    assert "leaves [1e-3, 1e3]" in DOC and (LOW, HIGH) == (1e-3, 1e3)
    assert "eps 1e-5" in DOC and NORM_EPS == 1e-5
    assert f"{SEQUENCE_LENGTH} tokens" in DOC
    assert "8 x 8 in 2-d" in DOC and GRID_SIDE == {1: 64, 2: 8, 3: 4}


def test_dead_unit_rules_name_every_activation() -> None:
    row = next(line for line in DOC.splitlines() if line.startswith("| relu, leaky_relu"))
    assert set(row.split("|")[1].replace(",", " ").split()) == RECTIFIER_FAMILY
    for name in FLAT_WHEN_SATURATED:
        assert f"| {name} | {name}'(x) is exactly 0.0" in DOC
