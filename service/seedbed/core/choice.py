"""`Choice`: how one tensor is initialised (method, scale, rationale, sources), as the
recommendation rules (recommend.py) and the policies (policies/) pass it to the planner."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class Choice:
    """Everything about one tensor's initialisation except its position and shape."""

    method: str
    distribution: str | None
    sampler: str
    scale: float
    fan_in: int | float | None
    fan_out: int | float | None
    gain: float | None
    std: float | None
    bound: float | None
    value: float | None
    rationale: str
    references: tuple[str, ...]
    warnings: tuple[str, ...] = ()
    block_values: tuple[float, ...] | None = None
    reproducible: str = "exact"
    # realised std divided by the recommended std for the same tensor (1 when recommended):
    # the plan multiplies these along a stack to warn about vanishing or exploding starts
    scale_ratio: float = 1.0
