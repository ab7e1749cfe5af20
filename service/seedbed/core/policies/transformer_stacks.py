"""The encoder/decoder stacks of a transformer, shared by deepnorm and t_fixup."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from seedbed.core.choice import Choice
from seedbed.core.policies.common import Change, _Net, _policy_field
from seedbed.core.request.branches import Branch
from seedbed.core.request.policy_models import (
    DeepNormPolicy,
    TransformerDepth,
)
from seedbed.core.request.problems import Problem
from seedbed.core.tensors import TensorSlot


def _ffn_branch(net: _Net, b: Branch) -> bool:
    """A feed-forward branch: dense layers and no attention (one per transformer layer)."""
    kinds = {net.layer(k).kind for k in b.indices}
    return "dense" in kinds and "attention" not in kinds


@dataclass(frozen=True)
class _Stacks:
    encoder: int | None  # N
    decoder: int | None  # M
    start: int  # index of the decoder's first layer (len(layers) for an encoder only)


def _stacks(net: _Net, policy: TransformerDepth) -> tuple[_Stacks | None, list[Problem]]:
    label = "deepnorm" if isinstance(policy, DeepNormPolicy) else "t_fixup"
    layers = net.request.layers
    arch = policy.architecture
    if arch == "encoder_decoder":
        names = [layer.name for layer in layers]
        if policy.decoder_start not in names:
            return None, [Problem(_policy_field("decoder_start"), "invalid_value",
                                  f"no layer is named {policy.decoder_start!r}; allowed: the "
                                  "name of the decoder's first layer")]  # fmt: skip
        start = names.index(policy.decoder_start)
    else:
        start = len(layers) if arch == "encoder" else 0
    for b in net.branches:
        if b.start < start < b.stop:
            return None, [Problem(_policy_field("decoder_start"), "invalid_value",
                                  f"decoder_start {policy.decoder_start!r} falls inside branch "
                                  f"{b.name!r}; allowed: a layer outside any branch or the "
                                  "first layer of one")]  # fmt: skip
    problems: list[Problem] = []

    def count(given: int | None, part: range, field_name: str, what: str) -> int | None:
        if given is not None:
            return given
        found = sum(1 for b in net.branches if b.start in part and _ffn_branch(net, b))
        if found == 0:
            problems.append(Problem(
                _policy_field(field_name), "missing_field",
                f"{label} could not count the {what}'s layers: it has no feed-forward "
                f"branch (dense layers, no attention); give {field_name} (a positive "
                "integer)"))  # fmt: skip
            return None
        return found

    encoder = decoder = None
    if arch in ("encoder", "encoder_decoder"):
        encoder = count(policy.encoder_layers, range(0, start), "encoder_layers", "encoder")
    if arch in ("decoder", "encoder_decoder"):
        decoder = count(policy.decoder_layers, range(start, len(layers)), "decoder_layers",
                        "decoder")  # fmt: skip
    if problems:
        return None, problems
    return _Stacks(encoder, decoder, start), []


def _stack_of(stacks: _Stacks, b: Branch) -> str:
    return "encoder" if b.start < stacks.start else "decoder"


BranchChange = Callable[[TensorSlot, Choice, Branch], Choice]


def _in_branch(change: BranchChange, b: Branch) -> Change:
    def bound(slot: TensorSlot, c: Choice) -> Choice:
        return change(slot, c, b)

    return bound


def _transformer_branches(net: _Net, policy: str, change: BranchChange) -> None:
    """Apply `change` to dense and attention layers inside branches; warn about the rest."""
    others: list[str] = []
    norms: list[str] = []
    for b in net.branches:
        for k in b.indices:
            layer = net.layer(k)
            if layer.kind in ("dense", "attention"):
                net.rewrite(k, _in_branch(change, b))
            elif layer.kind == "norm":
                norms.append(b.name)
            else:
                others.append(layer.name)
    if others:
        net.warnings.append(
            f"depth_policy {policy}: {len(others)} layer(s) inside branches "
            f"are neither dense nor attention ({others[0]!r} ...) and keep "
            "their recommended initialisation."
        )
    if norms:
        first = sorted(set(norms))[0]
        wanted = (
            "post-norm transformers (norm after each residual addition)"
            if policy == "deepnorm"
            else "transformers without normalisation layers"
        )
        net.warnings.append(
            f"depth_policy {policy}: branches such as {first!r} contain norm layers, but "
            f"{policy} is derived for {wanted}; its constants do not hold as derived here."
        )
