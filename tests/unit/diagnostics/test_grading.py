"""Diagnose grades tell a deep tanh stack at the recommended gain from the same stack at gain 1,
name their mean-field phases, rank them, and say when an alternative is the plan itself.

Outside references: for tanh at sigma_b = 0 the order-to-chaos transition is at sigma_w = 1
(Poole et al. 2016, Fig. 1 [from memory]; Schoenholz et al. 2017): gain 1 Glorot on square
layers gives sigma_w^2 = 1, the critical point, while the variance-preserving gain for tanh
(about 1.59 here, 5/3 in common practice) puts sigma_w^2 well above 1, in the chaotic phase.
The critical points of other activations are checked against scipy quadrature.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pytest
from scipy import integrate

from seedbed.core.diagnostics import diagnose, diagnosis_document
from seedbed.core.diagnostics.grading import rank
from seedbed.core.meanfield import critical_sigma_w2

DEPTH = 24
WIDTH = 256


def tanh_stack() -> dict[str, Any]:
    layers = [
        {"name": f"tide.{i}", "kind": "dense", "n_in": WIDTH, "n_out": WIDTH, "activation": "tanh"}
        for i in range(DEPTH)
    ]
    layers.append({"name": "level", "kind": "dense", "n_in": WIDTH, "n_out": 4, "role": "output"})
    return {"seed": 7, "layers": layers}


@pytest.fixture(scope="module")
def tanh_document() -> dict[str, Any]:
    body = {
        "request": tanh_stack(),
        "batch": 64,
        "alternatives": [{"label": "gain 1", "init": {"method": "glorot", "gain": 1.0}}],
    }
    return diagnosis_document(diagnose(body))


def test_the_two_tanh_plans_are_ranked_apart_with_their_phases(
    tanh_document: dict[str, Any],
) -> None:
    runs = {r["label"]: r for r in tanh_document["runs"]}
    recommended, unit = runs["recommended"]["grade"], runs["gain 1"]["grade"]
    # Both pass the coarse verdict: that is why grades are needed.
    assert runs["recommended"]["verdict"] == runs["gain 1"]["verdict"] == "stable"
    assert recommended["phase"] == "chaotic" and recommended["chi_1"] > 1.05
    assert unit["phase"] == "critical" and unit["chi_1"] == pytest.approx(1.0, abs=1e-6)
    # At gain 1 the gradient shrinks by more than 10x over the stack: poor; the recommended
    # gain keeps it within 10x.
    assert unit["backward"]["grade"] == "poor"
    assert recommended["backward"]["grade"] in ("steady", "drifting")
    assert (recommended["rank"], unit["rank"]) == (1, 2)
    assert tanh_document["ranking"] == ["recommended", "gain 1"]
    assert "chaotic (chi_1 = " in recommended["summary"]
    assert "estimate" in recommended["summary"]


def test_bands_narrow_with_depth(tanh_document: dict[str, Any]) -> None:
    grade = tanh_document["runs"][0]["grade"]
    assert grade["depth"] == DEPTH  # main-path layers - 1
    assert grade["forward"]["steady_per_layer"] == pytest.approx(math.log(2) / DEPTH)
    assert grade["forward"]["drifting_per_layer"] == pytest.approx(math.log(10) / DEPTH)
    ratio = grade["backward"]["end_to_end_ratio"]
    assert grade["backward"]["per_layer_log_ratio"] == pytest.approx(math.log(ratio) / DEPTH)


def test_an_alternative_identical_to_the_plan_is_said_to_be_so() -> None:
    # A linear stack: the recommendation is Glorot uniform with gain 1, exactly what the
    # alternative asks for, so every tensor gets the same values.
    layers = [{"name": f"mix.{i}", "kind": "dense", "n_in": 32, "n_out": 32} for i in range(4)]
    layers.append({"name": "out", "kind": "dense", "n_in": 32, "n_out": 2, "role": "output"})
    body = {
        "request": {"seed": 3, "layers": layers},
        "batch": 16,
        "alternatives": [
            {"label": "glorot again", "init": {"method": "glorot"}},
            {"label": "tiny", "init": {"method": "symmetric_uniform", "bound": 0.001}},
        ],
    }
    doc = diagnosis_document(diagnose(body))
    runs = {r["label"]: r["grade"] for r in doc["runs"]}
    assert runs["glorot again"]["same_as"] == "recommended"
    assert runs["glorot again"]["rank"] == runs["recommended"]["rank"]
    assert "not a separate choice" in runs["glorot again"]["summary"]
    assert "glorot again" not in doc["ranking"]
    assert runs["tiny"]["same_as"] is None


def test_failing_verdicts_rank_after_passing_ones() -> None:
    got = rank(
        [
            ("a", False, 0.1, ("x",)),
            ("b", True, 5.0, ("y",)),
            ("c", True, 1.0, ("z",)),
            ("d", True, 9.0, ("z",)),
        ]
    )
    assert got == {"a": (3, None), "b": (2, None), "c": (1, None), "d": (1, "c")}


# --- the critical point against an independent integrator ------------------------------------


def _gauss(fn: Any) -> float:
    value, _ = integrate.quad(
        lambda z: fn(z) * math.exp(-z * z / 2) / math.sqrt(2 * math.pi),
        -12,
        12,
        limit=200,
        epsabs=1e-13,
    )
    return float(value)


def _chi_1_scipy(phi: Any, dphi: Any, sw2: float, sb2: float) -> float:
    q = 1.0
    for _ in range(5000):  # iterate the length map to its fixed point (Poole et al. eq. 3)
        new = sw2 * _gauss(lambda z, q=q: phi(math.sqrt(q) * z) ** 2) + sb2
        if abs(new - q) < 1e-13 * max(q, 1.0):
            q = new
            break
        q = new
    return sw2 * _gauss(lambda z: dphi(math.sqrt(q) * z) ** 2)  # Schoenholz et al. eq. 7


def test_tanh_critical_point_is_the_published_one() -> None:
    # Poole et al. 2016 / Schoenholz et al. 2017: sigma_b = 0 -> sigma_w = 1.
    assert critical_sigma_w2("tanh", 0.0) == pytest.approx(1.0, rel=1e-12)


@pytest.mark.parametrize(
    ("name", "phi", "dphi", "sb2"),
    [
        ("tanh", math.tanh, lambda x: 1 - math.tanh(x) ** 2, 0.05),
        (
            "elu",
            lambda x: x if x > 0 else math.expm1(x),
            lambda x: 1.0 if x > 0 else math.exp(x),
            0.05,
        ),
        (
            "sigmoid",
            lambda x: 0.5 * (1 + math.tanh(x / 2)),
            lambda x: 0.25 * (1 - math.tanh(x / 2) ** 2),
            0.0,
        ),
        # Known defect, kept visible: for GELU at sigma_b^2 = 0.05 the length map has two
        # attracting fixed points near the transition, and the service's search lands on the jump
        # between them (chi_1 there is about 0.73 from a start length of 1, not 1).
        pytest.param(
            "gelu",
            lambda x: x * 0.5 * math.erfc(-x / math.sqrt(2)),
            lambda x: (
                0.5 * math.erfc(-x / math.sqrt(2))
                + x * math.exp(-x * x / 2) / math.sqrt(2 * math.pi)
            ),
            0.05,
            marks=pytest.mark.xfail(strict=True, reason="two fixed points near the transition"),
        ),
    ],
)
def test_critical_points_have_chi_1_of_one_by_scipy(
    name: str, phi: Any, dphi: Any, sb2: float
) -> None:
    sw2 = critical_sigma_w2(name, sb2)
    if sw2 is None:
        pytest.fail(f"{name} has a critical point at sigma_b^2 = {sb2}")
    assert _chi_1_scipy(phi, dphi, sw2, sb2) == pytest.approx(1.0, abs=2e-4)
    # and on either side, ordered below and chaotic above
    assert _chi_1_scipy(phi, dphi, sw2 * 0.9, sb2) < 1.0 < _chi_1_scipy(phi, dphi, sw2 * 1.1, sb2)
    assert np.isfinite(sw2)
