"""From a request to a plan: one entry per tensor with method, scale, rationale and warnings.

Cheap by construction: no values are generated here, and every size limit has been checked
from shapes alone (seedbed.core.request.parse) before anything else happens.
"""

from __future__ import annotations

from dataclasses import replace
from typing import Any

from seedbed.core.activations import describe_activation
from seedbed.core.choice import Choice
from seedbed.core.meanfield import critical_sigma_w2, mean_field
from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.policies import apply_policy
from seedbed.core.recommend import override_weight, recommend_weight, vector_choice
from seedbed.core.request.limits import Limits
from seedbed.core.request.network import NetworkRequest, canonical_request
from seedbed.core.request.parse import parse
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.problems import Problem, RequestRejected
from seedbed.core.request.vocabulary import DTYPE_MAX, DTYPE_TINY, NORMAL_EXTREME
from seedbed.core.tensors import TensorSlot
from seedbed.core.version import ALGORITHM

# A stack of consecutive sigmoid layers longer than this gets a vanishing-gradient warning:
# sigmoid'(x) <= 1/4, so each layer can shrink the backward signal fourfold.
_SIGMOID_STACK = 4
# tanh' <= 1 and the gain compensates the forward pass, but saturation still compounds.
_TANH_STACK = 10
# Warn when the product of per-layer std ratios (explicit scale / variance-preserving scale)
# moves the forward signal's scale by more than this factor in either direction.
_DRIFT = 100.0


def _identity_problem(index: int, layer: Any, slot: TensorSlot) -> Problem | None:
    rows = slot.logical_shape[0] // slot.gate_blocks
    cols = slot.logical_shape[1]
    if rows == cols:
        return None
    what = (
        "channels_out/groups equal to channels_in/groups"
        if layer.kind == "conv"
        else "a square weight (per gate block)"
    )
    return Problem(
        f"layers[{index}].init.method",
        "invalid_value",
        f"identity needs {what}: {slot.tensor} has {rows} output"
        f"{'' if rows == 1 else 's'} and {cols} input{'' if cols == 1 else 's'} "
        "per block; use orthogonal for rectangular weights",
    )


def _largest_magnitude(choice: Choice) -> float:
    if choice.sampler == "normal":
        return choice.scale * NORMAL_EXTREME
    if choice.sampler == "constant":
        return max(abs(v) for v in (choice.block_values or (choice.scale,)))
    return abs(choice.scale) * (2.0 if choice.sampler == "truncated_normal" else 1.0)


def _dtype_fit(
    index: int, layer: Any, slot: TensorSlot, choice: Choice, dtype: str, problems: list[Problem]
) -> Choice:
    """Refuse derived scales that overflow the dtype; warn when they drown in its precision."""
    top, tiny = DTYPE_MAX[dtype], DTYPE_TINY[dtype]
    field = f"layers[{index}].init" if layer.init is not None else f"layers[{index}]"
    if _largest_magnitude(choice) > top:
        problems.append(
            Problem(
                field,
                "invalid_value",
                f"{slot.tensor} would reach {_largest_magnitude(choice):.3g}, "
                f"beyond the largest finite {dtype} ({top:g}); allowed: scales "
                f"whose values stay within +-{top:g} (lower the gain or use a "
                "wider dtype)",
            )
        )
    elif choice.std is not None and 0.0 < choice.std < tiny:
        note = (
            f"std {choice.std:.3g} is below the smallest normal {dtype} number ({tiny:.3g}): "
            "most values become subnormal or zero, losing precision and the symmetry "
            "breaking; use a wider dtype."
        )
        return replace(choice, warnings=(*choice.warnings, note))
    return choice


def _tensor_plan(slot: TensorSlot, dtype: str, choice: Choice) -> TensorPlan:
    return TensorPlan(
        tensor=slot.tensor,
        layer=slot.layer,
        layer_kind=slot.layer_kind,
        part=slot.part,
        shape=slot.served_shape,
        logical_shape=slot.logical_shape,
        served_axes=slot.served_axes,
        dtype=dtype,
        method=choice.method,
        distribution=choice.distribution,
        sampler=choice.sampler,  # type: ignore[arg-type]
        scale=choice.scale,
        fan_in=choice.fan_in,
        fan_out=choice.fan_out,
        gain=choice.gain,
        std=choice.std,
        bound=choice.bound,
        value=choice.value,
        gate_blocks=slot.gate_blocks,
        block_values=choice.block_values,
        reproducible=choice.reproducible,  # type: ignore[arg-type]
        rationale=choice.rationale,
        references=choice.references,
        warnings=choice.warnings,
    )


def _uses_identity_recurrence(layer: Any) -> bool:
    return layer.kind == "recurrent" and layer.cell == "simple" and layer.activation == "relu"


def _layer_choices(
    index: int, layer: Any, slots: list[TensorSlot], problems: list[Problem]
) -> list[tuple[TensorSlot, Choice]]:
    out: list[tuple[TensorSlot, Choice]] = []
    for slot in slots:
        if layer.kind == "conv" and not slot.is_bias:
            # Groups are independent blocks along the output axis, like a recurrent layer's
            # gates: identity and orthogonal act within each group.
            slot = replace(slot, gate_blocks=layer.groups)
        if slot.is_bias or layer.kind == "norm":
            out.append((slot, vector_choice(layer, slot)))
            continue
        choice = _weight_choice(index, layer, slot, problems)
        if choice is not None:
            out.append((slot, choice))
    return out


def _weight_choice(
    index: int, layer: Any, slot: TensorSlot, problems: list[Problem]
) -> Choice | None:
    recommended = recommend_weight(layer, slot, _uses_identity_recurrence(layer))
    if layer.init is None:
        return recommended
    if layer.init.method == "identity":
        problem = _identity_problem(index, layer, slot)
        if problem is not None:
            problems.append(problem)
            return None
    return override_weight(layer, slot, layer.init, recommended)


def _edge_of_chaos(activation: str, depth: int, choice: Choice) -> str:
    """For a deep tanh-like stack: where its first layer's scale sits in the mean-field phase
    diagram, and the critical (sigma_w, sigma_b) pair with the depth scale it gives (Poole et
    al. 2016; Schoenholz et al. 2017). Infinite-width figures; they never touch the values."""
    if choice.std is None or choice.fan_in is None:
        return ""
    sw2 = float(choice.fan_in) * choice.std * choice.std
    here = mean_field(activation, sw2, 0.0)
    critical = critical_sigma_w2(activation, 0.0)
    if critical is None or here.chi_1 is None:
        return ""
    xi = "unbounded" if here.xi_c is None else f"about {here.xi_c:.3g}"
    return (
        f" Mean field: this scale (sigma_w^2 = {sw2:.4g}, sigma_b = 0) is {here.phase} "
        f"with chi_1 = {here.chi_1:.3g}, so inputs decorrelate over {xi} layers (xi_c) "
        f"against the stack's {depth}; the critical pair at sigma_b = 0 is sigma_w = "
        f'{critical**0.5:.4g} (the override {{"method": "lecun", "gain": '
        f"{critical**0.5:.4g}}} on these layers, with zero biases), where xi_c is unbounded "
        "and correlations survive depth. Compare both with /v1/diagnose; these are "
        "infinite-width estimates."
    )


def _stack_warnings(request: NetworkRequest, weights: list[tuple[Any, Choice]]) -> list[str]:
    """Request-wide warnings about what depth does to the chosen scales.

    `weights` are the dense and conv weights in signal order; those inside residual branches
    are left out of the drift estimate, since a branch adds to the signal rather than
    multiplying it.
    """
    warnings: list[str] = []
    run: list[str] = []
    run_act = ""
    choices = {layer.name: choice for layer, choice in weights}

    def close_run() -> None:
        limit = _SIGMOID_STACK if run_act == "sigmoid" else _TANH_STACK
        if run_act in ("sigmoid", "tanh") and len(run) >= limit:
            n = len(run)
            if run_act == "sigmoid":
                detail = (
                    f"sigmoid'(x) <= 1/4, so backpropagated gradients can shrink by up to "
                    f"4^-{n} = {4.0**-n:.3g} from {run[-1]} back to {run[0]}"
                )
            else:
                detail = (
                    "tanh saturates on both sides; gradients shrink wherever units saturate "
                    "and the shrinkage compounds with depth"
                )
            warnings.append(
                f"{n} consecutive {run_act} layers ({run[0]} .. {run[-1]}): {detail}. "
                "Expect vanishing gradients; a rectifier family activation, "
                "normalisation layers or residual connections avoid this."
                + (_edge_of_chaos(run_act, n, choices[run[0]]) if run_act == "tanh" else "")
            )

    for layer, _ in weights:
        act = layer.activation or "linear"
        if layer.role != "output" and describe_activation(act).saturating and act == run_act:
            run.append(layer.name)
            continue
        close_run()
        run, run_act = ([layer.name], act) if layer.role != "output" else ([], "")
    close_run()

    drift = 1.0
    for layer, choice in weights:
        if choice.scale_ratio == 0.0:
            continue  # constant weights: the symmetry warning already says what goes wrong
        drift *= choice.scale_ratio
        if not 1.0 / _DRIFT <= drift <= _DRIFT:
            direction = "shrinks" if drift < 1 else "grows"
            warnings.append(
                f"the explicit scales multiply the forward signal's scale by about {drift:.3g} "
                f"by layer {layer.name} (each layer contributes its std divided by the "
                f"variance-preserving std): the signal {direction} geometrically with depth, "
                "so activations and gradients will "
                f"{'vanish' if drift < 1 else 'explode'}. This is an estimate from scales "
                "alone, not a simulation."
            )
            break
    return warnings


def plan_request(parsed: ParsedRequest) -> Plan:
    """The plan of an already validated request.

    Each tensor is first chosen as without a depth policy (recommendation or override); the
    policy then rewrites what it is about and adds its own tensors (seedbed.core.policies);
    finally every weight scale is checked against the dtype.
    """
    request = parsed.request
    problems: list[Problem] = []
    chosen = [
        _layer_choices(index, layer, list(slots), problems)
        for index, (layer, slots) in enumerate(zip(request.layers, parsed.slots, strict=True))
    ]
    if problems:
        raise RequestRejected(problems)
    outcome = apply_policy(parsed, chosen)
    in_branch = {k for b in parsed.branches for k in b.indices}
    tensors: list[TensorPlan] = []
    weights: list[tuple[Any, Choice]] = []
    for index, layer in enumerate(request.layers):
        for slot, choice in outcome.choices[index]:
            if not (slot.is_bias or layer.kind == "norm"):
                choice = _dtype_fit(index, layer, slot, choice, request.dtype, problems)
            tensors.append(_tensor_plan(slot, request.dtype, choice))
            if layer.kind in ("dense", "conv") and not slot.is_bias and index not in in_branch:
                weights.append((layer, choice))
        for slot, choice in outcome.extras.get(index, ()):
            tensors.append(_tensor_plan(slot, request.dtype, choice))
    if problems:
        raise RequestRejected(problems)
    names = [t.tensor for t in tensors]
    if len(set(names)) != len(names):  # pragma: no cover - policy names cannot clash
        raise ValueError("a depth policy produced a tensor name twice")
    return Plan(
        algorithm=ALGORITHM,
        seed=request.seed,
        dtype=request.dtype,
        layout=request.layout,
        tensors=tuple(tensors),
        warnings=(*_stack_warnings(request, weights), *outcome.warnings),
        canonical_request=canonical_request(request),
        multipliers=tuple(outcome.multipliers),
        policy=outcome.summary,
    )


def build_plan(data: object, limits: Limits | None = None) -> Plan:
    """Validate a parsed JSON body and plan it; raises RequestRejected with every problem."""
    return plan_request(parse(data, limits if limits is not None else Limits()))


def reseeded(plan: Plan, seed: int | str) -> Plan:
    """`plan` under another (already valid) seed, equal to planning the request anew with it.

    No choice depends on the seed: it only keys the random streams, through `Plan.seed`, and
    appears in the canonical request. A sweep over seeds of one network therefore plans once.
    """
    canonical = dict(plan.canonical_request)
    canonical["seed"] = seed  # an existing key: the sorted order is kept
    return replace(plan, seed=seed, canonical_request=canonical)


def plan_document(plan: Plan) -> dict[str, Any]:
    """The JSON-ready body of a plan response."""
    values = plan.total_count
    return {
        "algorithm": plan.algorithm,
        "seed": plan.seed,
        "dtype": plan.dtype,
        "layout": plan.layout,
        # Each entry carries its generation recipe so a client can make the bytes itself
        # (seedbed_client.generator.materialize) without asking for them.
        "tensors": [
            {**t.manifest(), "generation": t.recipe(plan.seed).document()} for t in plan.tensors
        ],
        "warnings": list(plan.warnings),
        "totals": {
            "tensors": len(plan.tensors),
            "values": values,
            "bytes": sum(t.nbytes for t in plan.tensors),
        },
        "notice": (
            "Scales follow published rules for the stated activations; they make a good "
            "start likely, not certain. Diagnostics are estimates."
        ),
        "layers": layer_summaries(plan),
        "depth_policy": plan.policy,
        "multipliers": list(plan.multipliers),
    }


_LAYER_KEYS = ("name", "kind", "branch", "activation", "role", "block")


def layer_summaries(plan: Plan) -> list[dict[str, Any]]:
    """The layers as planned, after expanding block shorthands: name, kind, branch,
    activation, role and the block each came from (None where absent)."""
    layers = plan.canonical_request.get("layers", [])
    return [{key: layer.get(key) for key in _LAYER_KEYS} for layer in layers]


__all__ = ["build_plan", "layer_summaries", "plan_document", "plan_request"]
