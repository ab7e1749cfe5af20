"""Depth- and width-aware policies: how a request's `depth_policy` changes the plan's scales.

One module per policy (its citation at the top) with `problems(net, policy)` (why it cannot
apply to this network) and `apply(net, policy, outcome)`; `RULES` below is the one table
from policy name to the pair. Adding a policy: its model in seedbed.core.request.policy_models,
its module here, one line in `RULES`.

The planner first chooses every tensor as it would without a policy (recommendation or the
caller's override); `apply_policy` then rewrites the tensors the policy is about, each with a
rationale that names the rule, the numbers and the source, and adds the tensors and the
multipliers the policy introduces. Layers with an explicit `init` keep it (a plan warning says
so): the caller's word wins over a policy's default.

    fixup            Zhang, Dauphin & Ma 2019 (sec. 3, the three-step recipe [from memory]):
                     weight layers of every branch but its last scaled by L^(-1/(2m-2)), L the
                     number of branches and m the weight layers of that branch; the last weight
                     layer of every branch and the classifier (role output) zero; a scalar
                     multiplier 1 per branch ("<branch>.multiplier") and scalar offsets 0 before
                     every weight layer ("<layer>.offset") and every activation inside a branch
                     ("<layer>.activation_offset"). Branches of dense and conv layers only.
    skip_gate        SkipInit (De & Smith 2020) and ReZero (Bachlechner et al. 2020): a scalar
                     gate per branch, "<branch>.gate" = 0, multiplying the branch output.
    scaled_residual  Radford et al. 2019, sec. 2.3: every weight matrix and embedding normal
                     with std base_std (0.02: common practice, not derived), the last map of
                     every branch base_std/sqrt(N), N the number of residual layers.
    deepnorm         Wang et al. 2022: feed-forward, value and output projections Glorot normal
                     with gain beta, query and key gain 1; alpha returned as a multiplier.
    t_fixup          Huang et al. 2020 (Algorithm 1 [from memory]): see t_fixup.py.
    width_transfer   Yang et al. 2021, Table 3 [from memory]: see width_transfer.py.

Determinism: every constant becomes part of generated values, so roots such as (2N)^(1/4) are
taken with mpmath in a private context at 113 bits and rounded once to float64 (pure-Python
integer arithmetic, the same on every machine); elsewhere only + - * / and sqrt are used.

API:
    policy_problems(parsed) -> [Problem]      the policy's fit to the network (run by parse)
    apply_policy(parsed, choices) -> PolicyOutcome
    RULES: {policy name: PolicyRule(checks, apply)}
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Any

from seedbed.core.policies import (
    deepnorm,
    fixup,
    scaled_residual,
    skip_gate,
    t_fixup,
    width_transfer,
)
from seedbed.core.policies.common import Entry, PolicyOutcome, _Net
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.problems import Problem, RequestRejected


@dataclass(frozen=True)
class PolicyRule:
    """What a policy checks about the network, and what it does to the plan's choices."""

    checks: Callable[[_Net, Any], list[Problem]]
    apply: Callable[[_Net, Any, PolicyOutcome], None]


RULES: dict[str, PolicyRule] = {
    "fixup": PolicyRule(fixup.problems, fixup.apply),
    "skip_gate": PolicyRule(skip_gate.problems, skip_gate.apply),
    "scaled_residual": PolicyRule(scaled_residual.problems, scaled_residual.apply),
    "deepnorm": PolicyRule(deepnorm.problems, deepnorm.apply),
    "t_fixup": PolicyRule(t_fixup.problems, t_fixup.apply),
    "width_transfer": PolicyRule(width_transfer.problems, width_transfer.apply),
}


def policy_problems(parsed: ParsedRequest) -> list[Problem]:
    """Why the request's depth policy cannot apply to its network (empty when it can)."""
    policy = parsed.request.depth_policy
    if policy is None:
        return []
    return RULES[policy.name].checks(_Net(parsed.request, [], list(parsed.branches)), policy)


def apply_policy(parsed: ParsedRequest, choices: Sequence[Sequence[Entry]]) -> PolicyOutcome:
    """The plan's choices (one list per layer) after the request's depth policy."""
    request = parsed.request
    net = _Net(request, [list(c) for c in choices], list(parsed.branches))
    out = PolicyOutcome(choices=net.choices)
    policy = request.depth_policy
    if policy is None:
        return out
    rule = RULES[policy.name]
    problems = rule.checks(net, policy)
    if problems:
        raise RequestRejected(problems)
    rule.apply(net, policy, out)
    if net.skipped:
        shown = ", ".join(repr(n) for n in net.skipped[:5])
        more = f" and {len(net.skipped) - 5} more" if len(net.skipped) > 5 else ""
        net.warnings.append(
            f"depth_policy {policy.name}: layers with an explicit init keep "
            f"it and are not changed by the policy: {shown}{more}."
        )
    out.choices = net.choices
    out.warnings = net.warnings
    return out


__all__ = ["RULES", "PolicyOutcome", "PolicyRule", "apply_policy", "policy_problems"]
