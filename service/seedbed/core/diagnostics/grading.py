"""Grades that tell plans apart, beside the pass/fail verdict, and their ranking.

The verdict's band (a factor of 1000 either way) says whether a run failed outright; it does
not say which of two passing plans keeps the signal better. Each run is therefore graded on
its forward signal and its backward signal separately, with bands derived from the depth:

    per-layer log-ratio   g = ln(end-to-end ratio) / L      (L = main-path layers - 1)
    steady                |g| <= ln(2) / L    (the end-to-end ratio stays within 2x)
    drifting              |g| <= ln(10) / L   (within 10x)
    poor                  beyond, or not finite

where the forward ratio is the last main-path layer's activation std over the first's, and the
backward ratio the first main-path layer's gradient std over the one at the output. A deeper
network gets a narrower per-layer band: the same per-layer drift compounds over more layers.

Beside the measured grades stands the mean-field phase of the run (Poole et al. 2016;
Schoenholz et al. 2017): that of the group of hidden dense/conv layers with the most members,
with its chi_1 (ordered below 1, critical at 1, chaotic above). The two can disagree at finite
depth and width; both are shown.

Ranking: runs with a failing verdict after those without; then by the sum of |ln ratio|
forward and backward (smaller first). A run whose plan is identical to an earlier run's (every
tensor drawn the same way at the same scale, so the same values) is not a separate contender:
it gets the same rank and `same_as` names that run.

All of it is an estimate on one synthetic batch at initialisation, not a promise.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

from seedbed.core.diagnostics.engine import LayerRecord
from seedbed.core.plan_types import Plan

Grade = Literal["steady", "drifting", "poor"]
STEADY_FACTOR = 2.0
DRIFTING_FACTOR = 10.0


@dataclass(frozen=True)
class Direction:
    ratio: float | None  # end-to-end; None when not finite or not measurable
    per_layer_log: float | None
    grade: Grade | None  # None: fewer than two main-path layers, nothing to grade

    def as_dict(self, depth: int) -> dict[str, Any]:
        return {
            "grade": self.grade,
            "end_to_end_ratio": self.ratio,
            "per_layer_log_ratio": self.per_layer_log,
            "steady_per_layer": math.log(STEADY_FACTOR) / depth if depth else None,
            "drifting_per_layer": math.log(DRIFTING_FACTOR) / depth if depth else None,
        }


def _direction(ratio: float | None, depth: int) -> Direction:
    if depth < 1:
        return Direction(ratio, None, None)
    if ratio is None or not math.isfinite(ratio) or ratio <= 0.0:
        return Direction(ratio, None, "poor")
    log = math.log(ratio)
    grade: Grade = (
        "steady"
        if abs(log) <= math.log(STEADY_FACTOR) * (1 + 1e-12)
        else "drifting"
        if abs(log) <= math.log(DRIFTING_FACTOR)
        else "poor"
    )
    return Direction(ratio, log / depth, grade)


def _ratio(top: float | None, bottom: float | None) -> float | None:
    if top is None or bottom is None or bottom == 0.0:
        return None
    return top / bottom


def directions(records: Sequence[LayerRecord]) -> tuple[Direction, Direction, int]:
    """(forward, backward, depth) of one run."""
    main = [r for r in records if r.main_path]
    depth = max(len(main) - 1, 0)
    if not main:
        return Direction(None, None, None), Direction(None, None, None), 0
    forward = _ratio(main[-1].activation_std, main[0].activation_std)
    backward = _ratio(main[0].gradient_std, main[-1].gradient_std)
    return _direction(forward, depth), _direction(backward, depth), depth


def phase_of(mean_field: Sequence[dict[str, Any]]) -> dict[str, Any]:
    """The mean-field phase and chi_1 of the largest group of hidden layers (or nulls)."""
    if not mean_field:
        return {"phase": None, "chi_1": None, "layers_covered": 0, "phases_present": []}
    main = max(mean_field, key=lambda e: int(e.get("layer_count", 0)))
    present = sorted({str(e.get("phase")) for e in mean_field})
    return {
        "phase": main.get("phase"),
        "chi_1": main.get("chi_1"),
        "layers_covered": int(main.get("layer_count", 0)),
        "phases_present": present,
    }


def plan_signature(plan: Plan) -> tuple[Any, ...]:
    """What a tensor's values depend on besides the seed and the name: equal signatures, equal
    values (the generator keys every tensor by seed and name alone)."""
    return tuple(
        (t.tensor, t.sampler, t.scale, t.gate_blocks, t.block_values, t.dtype, t.logical_shape)
        for t in plan.tensors
    )


def score(forward: Direction, backward: Direction) -> float:
    """Sum of |ln ratio| forward and backward; infinite when either is not measurable."""
    total = 0.0
    for d in (forward, backward):
        if d.grade is None:
            continue
        if d.ratio is None or not math.isfinite(d.ratio) or d.ratio <= 0.0:
            return math.inf
        total += abs(math.log(d.ratio))
    return total


def rank(
    entries: Sequence[tuple[str, bool, float, tuple[Any, ...]]],
) -> dict[str, tuple[int, str | None]]:
    """label -> (rank from 1, label of the earlier identical run or None).

    `entries` are (label, verdict is stable, score, plan signature), first run first.
    """
    first_with: dict[tuple[Any, ...], str] = {}
    same: dict[str, str | None] = {}
    contenders: list[tuple[bool, float, int, str]] = []
    for order, (label, stable, value, signature) in enumerate(entries):
        if signature in first_with:
            same[label] = first_with[signature]
            continue
        first_with[signature] = label
        same[label] = None
        contenders.append((not stable, value, order, label))
    contenders.sort()
    ranks = {label: n + 1 for n, (_, _, _, label) in enumerate(contenders)}
    return {label: (ranks[same[label] or label], same[label]) for label, *_ in entries}


__all__ = [
    "DRIFTING_FACTOR",
    "STEADY_FACTOR",
    "Direction",
    "directions",
    "phase_of",
    "plan_signature",
    "rank",
    "score",
]
