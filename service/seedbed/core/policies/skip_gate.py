"""skip_gate: SkipInit (De & Smith 2020) and ReZero (Bachlechner et al. 2020): a scalar gate per
branch, "<branch>.gate" = 0, multiplying the branch output.
"""

from __future__ import annotations

from seedbed.core.policies.common import PolicyOutcome, _need_branches, _Net, _scalar
from seedbed.core.references import cite, short_cite
from seedbed.core.request.policy_models import (
    SkipGatePolicy,
)
from seedbed.core.request.problems import Problem


def _skip_gate(net: _Net, policy: SkipGatePolicy, out: PolicyOutcome) -> None:
    refs = (cite("de-2020"), cite("bachlechner-2020"))
    src = f"SkipInit, {short_cite('de-2020')}; ReZero, {short_cite('bachlechner-2020')}"
    for b in net.branches:
        out.extras.setdefault(b.stop - 1, []).append(
            _scalar(
                f"{b.name}.gate",
                b.name,
                "branch",
                "gate",
                0.0,
                f"Scalar gate of residual branch {b.name!r}: the model computes x + gate * "
                f"branch(x), and the gate starts at 0 so that the block is the identity at the "
                f"start and the signal passes through any depth unchanged ({src}). The branch's "
                "own weights keep their recommended random scales, so it learns distinct "
                "features once the gate moves.",
                refs,
            )
        )
    out.summary = {
        "name": policy.name,
        "parameters": {"branches": len(net.branches)},
        "text": f"A zero-initialised scalar gate on each of {len(net.branches)} residual "
        f"branches ({src}).",
        "references": list(refs),
    }
    net.warnings.append(
        "depth_policy skip_gate: each '<branch>.gate' tensor must multiply its branch's output "
        "(x + gate * branch(x)); a model that ignores the gates starts from the plain "
        "recommended weights instead of the identity."
    )


def problems(net: _Net, policy: SkipGatePolicy) -> list[Problem]:
    return _need_branches(net, "skip_gate")


def apply(net: _Net, policy: SkipGatePolicy, out: PolicyOutcome) -> None:
    _skip_gate(net, policy, out)
