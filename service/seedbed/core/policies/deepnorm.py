"""deepnorm: Wang et al. 2022, "DeepNet: Scaling Transformers to 1,000 Layers" (DeepNorm's
beta for the initialisation, alpha returned as a multiplier).
"""

from __future__ import annotations

from seedbed.core.choice import Choice
from seedbed.core.policies.common import (
    PolicyOutcome,
    _fmt,
    _glorot,
    _inverse_root,
    _mp,
    _Net,
    _root,
)
from seedbed.core.policies.transformer_stacks import (
    _stack_of,
    _Stacks,
    _stacks,
    _transformer_branches,
)
from seedbed.core.references import cite, short_cite
from seedbed.core.request.branches import Branch
from seedbed.core.request.policy_models import (
    DeepNormPolicy,
)
from seedbed.core.request.problems import Problem
from seedbed.core.tensors import TensorSlot


def _deepnorm(net: _Net, policy: DeepNormPolicy, stacks: _Stacks, out: PolicyOutcome) -> None:
    refs = (cite("wang-2022"),)
    src = short_cite("wang-2022")
    n, m = stacks.encoder, stacks.decoder
    constants: dict[str, tuple[float, float, str]] = {}
    if n is not None and m is not None:
        nm = n**4 * m
        constants["encoder"] = (
            _mp(lambda c: c.mpf("0.81") * c.root(c.mpf(nm), 16)),
            _inverse_root(nm, 16, "0.87"),
            f"alpha = 0.81 (N^4 M)^(1/16), beta = 0.87 (N^4 M)^(-1/16) with N = {n}, M = {m}",
        )
        constants["decoder"] = (
            _root(3 * m, 4),
            _inverse_root(12 * m, 4),
            f"alpha = (3M)^(1/4), beta = (12M)^(-1/4) with M = {m}",
        )
    else:
        layers = n if n is not None else m
        assert layers is not None
        constants[policy.architecture] = (
            _root(2 * layers, 4),
            _inverse_root(8 * layers, 4),
            f"alpha = (2N)^(1/4), beta = (8N)^(-1/4) with N = {layers}",
        )

    def change(slot: TensorSlot, c: Choice, b: Branch) -> Choice:
        stack = _stack_of(stacks, b) if len(constants) > 1 else policy.architecture
        alpha, beta, formula = constants[stack]
        if slot.part in ("query.weight", "key.weight"):
            why = (
                f"DeepNorm ({src}): query and key projections keep gain 1 (Glorot normal); "
                f"only feed-forward, value and output projections take beta."
            )
            return _glorot(c, 1.0, "normal", why, refs)
        what = "feed-forward" if slot.part == "weight" else slot.part.split(".")[0]
        why = (
            f"DeepNorm ({src}): {what} weights of the {stack} are Glorot normal with gain "
            f"beta = {_fmt(beta)} ({formula}), which bounds the model update at any depth "
            f"together with the residual multiplier alpha = {_fmt(alpha)}."
        )
        return _glorot(c, beta, "normal", why, refs)

    _transformer_branches(net, "deepnorm", change)
    for stack, (alpha, _, formula) in constants.items():
        names = [
            b.name for b in net.branches if len(constants) == 1 or _stack_of(stacks, b) == stack
        ]
        out.multipliers.append(
            {
                "name": "residual_alpha",
                "group": stack,
                "optimizer": None,
                "value": alpha,
                "applies_to": names,
                "text": f"DeepNorm: compute norm(alpha * x + branch(x)) in every residual branch "
                f"of the {stack}, alpha = {_fmt(alpha)} ({formula}). The weights assume "
                "this multiplier; without it they are merely down-scaled.",
                "references": list(refs),
            }
        )
        net.warnings.append(
            f"depth_policy deepnorm: multiply the residual x by alpha = "
            f"{_fmt(alpha)} in the {stack}'s branches (norm(alpha * x + f(x))); "
            "see 'multipliers' in the plan."
        )
    out.summary = {
        "name": policy.name,
        "parameters": {
            "architecture": policy.architecture,
            "encoder_layers": n,
            "decoder_layers": m,
            **{f"{s}_alpha": a for s, (a, _, _) in constants.items()},
            **{f"{s}_beta": b for s, (_, b, _) in constants.items()},
        },
        "text": "; ".join(
            f"{s}: {f}: alpha = {_fmt(a)}, beta = {_fmt(b)}" for s, (a, b, f) in constants.items()
        )
        + f" ({src}).",
        "references": list(refs),
    }


def problems(net: _Net, policy: DeepNormPolicy) -> list[Problem]:
    return _stacks(net, policy)[1]


def apply(net: _Net, policy: DeepNormPolicy, out: PolicyOutcome) -> None:
    stacks, _ = _stacks(net, policy)
    assert stacks is not None  # problems() was empty
    _deepnorm(net, policy, stacks, out)
