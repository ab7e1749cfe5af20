"""From a diagnose body to runs, verdicts, mean-field figures and the JSON document.

    diagnose(data, limits=None, diagnostic_limits=None, threads=1) -> Diagnosis
    diagnosis_document(diagnosis) -> dict          the JSON-ready response body

Order of work: the outer body, the inner request (fields prefixed "request."), the network's
structure (what the simulation supports), every run's plan (an alternative's override problems
are reported at "alternatives[i].init"), the cost of all runs against the limits (413 before
any weight is rendered), then the runs one after another.
"""

from __future__ import annotations

import math
from collections.abc import Iterable
from dataclasses import dataclass
from typing import Any

from seedbed.core.diagnostics.budget import (
    DIAGNOSE_SETTING_PREFIX,
    DiagnosticLimits,
    cost_problems,
    run_cost,
)
from seedbed.core.diagnostics.diagnose_request import RECOMMENDED, AlternativeSpec, parse_body
from seedbed.core.diagnostics.engine import INPUT_SEED, LayerRecord, Simulation, simulate
from seedbed.core.diagnostics.grading import (
    DRIFTING_FACTOR,
    STEADY_FACTOR,
    directions,
    phase_of,
    plan_signature,
    rank,
    score,
)
from seedbed.core.diagnostics.network import Network, build_network
from seedbed.core.diagnostics.unit_stats import SATURATION_RULES
from seedbed.core.diagnostics.verdict import HIGH, LOW, SYMMETRIC_SHARE, Verdict, judge
from seedbed.core.meanfield import mean_field
from seedbed.core.plan import plan_request
from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.references import short_cite
from seedbed.core.request.blocks import relocate_problems
from seedbed.core.request.checks import size_problems
from seedbed.core.request.limits import Limits, raised_by
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parse import parse
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.problems import BODY, Problem, RequestRejected

OVERRIDDEN_KINDS = frozenset({"dense", "conv", "attention", "embedding"})
MEAN_FIELD_LAYERS_LISTED = 8
# Each distinct (activation, sigma_w^2, sigma_b^2) costs a root search (up to ~0.5 s for the
# slowest activations); beyond this many per run the figures are left out and a note says so.
MEAN_FIELD_GROUPS = 8


@dataclass
class Run:
    label: str
    plan: Plan
    simulation: Simulation
    verdict: Verdict
    mean_field: list[dict[str, Any]]
    mean_field_notes: list[str]


@dataclass
class Diagnosis:
    network: Network
    batch: int
    runs: list[Run]
    sum_inverse_width: float


def _prefixed(problems: Iterable[Problem], prefix: str) -> list[Problem]:
    return [
        Problem(prefix if p.field == BODY else f"{prefix}.{p.field}", p.code, p.message)
        for p in problems
    ]


def _parse_inner(data: object, limits: Limits) -> ParsedRequest:
    try:
        return parse(data, limits)
    except RequestRejected as exc:
        raise RequestRejected(_prefixed(exc.problems, "request")) from None


def _network(raw: object, parsed: ParsedRequest) -> Network:
    request = parsed.request
    try:
        return build_network(parsed)
    except RequestRejected as exc:
        problems = exc.problems
        layers = raw.get("layers") if isinstance(raw, dict) else None
        if isinstance(layers, list):  # block shorthands: point at the layers as written
            problems = relocate_problems(problems, layers, request.layers)
        raise RequestRejected(_prefixed(problems, "request")) from None


def _layer_of(field: str) -> int | None:
    if field.startswith("layers[") and "]" in field:
        inside = field[len("layers[") : field.index("]")]
        return int(inside) if inside.isdigit() else None
    return None


def _alternative_plan(
    request: NetworkRequest, alt: AlternativeSpec, i: int, limits: Limits
) -> Plan:
    layers = [
        lay.model_copy(update={"init": alt.init}) if lay.kind in OVERRIDDEN_KINDS else lay
        for lay in request.layers
    ]
    modified = ParsedRequest.of(request.model_copy(update={"layers": layers}))
    problems = size_problems(modified.request, modified.slots, limits)
    plan: Plan | None = None
    if not problems:
        try:
            plan = plan_request(modified)
        except RequestRejected as exc:
            problems = exc.problems
    if problems:
        out = []
        for p in problems:
            k = _layer_of(p.field)
            where = (
                f"applied to layer {request.layers[k].name!r}"
                if k is not None and k < len(request.layers)
                else "applied to every weight layer"
            )
            code = p.code if p.code == "too_large" else "invalid_value"
            out.append(Problem(f"alternatives[{i}].init", code, f"{where}: {p.message}"))
        raise RequestRejected(out)
    assert plan is not None
    return plan


def _bias_second_moment(t: TensorPlan | None) -> float:
    if t is None:
        return 0.0
    if t.sampler == "constant":
        if t.block_values is not None:
            return sum(v * v for v in t.block_values) / len(t.block_values)
        return t.scale * t.scale
    return (t.std or 0.0) ** 2


def _weight_variance_times_fan(step_layer: Any, t: TensorPlan) -> float | None:
    """sigma_w^2 = fan-in times the variance of one weight; None for non-random weights."""
    fan = math.prod(t.logical_shape[1:])
    if step_layer.kind == "conv" and step_layer.transposed:
        fan = fan / math.prod(step_layer.stride or [1])
    if t.sampler in ("uniform", "normal", "truncated_normal") and t.std is not None:
        return fan * t.std * t.std
    if t.sampler == "orthogonal":
        rows = t.logical_shape[0] // max(t.gate_blocks, 1)
        cols = math.prod(t.logical_shape[1:])
        # rows (or columns) of norm `gain`: mean square gain^2 / max(rows, cols)
        return fan * t.scale * t.scale / max(rows, cols)
    return None


def _mean_field_entries(network: Network, plan: Plan, notes: list[str]) -> list[dict[str, Any]]:
    """Mean-field figures per (activation, sigma_w^2, sigma_b^2) among hidden dense/conv
    layers with random weights (the theory's i.i.d. zero-mean assumption)."""
    by_name = {t.tensor: t for t in plan.tensors}
    groups: dict[tuple[str, float | None, float, float], list[str]] = {}
    for step in network.steps:
        if step.kind not in ("dense", "conv") or step.role == "output":
            continue
        if step.activation == "softmax":
            continue
        t = by_name.get(f"{step.name}.weight")
        if t is None:
            continue
        sw2 = _weight_variance_times_fan(step.layer, t)
        sb2 = _bias_second_moment(by_name.get(f"{step.name}.bias"))
        if sw2 is None or not 0 < sw2 < math.inf or not 0 <= sb2 < math.inf:
            continue
        key = (step.activation, step.activation_param, float(f"{sw2:.12g}"), float(f"{sb2:.12g}"))
        groups.setdefault(key, []).append(step.name)
    out: list[dict[str, Any]] = []
    for n, ((act, param, sw2, sb2), names) in enumerate(groups.items()):
        if n == MEAN_FIELD_GROUPS:
            left = sum(len(v) for v in list(groups.values())[n:])
            notes.append(
                f"mean-field figures are given for the first {MEAN_FIELD_GROUPS} "
                f"distinct (activation, sigma_w^2, sigma_b^2) groups only; "
                f"{len(groups) - n} more group(s) covering {left} layer(s) are left "
                "out"
            )
            break
        entry = mean_field(act, sw2, sb2, param).as_dict()
        entry["layers"] = names[:MEAN_FIELD_LAYERS_LISTED]
        entry["layer_count"] = len(names)
        out.append(entry)
    return out


def _limit_problems(batch: int, alternatives: int, dl: DiagnosticLimits) -> list[Problem]:
    problems = []
    if batch > dl.max_batch:
        problems.append(
            Problem(
                "batch",
                "too_large",
                f"batch {batch} is over the limit of {dl.max_batch} samples"
                f"{raised_by('max_batch', DIAGNOSE_SETTING_PREFIX)}",
            )
        )
    if alternatives > dl.max_alternatives:
        problems.append(
            Problem(
                "alternatives",
                "too_large",
                f"{alternatives} alternatives given; the limit is "
                f"{dl.max_alternatives}"
                f"{raised_by('max_alternatives', DIAGNOSE_SETTING_PREFIX)}",
            )
        )
    return problems


def _sum_inverse_width(network: Network) -> float:
    return sum(1.0 / s.out_features for s in network.steps if s.on_main_path and s.role != "output")


def diagnose(
    data: object,
    limits: Limits | None = None,
    diagnostic_limits: DiagnosticLimits | None = None,
    *,
    threads: int = 1,
    keep_arrays: bool = False,
) -> Diagnosis:
    """Validate a diagnose body, refuse it if too costly, and run every alternative."""
    limits = limits if limits is not None else Limits()
    dl = diagnostic_limits if diagnostic_limits is not None else DiagnosticLimits()
    body = parse_body(data)
    problems = _limit_problems(body.batch, len(body.alternatives), dl)
    if problems:
        raise RequestRejected(problems)
    parsed = _parse_inner(body.request, limits)
    request = parsed.request
    network = _network(body.request, parsed)
    plans = [(RECOMMENDED, plan_request(parsed))]
    alt_problems: list[Problem] = []
    for i, alt in enumerate(body.alternatives):
        try:
            plans.append((alt.label, _alternative_plan(request, alt, i, limits)))
        except RequestRejected as exc:
            alt_problems += exc.problems
    if alt_problems:
        raise RequestRejected(alt_problems)
    costs = [run_cost(network, plan, body.batch) for _, plan in plans]
    problems = cost_problems(costs, body.batch, dl)
    if problems:
        raise RequestRejected(problems)
    runs = []
    for label, plan in plans:
        sim = simulate(network, plan, body.batch, threads=threads, keep_arrays=keep_arrays)
        notes: list[str] = []
        figures = _mean_field_entries(network, plan, notes)
        runs.append(Run(label, plan, sim, judge(sim.records), figures, notes))
    return Diagnosis(network, body.batch, runs, _sum_inverse_width(network))


# --- the document ----------------------------------------------------------------------------


def _ratio(value: float | None, ref: float | None) -> float | None:
    if value is None or ref is None or ref == 0.0:
        return None
    return value / ref


def _layer_entry(r: LayerRecord, act_ref: float | None, grad_ref: float | None) -> dict[str, Any]:
    entry: dict[str, Any] = {
        "layer": r.layer,
        "index": r.index,
        "kind": r.kind,
        "activation": r.activation,
        "branch": r.branch,
        "main_path": r.main_path,
        "units": r.units,
        "activation_std": r.activation_std,
        "activation_mean": r.activation_mean,
        "activation_ratio": _ratio(r.activation_std, act_ref) if r.main_path else None,
        "branch_output_std": r.branch_output_std,
        "gradient_std": r.gradient_std,
        "gradient_ratio": _ratio(r.gradient_std, grad_ref) if r.main_path else None,
        "dead_fraction": r.dead_fraction,
        "saturated_fraction": r.saturated_fraction,
        "zero_weights": r.zero_weights,
        "non_finite": r.non_finite,
    }
    assert r.twins is not None
    entry.update(r.twins.as_dict())
    return entry


def _grades(runs: list[Run]) -> dict[str, dict[str, Any]]:
    """Per run label: forward and backward grades, the mean-field phase, rank and same_as."""
    out: dict[str, dict[str, Any]] = {}
    entries = []
    for run in runs:
        forward, backward, depth = directions(run.simulation.records)
        value = score(forward, backward)
        entries.append(
            (run.label, run.verdict.verdict == "stable", value, plan_signature(run.plan))
        )
        out[run.label] = {
            "forward": forward.as_dict(depth),
            "backward": backward.as_dict(depth),
            "depth": depth,
            "score": value if math.isfinite(value) else None,
            **phase_of(run.mean_field),
        }
    for label, (position, same_as) in rank(entries).items():
        out[label]["rank"] = position
        out[label]["same_as"] = same_as
    return out


def _summary(run: Run, grade: dict[str, Any]) -> str:
    """One sentence a reader can choose by."""
    if grade["same_as"] is not None:
        return (
            f"{run.label!r} draws every tensor exactly as {grade['same_as']!r} does (same "
            "values): not a separate choice."
        )
    chi = grade["chi_1"]
    phase = (
        f"; mean field: {grade['phase']} (chi_1 = {chi:.3g})"
        if grade["phase"] is not None and chi is not None
        else ""
    )
    parts = []
    for name in ("forward", "backward"):
        d = grade[name]
        if d["grade"] is None:
            continue
        ratio = d["end_to_end_ratio"]
        shown = "not finite" if ratio is None else f"x{ratio:.3g} over {grade['depth']} layers"
        parts.append(f"{name} {d['grade']} ({shown})")
    graded = ", ".join(parts) if parts else "too shallow to grade"
    return f"rank {grade['rank']}: {graded}{phase}. An estimate on one synthetic batch."


def _run_document(run: Run, grade: dict[str, Any] | None = None) -> dict[str, Any]:
    records = run.simulation.records
    main = [r for r in records if r.main_path]
    act_ref = main[0].activation_std if main else None
    grad_ref = main[-1].gradient_std if main else None
    doc: dict[str, Any] = {"label": run.label}
    doc.update(run.verdict.as_dict())
    if grade is not None:
        doc["grade"] = {**grade, "summary": _summary(run, grade)}
    doc["mean_field"] = run.mean_field
    doc["mean_field_notes"] = run.mean_field_notes
    doc["layers"] = [_layer_entry(r, act_ref, grad_ref) for r in records]
    return doc


def notice(d: Diagnosis) -> str:
    return (
        f"Estimates from one synthetic batch ({d.batch} samples of standard normal inputs, "
        "fixed seed) pushed through the planned weights at initialisation: they show how the "
        "signal and the gradients start out, not that training will succeed. At finite width "
        "the signal's scale drifts from layer to layer like a random walk whose variance grows "
        f"with the sum of 1/width over the layers ({short_cite('hanin-2018')}); here that sum "
        f"is {d.sum_inverse_width:.3g}: the larger it is, the further one network's scales can "
        "wander from the infinite-width picture, and the more these figures vary with the "
        "seed. Mean-field figures are infinite-width estimates."
    )


def diagnosis_document(d: Diagnosis) -> dict[str, Any]:
    """The JSON-ready body of a diagnose response (deterministic for a given body)."""
    grades = _grades(d.runs)
    return {
        "notice": notice(d),
        "simulation": {
            "batch": d.batch,
            "grid": list(d.network.input_grid),
            "input": (
                "token ids uniform over the vocabulary"
                if d.network.vocab is not None
                else "standard normal values"
            ),
            "input_seed": INPUT_SEED,
            "loss": "sum of the final output times a fixed standard normal projection: "
            "unit-variance gradients at the output",
            "conv_padding": "circular (periodic): every position has the full fan-in",
            "attention": "bidirectional over all positions, no mask",
        },
        "finite_width": {
            "sum_inverse_width": d.sum_inverse_width,
            "source": short_cite("hanin-2018"),
        },
        "definitions": {
            "activation_std": "std over all values of the layer's output (after its "
            "activation; for a branch's last layer, after the residual sum)",
            "gradient_std": "std of the loss gradient with respect to that output",
            "band": [LOW, HIGH],
            "activation_reference": "the first main-path layer's activation std",
            "gradient_reference": "the gradient std at the network's output",
            "dead": "rectifier family: pre-activation <= 0 for every value of the unit; "
            "tanh/sigmoid: derivative exactly 0 for every value; linear/softmax: never",
            "saturated": dict(SATURATION_RULES),
            "symmetric_share": SYMMETRIC_SHARE,
            "grade": f"forward: last main-path activation std over the first's; backward: "
            f"first main-path gradient std over the output's; steady within "
            f"{STEADY_FACTOR:g}x end to end (ln({STEADY_FACTOR:g})/L per layer over "
            f"L layers), drifting within {DRIFTING_FACTOR:g}x, poor beyond",
            "rank": "runs whose verdict is stable first, then by |ln forward ratio| + "
            "|ln backward ratio|; an alternative identical to an earlier run shares "
            "its rank and names it in same_as",
            "phase": "mean-field phase (ordered, critical, chaotic) and chi_1 of the largest "
            "group of hidden dense/conv layers (Poole et al. 2016; Schoenholz et al. "
            "2017)",
        },
        "runs": [_run_document(r, grades[r.label]) for r in d.runs],
        "ranking": sorted(
            (r.label for r in d.runs if grades[r.label]["same_as"] is None),
            key=lambda label: grades[label]["rank"],
        ),
    }


__all__ = ["Diagnosis", "Run", "diagnose", "diagnosis_document", "notice"]
