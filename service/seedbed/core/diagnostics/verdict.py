"""One verdict per run: symmetric, vanishing, exploding or stable, with the layer at fault.

The rules, checked in this order (the first that fires is the verdict):

1. symmetric: some hidden layer (role not output) has *locked* twin units covering at least
   `SYMMETRIC_SHARE` (half) of its units: units with identical incoming weights that also
   receive identical gradients on the batch, so training can never tell them apart (see
   twin_groups.py). The layer reported is the first such layer.
2. vanishing / exploding activations: along the main path (layers outside residual branches,
   and the stream after the sum at each branch's end), each layer's activation std divided by
   the first main-path layer's leaves [`LOW`, `HIGH`] = [1e-3, 1e3], or stops being finite
   (exploding). The layer reported is the first one, in forward order, outside the band.
3. vanishing / exploding gradients: along the main path, each layer's gradient std divided by
   the gradient std at the network's output (where the backward pass starts, unit variance by
   construction) leaves the same band. The layer reported is the first one, going backwards
   from the output, outside the band.
4. otherwise stable.

Layers inside a residual branch are reported but not judged: zero-initialised branch ends and
gates (Fixup, SkipInit, ReZero) make their gradients exactly zero at the start, by design.
Likewise, at a main-path layer whose weights are all exactly zero (Fixup's classifier), the
output is constant and no gradient passes below it until the first update: the scans stop
there and a note says so.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from seedbed.core.diagnostics.engine import LayerRecord

VerdictName = Literal["stable", "vanishing", "exploding", "symmetric"]
Quantity = Literal["twin_units", "activation_std", "gradient_std"]

LOW = 1e-3
HIGH = 1e3
SYMMETRIC_SHARE = 0.5


@dataclass(frozen=True)
class Verdict:
    verdict: VerdictName
    failed_at: str | None = None
    failed_index: int | None = None  # index in request.layers (after block expansion)
    quantity: Quantity | None = None
    ratio: float | None = None  # the std ratio that left the band (None for symmetric)
    reason: str = ""
    notes: tuple[str, ...] = field(default=())

    def as_dict(self) -> dict[str, object]:
        return {
            "verdict": self.verdict,
            "failed_at": self.failed_at,
            "failed_index": self.failed_index,
            "failed_quantity": self.quantity,
            "failed_ratio": self.ratio,
            "reason": self.reason,
            "verdict_notes": list(self.notes),
        }


def _symmetric(records: list[LayerRecord]) -> Verdict | None:
    for r in records:
        if r.role == "output" or r.twins is None or r.twins.locked_fraction is None:
            continue
        if r.units >= 2 and r.twins.locked_fraction >= SYMMETRIC_SHARE:
            share = r.twins.locked_fraction
            return Verdict(
                "symmetric",
                r.layer,
                r.index,
                "twin_units",
                None,
                f"{share:.0%} of the {r.units} units of {r.layer!r} are locked twins: "
                f"{r.twins.group_count} group(s) of units with identical incoming weights that "
                "also receive identical gradients, so every update keeps them identical. "
                "Use a random init (any method but constant or identity) for this layer.",
            )
    return None


def _band(ratio: float | None) -> VerdictName | None:
    if ratio is None:
        return "exploding"
    if ratio < LOW:
        return "vanishing"
    if ratio > HIGH:
        return "exploding"
    return None


def _ratio(value: float | None, ref: float) -> float | None:
    if value is None:
        return None
    return value / ref


def _activations(main: list[LayerRecord], notes: list[str]) -> Verdict | None:
    first = main[0]
    ref = first.activation_std
    if ref is None:
        return Verdict(
            "exploding",
            first.layer,
            first.index,
            "activation_std",
            None,
            f"the output of {first.layer!r}, the first layer, is not finite",
        )
    if ref == 0.0:
        if first.zero_weights:
            notes.append(
                f"{first.layer!r} has all-zero weights: its output is constant at the "
                "start, so activation scales after it are not judged"
            )
            return None
        return Verdict(
            "vanishing",
            first.layer,
            first.index,
            "activation_std",
            0.0,
            f"the output of {first.layer!r}, the first layer, is constant over the batch (std 0)",
        )
    for r in main[1:]:
        if r.zero_weights and not r.branch_end:
            notes.append(
                f"{r.layer!r} has all-zero weights: its output is constant at the "
                "start, so activation scales from it on are not judged"
            )
            return None
        ratio = _ratio(r.activation_std, ref)
        kind = _band(ratio)
        if kind is not None:
            what = (
                "is not finite"
                if ratio is None
                else f"is {ratio:.3g} times the first layer's ({r.activation_std:.3g} vs {ref:.3g})"
            )
            return Verdict(
                kind,
                r.layer,
                r.index,
                "activation_std",
                ratio,
                f"the activation std of {r.layer!r} {what}; allowed band [{LOW:g}, {HIGH:g}]",
            )
    return None


def _gradients(main: list[LayerRecord], notes: list[str]) -> Verdict | None:
    last = main[-1]
    ref = last.gradient_std
    if ref is None or ref == 0.0:
        return Verdict(
            "exploding" if ref is None else "vanishing",
            last.layer,
            last.index,
            "gradient_std",
            None,
            f"the loss gradient at {last.layer!r} is {'not finite' if ref is None else 'zero'}",
        )
    for pos in range(len(main) - 2, -1, -1):
        above = main[pos + 1]
        if above.zero_weights and not above.branch_end:
            notes.append(
                f"{above.layer!r} has all-zero weights: no gradient passes below it "
                "before the first update (by design for zero-initialised layers), so "
                "gradients below it are not judged"
            )
            return None
        r = main[pos]
        ratio = _ratio(r.gradient_std, ref)
        kind = _band(ratio)
        if kind is not None:
            what = (
                "is not finite"
                if ratio is None
                else f"is {ratio:.3g} times the one at the output ({r.gradient_std:.3g} vs "
                f"{ref:.3g})"
            )
            return Verdict(
                kind,
                r.layer,
                r.index,
                "gradient_std",
                ratio,
                f"the gradient std at {r.layer!r} {what}; allowed band [{LOW:g}, {HIGH:g}]",
            )
    return None


def judge(records: list[LayerRecord]) -> Verdict:
    """The verdict for one run's layer records (see module doc)."""
    found = _symmetric(records)
    if found is not None:
        return found
    main = [r for r in records if r.main_path]
    notes: list[str] = []
    if main:
        for check in (_activations, _gradients):
            found = check(main, notes)
            if found is not None:
                return Verdict(
                    found.verdict,
                    found.failed_at,
                    found.failed_index,
                    found.quantity,
                    found.ratio,
                    found.reason,
                    tuple(notes),
                )
    return Verdict(
        "stable",
        reason=(
            f"activation and gradient stds stay within [{LOW:g}, {HIGH:g}] of their references "
            "along the main path and no layer has locked twin units"
        ),
        notes=tuple(notes),
    )


__all__ = ["HIGH", "LOW", "SYMMETRIC_SHARE", "Verdict", "judge"]
