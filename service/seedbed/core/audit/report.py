"""The audit of an uploaded file: per-tensor statistics, findings, and a summary.

`audit_stored` takes a file already read by seedbed.formats.upload_in (which refuses what it
cannot read safely before looking at any value), loads one tensor at a time and analyses it:
statistics (stats.py), twin units (identical_units.py), numerical rank (rank.py) and, when a request
describes the network, the comparison with its plan (matching.py).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from seedbed.core.audit.findings import SEVERITY_ORDER, Finding
from seedbed.core.audit.identical_units import TwinGroups, twin_units
from seedbed.core.audit.limits import AuditLimits
from seedbed.core.audit.matching import (
    compare_with_plan,
    logical_units,
    plan_coverage,
    shape_finding,
)
from seedbed.core.audit.nothing_read import require_something_read
from seedbed.core.audit.rank import numerical_rank, work_of
from seedbed.core.audit.stats import ValueStats, value_stats
from seedbed.core.audit.stored import FLOAT_ROUNDOFF, StoredTensor, Upload
from seedbed.core.plan_types import Plan, TensorPlan

NOTICE = (
    "This audit checks a starting point: the values as uploaded, before training. It is not an "
    "evaluation of a trained model; trained weights legitimately move away from initial "
    "scales, and nothing here says whether a model is good. Twins are exact byte equality; the "
    "rank is numerical, with the tolerance given per tensor; scale ratios are against the plan "
    "of the request sent with the file, and only as right as that description."
)
# A mean this large next to the std means the units' weight vectors share a common component.
_MEAN_OFFSET = 0.5
# Below this many expected chance pairs, identical rows are not a coincidence.
_CHANCE_PAIRS = 0.01


def _finite(x: float | None) -> float | None:
    return x if x is not None and math.isfinite(x) else None


def _value_findings(
    name: str, ndim: int, stats: ValueStats, t: TensorPlan | None, is_output: bool = False
) -> list[Finding]:
    out: list[Finding] = []
    if stats.nonfinite:
        out.append(
            Finding(
                name,
                "error",
                "non_finite",
                f"{stats.nan} NaN, {stats.posinf} +inf and {stats.neginf} -inf values "
                f"among {stats.count}: a forward pass through this tensor gives "
                "non-finite outputs",
            )
        )
    if stats.all_constant:
        planned_constant = t is not None and t.sampler == "constant"
        code = "all_zero" if stats.all_zero else "all_constant"
        what = "every value is 0" if stats.all_zero else f"every value is {stats.min:g}"
        if planned_constant:
            # Whether it is the planned constant is matching.py's job (not_as_planned).
            out.append(Finding(name, "note", code, f"{what}; the plan asks for a constant here"))
        elif ndim >= 2 and is_output and stats.all_zero and t is not None:
            # Output units differ through their targets, so zeros there do not trap them in
            # symmetry; Fixup (Zhang et al. 2019) zero-initialises the classifier on purpose.
            out.append(
                Finding(
                    name,
                    "warning",
                    code,
                    f"{what} in an output layer: a published choice (Fixup zeroes "
                    "the classifier), but no gradient reaches earlier layers until "
                    f"it moves, and the plan recommends {t.method} values",
                )
            )
        elif ndim >= 2:
            out.append(
                Finding(
                    name,
                    "error",
                    code,
                    f"{what}: every unit computes the same output at the start, and "
                    "units whose outgoing weights are equal too receive the same "
                    "updates forever (the symmetry random initialisation breaks)"
                    + (
                        "; no gradient reaches earlier layers through it either. (A "
                        "zero output layer can be deliberate, as in Fixup: send the "
                        "request describing the network to have it judged as one)"
                        if stats.all_zero and t is None
                        else ""
                    ),
                )
            )
        elif t is not None:
            out.append(
                Finding(
                    name, "warning", code, f"{what}; the plan recommends {t.method} values here"
                )
            )
        else:
            out.append(
                Finding(name, "note", code, f"{what} (usual for biases, shifts and norm scales)")
            )
    elif (
        ndim >= 2
        and stats.count >= 16
        and stats.mean is not None
        and stats.std is not None
        and abs(stats.mean) > _MEAN_OFFSET * stats.std
        and not (t is not None and t.sampler == "constant")
    ):
        out.append(
            Finding(
                name,
                "warning",
                "mean_offset",
                f"mean {stats.mean:.4g} is large next to std {stats.std:.4g}: the "
                "units' weight vectors share a common component, so they start "
                "strongly correlated; recommended distributions have mean 0",
            )
        )
    return out


def _chance_pairs(values: np.ndarray, units: np.ndarray, blocks: int) -> float:
    """Expected number of identical row pairs if the values were independent draws from their
    own observed distribution: pairs per block x (sum of squared value frequencies)^row_length."""
    _, counts = np.unique(values.reshape(-1), return_counts=True)
    p = counts.astype(np.float64) / values.size
    collide = float(np.sum(p * p))
    per = units.shape[0] // max(blocks, 1)
    pairs = blocks * per * (per - 1) / 2
    length = units.shape[1]
    if collide <= 0.0:
        return 0.0
    log_expected = math.log(pairs) + length * math.log(collide) if pairs > 0 else -math.inf
    return math.exp(log_expected) if log_expected > -700 else 0.0


def _twin_entry(twins: TwinGroups, limits: AuditLimits) -> dict[str, Any]:
    shown = twins.groups[: limits.shown_groups]
    return {
        "group_count": len(twins.groups),
        "units_in_groups": twins.units_in_groups,
        "groups": [{"size": len(g), "units": list(g[: limits.shown_members])} for g in shown],
        "groups_shown": len(shown),
    }


def _twin_finding(name: str, twins: TwinGroups, chance: float, source: str) -> Finding:
    first = twins.groups[0]
    listed = ", ".join(str(u) for u in first[:8]) + (" ..." if len(first) > 8 else "")
    text = (
        f"{len(twins.groups)} group(s) of units ({source}) with identical incoming weights, "
        f"{twins.units_in_groups} units in all (first group: units {listed}). Twins compute "
        "the same output at the start; if their outgoing weights are equal too they receive "
        "the same updates forever"
    )
    if chance >= _CHANCE_PAIRS:
        return Finding(
            name,
            "warning",
            "twin_units",
            text + f". With {twins.row_values} values per unit in this dtype, about "
            f"{chance:.2g} identical pairs are expected by chance alone",
        )
    return Finding(
        name,
        "error",
        "twin_units",
        text + ". Exact copies do not arise by chance here (expected chance pairs "
        f"{chance:.1e}): look for a row copied or broadcast when the values were made",
    )


class _Budget:
    def __init__(self, total: int) -> None:
        self.left = total


def _rank_part(
    name: str,
    units: np.ndarray,
    stored: StoredTensor,
    stats: ValueStats,
    limits: AuditLimits,
    budget: _Budget,
    has_twins: bool,
) -> tuple[dict[str, Any] | None, list[Finding]]:
    m, n = units.shape
    if stats.nonfinite or stats.all_constant or m < 2 or n < 2:
        return None, []
    if m * n * min(m, n) > limits.rank_full_work:
        short, long = limits.rank_sample_short, limits.rank_sample_long
        r, c = sorted((m, n))
        cost = work_of(min(r, short), min(c, long))
    else:
        cost = work_of(m, n)
    if cost > budget.left:
        return None, [
            Finding(
                name,
                "note",
                "rank_skipped",
                "the rank was not computed: this audit's SVD budget is spent "
                "(upload fewer or smaller tensors to check it)",
            )
        ]
    budget.left -= cost
    try:
        res = numerical_rank(
            units,
            FLOAT_ROUNDOFF[stored.dtype],
            limits.rank_full_work,
            limits.rank_sample_short,
            limits.rank_sample_long,
        )
    except np.linalg.LinAlgError:
        return None, [
            Finding(
                name, "note", "rank_skipped", "the singular value decomposition did not converge"
            )
        ]
    entry = {
        "rank": res.rank,
        "full": res.full,
        "rows": res.rows,
        "cols": res.cols,
        "sampled": res.sampled,
        "tolerance": res.tolerance,
        "largest_singular_value": res.largest,
        "smallest_singular_value": res.smallest,
    }
    scope = (
        f"a seeded {res.rows} x {res.cols} sample of the {m} x {n} matrix"
        if res.sampled
        else f"the {m} x {n} matrix of units by incoming values"
    )
    if res.deficiency > res.allowance:
        return entry, [
            Finding(
                name,
                "warning",
                "rank_deficient",
                f"numerical rank {res.rank} of a possible {res.full} in {scope} "
                f"(tolerance {res.tolerance:.3g}): the layer's outputs start "
                f"confined to {res.rank} directions",
            )
        ]
    if res.deficiency > 0:
        why = (
            "the twin units account for some of them"
            if has_twins
            else "a few such values occur in near-square matrices, more so in 16-bit dtypes"
        )
        return entry, [
            Finding(
                name,
                "note",
                "near_degenerate",
                f"{res.deficiency} singular value(s) of {res.full} are below the "
                f"tolerance {res.tolerance:.3g} in {scope}; {why}",
            )
        ]
    return entry, []


def _empty_entry(stored: StoredTensor) -> dict[str, Any]:
    return {
        "tensor": stored.name,
        "dtype": stored.dtype,
        "shape": list(stored.shape),
        "values": stored.count,
        "bytes": stored.nbytes,
        "note": stored.note,
        "mean": None,
        "std": None,
        "min": None,
        "max": None,
        "nonfinite": None,
        "all_zero": None,
        "all_constant": None,
        "units": None,
        "twins": None,
        "rank": None,
        "planned": None,
    }


def _audit_tensor(
    stored: StoredTensor,
    t: TensorPlan | None,
    layout: str | None,
    limits: AuditLimits,
    budget: _Budget,
    output_layers: frozenset[str] = frozenset(),
) -> tuple[dict[str, Any], list[Finding]]:
    name = stored.name
    entry = _empty_entry(stored)
    findings: list[Finding] = []
    matched = t
    if t is not None and layout is not None:
        mismatch = shape_finding(stored, t, layout)
        if mismatch is not None:
            findings.append(mismatch)
            matched = None
            entry["planned"], _ = compare_with_plan(stored, None, None, t)  # for reference
    if matched is not None and (stored.load is None or stored.count == 0 or not stored.is_float):
        # Values that are not compared still get the plan entry and its dtype note.
        entry["planned"], found = compare_with_plan(stored, None, None, matched)
        findings += found
    if stored.load is None:
        findings.append(
            Finding(
                name,
                "warning",
                "not_analysed",
                stored.note or f"dtype {stored.dtype} is not analysed",
            )
        )
        return entry, findings
    if stored.count == 0:
        findings.append(Finding(name, "note", "empty_tensor", "the tensor has no values"))
        return entry, findings
    values = stored.load()
    stats = value_stats(values)
    entry.update(
        {
            "mean": _finite(stats.mean),
            "std": _finite(stats.std),
            "min": _finite(stats.min),
            "max": _finite(stats.max),
            "nonfinite": {"nan": stats.nan, "posinf": stats.posinf, "neginf": stats.neginf},
            "all_zero": stats.all_zero,
            "all_constant": stats.all_constant,
        }
    )
    if not stored.is_float:
        findings.append(
            Finding(
                name,
                "note",
                "not_float",
                f"{stored.dtype} values: listed with their statistics, but not checked as weights",
            )
        )
        return entry, findings
    is_output = matched is not None and matched.layer in output_layers
    findings += _value_findings(name, values.ndim, stats, matched, is_output)
    if values.ndim >= 2:
        if matched is not None:
            units, blocks, source = (
                logical_units(values, matched),
                matched.gate_blocks,
                "output units, from the request",
            )
        else:
            units, blocks, source = (
                values.reshape(values.shape[0], -1),
                1,
                "rows along the first axis",
            )
        entry["units"] = {
            "axis": source,
            "count": int(units.shape[0]),
            "values_per_unit": int(units.shape[1]),
            "blocks": blocks,
        }
        twins = twin_units(units, blocks)
        entry["twins"] = _twin_entry(twins, limits)
        if twins.groups and not stats.all_constant:
            chance = _chance_pairs(values, units, blocks)
            findings.append(_twin_finding(name, twins, chance, source))
        entry["rank"], found = _rank_part(
            name, units, stored, stats, limits, budget, bool(twins.groups)
        )
        findings += found
    if matched is not None:
        entry["planned"], found = compare_with_plan(stored, values, stats, matched)
        findings += found
    return entry, findings


def _output_layers(plan: Plan) -> set[str]:
    layers = plan.canonical_request.get("layers", [])
    return {
        str(layer.get("name"))
        for layer in layers
        if isinstance(layer, dict) and layer.get("role") == "output"
    }


def audit_stored(
    upload: Upload, size: int, limits: AuditLimits | None = None, plan: Plan | None = None
) -> dict[str, Any]:
    """Audit a file already read by seedbed.formats.upload_in (`size`: its bytes); returns the
    JSON-ready report. Tensor values are read here, one tensor at a time. Raises
    UploadRefused (no_tensors_read) when no tensor of the file would be read."""
    limits = limits if limits is not None else AuditLimits()
    require_something_read(upload)
    planned = {t.tensor: t for t in plan.tensors} if plan else {}
    budget = _Budget(limits.rank_budget)
    output_layers = frozenset(_output_layers(plan)) if plan else frozenset()
    findings = [Finding(None, "note", "ignored_member", note) for note in upload.notes]
    tensors = []
    for stored in upload.tensors:
        entry, found = _audit_tensor(
            stored,
            planned.get(stored.name),
            plan.layout if plan else None,
            limits,
            budget,
            output_layers,
        )
        tensors.append(entry)
        findings += found
    if plan is not None:
        findings += plan_coverage(plan, [s.name for s in upload.tensors])
    findings.sort(key=lambda f: SEVERITY_ORDER[f.severity])
    counts = {s: sum(1 for f in findings if f.severity == s) for s in SEVERITY_ORDER}
    verdict = "errors" if counts["error"] else "warnings" if counts["warning"] else "ok"
    return {
        "notice": NOTICE,
        "container": upload.container,
        "file_bytes": size,
        "summary": {
            "verdict": verdict,
            "tensors": len(upload.tensors),
            "values": sum(s.count for s in upload.tensors),
            "errors": counts["error"],
            "warnings": counts["warning"],
            "notes": counts["note"],
            "compared_with_request": plan is not None,
        },
        "findings": [f.as_dict() for f in findings],
        "tensors": tensors,
    }
