"""What every policy shares: the outcome, exact constants, choice rewrites and the network
as the policies see it. Names with a leading underscore are private to this package.
"""

from __future__ import annotations

import threading
from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any

import mpmath

from seedbed.core.choice import Choice
from seedbed.core.request.branches import Branch
from seedbed.core.request.layers import AnyLayer
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.problems import Problem
from seedbed.core.scales import distribution_for_std, glorot_scale, realise
from seedbed.core.tensors import TensorSlot

Entry = tuple[TensorSlot, Choice]


@dataclass
class PolicyOutcome:
    """The plan's choices after a policy, aligned with `request.layers`."""

    choices: list[list[Entry]]
    extras: dict[int, list[Entry]] = field(default_factory=dict)  # added after layer index
    multipliers: list[dict[str, Any]] = field(default_factory=list)
    warnings: list[str] = field(default_factory=list)
    summary: dict[str, Any] | None = None


_MP = mpmath.MPContext()
_MP.prec = 113
_MP_LOCK = threading.Lock()  # mpmath contexts are not thread-safe


def _mp(compute: Callable[[Any], Any]) -> float:
    """compute(ctx) in the private context, rounded once to float64."""
    with _MP_LOCK:
        return float(compute(_MP))


def _root(x: int, k: int) -> float:
    """x^(1/k) for a positive integer x."""
    return _mp(lambda c: c.root(c.mpf(x), k))


def _inverse_root(x: int, k: int, times: str = "1") -> float:
    """times * x^(-1/k); `times` a decimal string (0.87 is not a binary fraction)."""
    return _mp(lambda c: c.mpf(times) / c.root(c.mpf(x), k))


def _fmt(x: float) -> str:
    return f"{x:.6g}"


def _is_weight(layer: AnyLayer, slot: TensorSlot) -> bool:
    return not slot.is_bias and layer.kind != "norm"


def _cited(*refs: tuple[str, ...] | str) -> tuple[str, ...]:
    flat: list[str] = []
    for r in refs:
        flat.extend((r,) if isinstance(r, str) else r)
    return tuple(dict.fromkeys(flat))


def _ratio(new_std: float | None, old: Choice) -> float:
    if new_std is None or not old.std:
        return old.scale_ratio
    return new_std / old.std * old.scale_ratio


def _scaled(choice: Choice, factor: float, note: str, refs: tuple[str, ...]) -> Choice:
    """The same method and distribution with every scale multiplied by `factor`."""

    def times(x: float | None) -> float | None:
        return None if x is None else x * factor

    values = choice.block_values
    return replace(
        choice,
        scale=choice.scale * factor,
        std=times(choice.std),
        bound=times(choice.bound),
        gain=times(choice.gain),
        value=times(choice.value),
        block_values=None if values is None else tuple(v * factor for v in values),
        rationale=f"{choice.rationale} {note}",
        references=_cited(choice.references, refs),
    )


def _zero(old: Choice, why: str, refs: tuple[str, ...]) -> Choice:
    return Choice(
        method="constant",
        distribution=None,
        sampler="constant",
        scale=0.0,
        fan_in=old.fan_in,
        fan_out=old.fan_out,
        gain=None,
        std=0.0,
        bound=None,
        value=0.0,
        rationale=why,
        references=refs,
        scale_ratio=0.0,
    )


def _normal(old: Choice, std: float, method: str, why: str, refs: tuple[str, ...]) -> Choice:
    realised = distribution_for_std(std, "normal")
    return Choice(
        method=method,
        distribution="normal",
        sampler="normal",
        scale=realised.sampler_scale,
        fan_in=old.fan_in,
        fan_out=old.fan_out,
        gain=None,
        std=realised.std,
        bound=None,
        value=None,
        rationale=f"{why}; drawn as {realised.text}.",
        references=refs,
        scale_ratio=_ratio(realised.std, old),
    )


def _glorot(old: Choice, gain: float, distribution: str, why: str, refs: tuple[str, ...]) -> Choice:
    assert old.fan_in is not None and old.fan_out is not None
    scale = glorot_scale(float(old.fan_in), float(old.fan_out), gain)
    realised = realise(scale, distribution)
    return Choice(
        method="glorot",
        distribution=distribution,
        sampler=distribution,
        scale=realised.sampler_scale,
        fan_in=old.fan_in,
        fan_out=old.fan_out,
        gain=gain,
        std=realised.std,
        bound=realised.bound,
        value=None,
        rationale=f"{why} {scale.text}; drawn as {realised.text}.",
        references=_cited(refs, scale.references),
        scale_ratio=_ratio(realised.std, old),
    )


def _scalar(
    tensor: str,
    layer: str,
    kind: str,
    part: str,
    value: float,
    why: str,
    refs: tuple[str, ...],
    is_bias: bool = False,
) -> Entry:
    slot = TensorSlot(
        tensor=tensor,
        layer=layer,
        layer_kind=kind,
        part=part,
        logical_shape=(1,),
        served_shape=(1,),
        served_axes=(0,),
        is_bias=is_bias,
    )
    choice = Choice(
        method="constant",
        distribution=None,
        sampler="constant",
        scale=value,
        fan_in=None,
        fan_out=None,
        gain=None,
        std=0.0,
        bound=None,
        value=value,
        rationale=why,
        references=refs,
    )
    return slot, choice


Change = Callable[[TensorSlot, Choice], "Choice | None"]


def _scaling(factor: float, note: str, refs: tuple[str, ...]) -> Change:
    def change(slot: TensorSlot, c: Choice) -> Choice:
        return _scaled(c, factor, note, refs)

    return change


def _zeroing(why: str, refs: tuple[str, ...]) -> Change:
    def change(slot: TensorSlot, c: Choice) -> Choice:
        return _zero(c, why, refs)

    return change


def _to_normal(std: float, method: str, why: str, refs: tuple[str, ...]) -> Change:
    def change(slot: TensorSlot, c: Choice) -> Choice:
        return _normal(c, std, method, why, refs)

    return change


def _annotating(note: str, refs: tuple[str, ...]) -> Change:
    """Same values; the rationale gains a note (layers a policy explains but leaves alone)."""

    def change(slot: TensorSlot, c: Choice) -> Choice:
        return replace(c, rationale=f"{c.rationale} {note}", references=_cited(c.references, refs))

    return change


@dataclass
class _Net:
    request: NetworkRequest
    choices: list[list[Entry]]
    branches: list[Branch]
    warnings: list[str] = field(default_factory=list)
    skipped: list[str] = field(default_factory=list)  # layers kept because of an explicit init

    def layer(self, k: int) -> AnyLayer:
        return self.request.layers[k]

    def rewrite(self, k: int, change: Change) -> None:
        """Apply `change` to the weight tensors of layer k (None: keep), unless the caller
        gave the layer an explicit init."""
        layer = self.layer(k)
        if layer.init is not None:
            if layer.name not in self.skipped:
                self.skipped.append(layer.name)
            return
        out: list[Entry] = []
        for slot, choice in self.choices[k]:
            new = change(slot, choice) if _is_weight(layer, slot) else None
            out.append((slot, choice if new is None else new))
        self.choices[k] = out

    def outputs(self) -> list[int]:
        return [k for k, layer in enumerate(self.request.layers) if layer.role == "output"]


def _policy_field(name: str) -> str:
    return f"depth_policy.{name}"


def _need_branches(net: _Net, policy: str) -> list[Problem]:
    if net.branches:
        return []
    return [Problem(_policy_field("name"), "not_allowed",
                    f"{policy} acts on residual branches and this network has none: give "
                    "layers a branch, or use a block shorthand (transformer_block, "
                    "residual_conv_block)")]  # fmt: skip
