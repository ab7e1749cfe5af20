"""fixup: Zhang, Dauphin & Ma 2019, "Fixup Initialization: Residual Learning Without
Normalization" (sec. 3, the three-step recipe [from memory]).
"""

from __future__ import annotations

from seedbed.core.policies.common import (
    PolicyOutcome,
    _fmt,
    _inverse_root,
    _need_branches,
    _Net,
    _policy_field,
    _scalar,
    _scaling,
    _zeroing,
)
from seedbed.core.references import cite, short_cite
from seedbed.core.request.branches import MAP_KINDS, Branch
from seedbed.core.request.policy_models import (
    FixupPolicy,
)
from seedbed.core.request.problems import Problem


def _fixup_problems(net: _Net) -> list[Problem]:
    problems = _need_branches(net, "fixup")
    foreign = [
        k
        for b in net.branches
        for k in b.indices
        if net.layer(k).kind not in ("dense", "conv", "norm")
    ]
    if foreign:
        k = foreign[0]
        layer = net.layer(k)
        problems.append(
            Problem(
                _policy_field("name"),
                "not_allowed",
                f"fixup scales branches of dense and conv layers; {len(foreign)} branch layer(s) "
                f"are of other kinds, the first {layer.kind} layer {layer.name!r} at layers[{k}] "
                f"in branch {layer.branch!r}; for transformer branches use t_fixup or deepnorm",
            )
        )
    empty = [b for b in net.branches if b.last_map is None]
    if empty:
        problems.append(Problem(
            _policy_field("name"), "not_allowed",
            f"fixup needs a dense or conv layer in every branch; branch {empty[0].name!r} at "
            f"layers[{empty[0].start}] has none"))  # fmt: skip
    return problems


def _fixup(net: _Net, policy: FixupPolicy, out: PolicyOutcome) -> None:
    refs = (cite("zhang-2019"),)
    src = short_cite("zhang-2019", "sec. 3 [from memory]")
    count = len(net.branches)
    sizes: dict[str, int] = {}
    for b in net.branches:
        m = len(b.maps)
        sizes[b.name] = m
        if m > 1:
            factor = _inverse_root(count, 2 * m - 2)
            for position, k in enumerate(b.maps[:-1], start=1):
                note = (
                    f"Fixup ({src}): weight layer {position} of the m = {m} of residual "
                    f"branch {b.name!r}, one of L = {count} branches, so scaled by "
                    f"L^(-1/(2m-2)) = {count}^(-1/{2 * m - 2}) = {_fmt(factor)}: the L "
                    "branches together then change the output's scale by O(1) at the "
                    "start."
                )
                net.rewrite(k, _scaling(factor, note, refs))
        last = net.layer(b.maps[-1])
        why = (
            f"Fixup ({src}): the last weight layer of residual branch {b.name!r} starts at "
            "zero, so the branch adds nothing and the block is the identity at the start; "
            "the earlier layers of the branch are random, so the branch still learns "
            "distinct features once this layer moves."
        )
        net.rewrite(b.maps[-1], _zeroing(why, refs))
        for k in b.indices:
            _fixup_offsets(net, b, k, src, refs, out)
        out.extras.setdefault(b.stop - 1, []).append(
            _scalar(
                f"{b.name}.multiplier",
                b.name,
                "branch",
                "multiplier",
                1.0,
                f"Fixup ({src}): scalar multiplier of residual branch {b.name!r}, starting at 1; "
                f"the model computes x + multiplier * branch(x) after {last.name!r}.",
                refs,
            )
        )
        if any(net.layer(k).kind == "norm" for k in b.indices):
            net.warnings.append(
                f"depth_policy fixup: branch {b.name!r} contains norm layers; Fixup is "
                "derived for residual networks without normalisation, where the scaling "
                "replaces what the norm layers would do."
            )
    for k in net.outputs():
        why = (
            f"Fixup ({src}): the classification layer starts at zero, so the network's "
            "output does not depend on the random residual stack at the start; the loss's "
            "gradient differs per output unit, which breaks their symmetry at once."
        )
        net.rewrite(k, _zeroing(why, refs))
    out.summary = {
        "name": policy.name,
        "parameters": {"branches": count, "weight_layers_per_branch": sizes},
        "text": f"Fixup ({src}) over L = {count} residual branches; the model must apply the "
        "'<branch>.multiplier' and offset tensors where their rationale says.",
        "references": list(refs),
    }
    net.warnings.append(
        "depth_policy fixup: the scalar tensors '<branch>.multiplier', '<layer>.offset' and "
        "'<layer>.activation_offset' are part of the recipe; a model that does not apply them "
        "gets the scaled weights without the trainable scalars Fixup relies on."
    )


def _fixup_offsets(
    net: _Net, b: Branch, k: int, src: str, refs: tuple[str, ...], out: PolicyOutcome
) -> None:
    layer = net.layer(k)
    extras = out.extras.setdefault(k, [])
    if layer.kind in MAP_KINDS:
        extras.append(
            _scalar(
                f"{layer.name}.offset",
                layer.name,
                layer.kind,
                "offset",
                0.0,
                f"Fixup ({src}): scalar bias added to the input of {layer.name!r}, starting at 0.",
                refs,
                is_bias=True,
            )
        )
    if k != b.stop - 1 and (layer.activation or "linear") != "linear":
        extras.append(
            _scalar(
                f"{layer.name}.activation_offset",
                layer.name,
                layer.kind,
                "activation_offset",
                0.0,
                f"Fixup ({src}): scalar bias added before the {layer.activation} that follows "
                f"{layer.name!r}, starting at 0.",
                refs,
                is_bias=True,
            )
        )


def problems(net: _Net, policy: FixupPolicy) -> list[Problem]:
    return _fixup_problems(net)


def apply(net: _Net, policy: FixupPolicy, out: PolicyOutcome) -> None:
    _fixup(net, policy, out)
