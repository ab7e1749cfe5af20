"""scaled_residual: Radford et al. 2019, "Language Models are Unsupervised Multitask
Learners", sec. 2.3: residual-layer weights scaled by 1/sqrt(N).
"""

from __future__ import annotations

import math

from seedbed.core.choice import Choice
from seedbed.core.policies.common import PolicyOutcome, _fmt, _Net, _normal, _policy_field
from seedbed.core.references import cite, short_cite
from seedbed.core.request.policy_models import (
    SCALED_RESIDUAL_BASE_STD,
    ScaledResidualPolicy,
)
from seedbed.core.request.problems import Problem
from seedbed.core.tensors import TensorSlot


def _residual_maps(net: _Net) -> set[int]:
    """The last map of every branch, and layers marked residual_out outside branches."""
    maps = {b.last_map for b in net.branches if b.last_map is not None}
    inside = {k for b in net.branches for k in b.indices}
    maps |= {
        k
        for k, layer in enumerate(net.request.layers)
        if layer.role == "residual_out" and k not in inside
    }
    return maps


def _residual_count(net: _Net, policy: ScaledResidualPolicy) -> int:
    if policy.residual_layers is not None:
        return policy.residual_layers
    return len(net.branches) or len(_residual_maps(net))


def _scaled_residual_problems(net: _Net, policy: ScaledResidualPolicy) -> list[Problem]:
    if _residual_count(net, policy) > 0:
        return []
    return [Problem(_policy_field("residual_layers"), "missing_field",
                    "scaled_residual needs N, the number of residual layers: the network has "
                    "no branches and no layer with role residual_out, so give residual_layers "
                    "(a positive integer)")]  # fmt: skip


def _scaled_residual(net: _Net, policy: ScaledResidualPolicy, out: PolicyOutcome) -> None:
    n = _residual_count(net, policy)
    base = policy.base_std
    small = base / math.sqrt(n)
    refs = (cite("radford-2019", "sec. 2.3"),)
    if base == SCALED_RESIDUAL_BASE_STD:
        base_text = (
            f"std {_fmt(base)}, common practice in GPT-2-style models (a convention, "
            "not a derived value)"
        )
    else:
        base_text = f"the caller's base std {_fmt(base)}"
    residual = _residual_maps(net)

    def before(c: Choice) -> str:
        return f" (without the policy: {c.method} with std {_fmt(c.std or 0.0)})"

    for k, layer in enumerate(net.request.layers):
        if layer.kind not in ("dense", "conv", "attention", "embedding"):
            continue
        closes = k in residual

        def change(slot: TensorSlot, c: Choice, closes: bool = closes) -> Choice:
            if closes and slot.part in ("weight", "output.weight"):
                why = (
                    f"scaled_residual: this map closes a residual branch, so its weights "
                    f"are scaled by 1/sqrt(N) with N = {n} residual layers "
                    f"({short_cite('radford-2019', 'sec. 2.3')}): {_fmt(base)}/sqrt({n}) = "
                    f"{_fmt(small)}, keeping the sum of N residual contributions at the "
                    f"scale of one; base {base_text}{before(c)}"
                )
                return _normal(c, small, "scaled_residual", why, refs)
            why = f"scaled_residual: normal with {base_text}{before(c)}"
            return _normal(c, base, "scaled_residual", why, ())

        net.rewrite(k, change)
    out.summary = {
        "name": policy.name,
        "parameters": {"base_std": base, "residual_layers": n, "residual_std": small},
        "text": f"Weights normal with std {_fmt(base)}; the {len(residual)} residual output "
        f"maps {_fmt(base)}/sqrt({n}) = {_fmt(small)} "
        f"({short_cite('radford-2019', 'sec. 2.3')}). The base std is common practice.",
        "references": list(refs),
    }
    if any(layer.kind == "recurrent" for layer in net.request.layers):
        net.warnings.append(
            "depth_policy scaled_residual: recurrent layers keep their "
            "recommended (orthogonal / Glorot) initialisation."
        )


def problems(net: _Net, policy: ScaledResidualPolicy) -> list[Problem]:
    return _scaled_residual_problems(net, policy)


def apply(net: _Net, policy: ScaledResidualPolicy, out: PolicyOutcome) -> None:
    _scaled_residual(net, policy, out)
