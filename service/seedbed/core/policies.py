"""Depth- and width-aware policies: how a request's `depth_policy` changes the plan's scales.

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
    t_fixup          Huang et al. 2020 (Algorithm 1 [from memory]): see `_t_fixup`.
    width_transfer   Yang et al. 2021, Table 3 [from memory]: see `_width_transfer`.

Determinism: every constant becomes part of generated values, so roots such as (2N)^(1/4) are
taken with mpmath in a private context at 113 bits and rounded once to float64 (pure-Python
integer arithmetic, the same on every machine); elsewhere only + - * / and sqrt are used.

API:
    policy_problems(parsed) -> [Problem]      the policy's fit to the network (run by parse)
    apply_policy(parsed, choices) -> PolicyOutcome
"""

from __future__ import annotations

import math
import threading
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import mpmath

from seedbed.core.recommend import Choice
from seedbed.core.references import cite, short_cite
from seedbed.core.request.branches import MAP_KINDS, Branch, input_width
from seedbed.core.request.layers import AnyLayer, EmbeddingLayer
from seedbed.core.request.network import NetworkRequest
from seedbed.core.request.parsed import ParsedRequest
from seedbed.core.request.policy_models import (
    SCALED_RESIDUAL_BASE_STD,
    DeepNormPolicy,
    FixupPolicy,
    ScaledResidualPolicy,
    SkipGatePolicy,
    TFixupPolicy,
    TransformerDepth,
    WidthTransferPolicy,
)
from seedbed.core.request.problems import Problem, RequestRejected
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


# ---------------------------------------------------------------------------------------------
# Exact-enough constants

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


# ---------------------------------------------------------------------------------------------
# Choices


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
        choice, scale=choice.scale * factor, std=times(choice.std), bound=times(choice.bound),
        gain=times(choice.gain), value=times(choice.value),
        block_values=None if values is None else tuple(v * factor for v in values),
        rationale=f"{choice.rationale} {note}", references=_cited(choice.references, refs),
    )


def _zero(old: Choice, why: str, refs: tuple[str, ...]) -> Choice:
    return Choice(
        method="constant", distribution=None, sampler="constant", scale=0.0,
        fan_in=old.fan_in, fan_out=old.fan_out, gain=None, std=0.0, bound=None, value=0.0,
        rationale=why, references=refs, scale_ratio=0.0,
    )


def _normal(old: Choice, std: float, method: str, why: str, refs: tuple[str, ...]) -> Choice:
    realised = distribution_for_std(std, "normal")
    return Choice(
        method=method, distribution="normal", sampler="normal", scale=realised.sampler_scale,
        fan_in=old.fan_in, fan_out=old.fan_out, gain=None, std=realised.std, bound=None,
        value=None, rationale=f"{why}; drawn as {realised.text}.", references=refs,
        scale_ratio=_ratio(realised.std, old),
    )


def _glorot(old: Choice, gain: float, distribution: str, why: str,
            refs: tuple[str, ...]) -> Choice:
    assert old.fan_in is not None and old.fan_out is not None
    scale = glorot_scale(float(old.fan_in), float(old.fan_out), gain)
    realised = realise(scale, distribution)
    return Choice(
        method="glorot", distribution=distribution, sampler=distribution,
        scale=realised.sampler_scale, fan_in=old.fan_in, fan_out=old.fan_out, gain=gain,
        std=realised.std, bound=realised.bound, value=None,
        rationale=f"{why} {scale.text}; drawn as {realised.text}.",
        references=_cited(refs, scale.references), scale_ratio=_ratio(realised.std, old),
    )


def _scalar(tensor: str, layer: str, kind: str, part: str, value: float, why: str,
            refs: tuple[str, ...], is_bias: bool = False) -> Entry:
    slot = TensorSlot(tensor=tensor, layer=layer, layer_kind=kind, part=part,
                      logical_shape=(1,), served_shape=(1,), served_axes=(0,), is_bias=is_bias)
    choice = Choice(method="constant", distribution=None, sampler="constant", scale=value,
                    fan_in=None, fan_out=None, gain=None, std=0.0, bound=None, value=value,
                    rationale=why, references=refs)
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


# ---------------------------------------------------------------------------------------------
# The network as the policies see it


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


# ---------------------------------------------------------------------------------------------
# fixup


def _fixup_problems(net: _Net) -> list[Problem]:
    problems = _need_branches(net, "fixup")
    foreign = [k for b in net.branches for k in b.indices
               if net.layer(k).kind not in ("dense", "conv", "norm")]
    if foreign:
        k = foreign[0]
        layer = net.layer(k)
        problems.append(Problem(
            _policy_field("name"), "not_allowed",
            f"fixup scales branches of dense and conv layers; {len(foreign)} branch layer(s) "
            f"are of other kinds, the first {layer.kind} layer {layer.name!r} at layers[{k}] in "
            f"branch {layer.branch!r}; for transformer branches use t_fixup or deepnorm"))
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
                note = (f"Fixup ({src}): weight layer {position} of the m = {m} of residual "
                        f"branch {b.name!r}, one of L = {count} branches, so scaled by "
                        f"L^(-1/(2m-2)) = {count}^(-1/{2 * m - 2}) = {_fmt(factor)}: the L "
                        "branches together then change the output's scale by O(1) at the "
                        "start.")
                net.rewrite(k, _scaling(factor, note, refs))
        last = net.layer(b.maps[-1])
        why = (f"Fixup ({src}): the last weight layer of residual branch {b.name!r} starts at "
               "zero, so the branch adds nothing and the block is the identity at the start; "
               "the earlier layers of the branch are random, so the branch still learns "
               "distinct features once this layer moves.")
        net.rewrite(b.maps[-1], _zeroing(why, refs))
        for k in b.indices:
            _fixup_offsets(net, b, k, src, refs, out)
        out.extras.setdefault(b.stop - 1, []).append(_scalar(
            f"{b.name}.multiplier", b.name, "branch", "multiplier", 1.0,
            f"Fixup ({src}): scalar multiplier of residual branch {b.name!r}, starting at 1; "
            f"the model computes x + multiplier * branch(x) after {last.name!r}.", refs))
        if any(net.layer(k).kind == "norm" for k in b.indices):
            net.warnings.append(
                f"depth_policy fixup: branch {b.name!r} contains norm layers; Fixup is "
                "derived for residual networks without normalisation, where the scaling "
                "replaces what the norm layers would do.")
    for k in net.outputs():
        why = (f"Fixup ({src}): the classification layer starts at zero, so the network's "
               "output does not depend on the random residual stack at the start; the loss's "
               "gradient differs per output unit, which breaks their symmetry at once.")
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
        "gets the scaled weights without the trainable scalars Fixup relies on.")


def _fixup_offsets(net: _Net, b: Branch, k: int, src: str, refs: tuple[str, ...],
                   out: PolicyOutcome) -> None:
    layer = net.layer(k)
    extras = out.extras.setdefault(k, [])
    if layer.kind in MAP_KINDS:
        extras.append(_scalar(
            f"{layer.name}.offset", layer.name, layer.kind, "offset", 0.0,
            f"Fixup ({src}): scalar bias added to the input of {layer.name!r}, starting at 0.",
            refs, is_bias=True))
    if k != b.stop - 1 and (layer.activation or "linear") != "linear":
        extras.append(_scalar(
            f"{layer.name}.activation_offset", layer.name, layer.kind, "activation_offset", 0.0,
            f"Fixup ({src}): scalar bias added before the {layer.activation} that follows "
            f"{layer.name!r}, starting at 0.", refs, is_bias=True))


# ---------------------------------------------------------------------------------------------
# skip_gate


def _skip_gate(net: _Net, policy: SkipGatePolicy, out: PolicyOutcome) -> None:
    refs = (cite("de-2020"), cite("bachlechner-2020"))
    src = f"SkipInit, {short_cite('de-2020')}; ReZero, {short_cite('bachlechner-2020')}"
    for b in net.branches:
        out.extras.setdefault(b.stop - 1, []).append(_scalar(
            f"{b.name}.gate", b.name, "branch", "gate", 0.0,
            f"Scalar gate of residual branch {b.name!r}: the model computes x + gate * "
            f"branch(x), and the gate starts at 0 so that the block is the identity at the "
            f"start and the signal passes through any depth unchanged ({src}). The branch's "
            "own weights keep their recommended random scales, so it learns distinct "
            "features once the gate moves.", refs))
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
        "recommended weights instead of the identity.")


# ---------------------------------------------------------------------------------------------
# scaled_residual


def _residual_maps(net: _Net) -> set[int]:
    """The last map of every branch, and layers marked residual_out outside branches."""
    maps = {b.last_map for b in net.branches if b.last_map is not None}
    inside = {k for b in net.branches for k in b.indices}
    maps |= {k for k, layer in enumerate(net.request.layers)
             if layer.role == "residual_out" and k not in inside}
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
        base_text = (f"std {_fmt(base)}, common practice in GPT-2-style models (a convention, "
                     "not a derived value)")
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
                why = (f"scaled_residual: this map closes a residual branch, so its weights "
                       f"are scaled by 1/sqrt(N) with N = {n} residual layers "
                       f"({short_cite('radford-2019', 'sec. 2.3')}): {_fmt(base)}/sqrt({n}) = "
                       f"{_fmt(small)}, keeping the sum of N residual contributions at the "
                       f"scale of one; base {base_text}{before(c)}")
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
        net.warnings.append("depth_policy scaled_residual: recurrent layers keep their "
                            "recommended (orthogonal / Glorot) initialisation.")


# ---------------------------------------------------------------------------------------------
# Transformer depth: deepnorm and t_fixup


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
        net.warnings.append(f"depth_policy {policy}: {len(others)} layer(s) inside branches "
                            f"are neither dense nor attention ({others[0]!r} ...) and keep "
                            "their recommended initialisation.")
    if norms:
        first = sorted(set(norms))[0]
        wanted = ("post-norm transformers (norm after each residual addition)"
                  if policy == "deepnorm" else "transformers without normalisation layers")
        net.warnings.append(
            f"depth_policy {policy}: branches such as {first!r} contain norm layers, but "
            f"{policy} is derived for {wanted}; its constants do not hold as derived here.")


def _deepnorm(net: _Net, policy: DeepNormPolicy, stacks: _Stacks, out: PolicyOutcome) -> None:
    refs = (cite("wang-2022"),)
    src = short_cite("wang-2022")
    n, m = stacks.encoder, stacks.decoder
    constants: dict[str, tuple[float, float, str]] = {}
    if n is not None and m is not None:
        nm = n**4 * m
        constants["encoder"] = (_mp(lambda c: c.mpf("0.81") * c.root(c.mpf(nm), 16)),
                                _inverse_root(nm, 16, "0.87"),
                                f"alpha = 0.81 (N^4 M)^(1/16), beta = 0.87 (N^4 M)^(-1/16) with "
                                f"N = {n}, M = {m}")
        constants["decoder"] = (_root(3 * m, 4), _inverse_root(12 * m, 4),
                                f"alpha = (3M)^(1/4), beta = (12M)^(-1/4) with M = {m}")
    else:
        layers = n if n is not None else m
        assert layers is not None
        constants[policy.architecture] = (
            _root(2 * layers, 4), _inverse_root(8 * layers, 4),
            f"alpha = (2N)^(1/4), beta = (8N)^(-1/4) with N = {layers}")

    def change(slot: TensorSlot, c: Choice, b: Branch) -> Choice:
        stack = _stack_of(stacks, b) if len(constants) > 1 else policy.architecture
        alpha, beta, formula = constants[stack]
        if slot.part in ("query.weight", "key.weight"):
            why = (f"DeepNorm ({src}): query and key projections keep gain 1 (Glorot normal); "
                   f"only feed-forward, value and output projections take beta.")
            return _glorot(c, 1.0, "normal", why, refs)
        what = "feed-forward" if slot.part == "weight" else slot.part.split(".")[0]
        why = (f"DeepNorm ({src}): {what} weights of the {stack} are Glorot normal with gain "
               f"beta = {_fmt(beta)} ({formula}), which bounds the model update at any depth "
               f"together with the residual multiplier alpha = {_fmt(alpha)}.")
        return _glorot(c, beta, "normal", why, refs)

    _transformer_branches(net, "deepnorm", change)
    for stack, (alpha, _, formula) in constants.items():
        names = [b.name for b in net.branches
                 if len(constants) == 1 or _stack_of(stacks, b) == stack]
        out.multipliers.append({
            "name": "residual_alpha", "group": stack, "optimizer": None, "value": alpha,
            "applies_to": names,
            "text": f"DeepNorm: compute norm(alpha * x + branch(x)) in every residual branch "
                    f"of the {stack}, alpha = {_fmt(alpha)} ({formula}). The weights assume "
                    "this multiplier; without it they are merely down-scaled.",
            "references": list(refs),
        })
        net.warnings.append(f"depth_policy deepnorm: multiply the residual x by alpha = "
                            f"{_fmt(alpha)} in the {stack}'s branches (norm(alpha * x + f(x))); "
                            "see 'multipliers' in the plan.")
    out.summary = {
        "name": policy.name,
        "parameters": {"architecture": policy.architecture, "encoder_layers": n,
                       "decoder_layers": m,
                       **{f"{s}_alpha": a for s, (a, _, _) in constants.items()},
                       **{f"{s}_beta": b for s, (_, b, _) in constants.items()}},
        "text": "; ".join(f"{s}: {f}: alpha = {_fmt(a)}, beta = {_fmt(b)}"
                          for s, (a, b, f) in constants.items()) + f" ({src}).",
        "references": list(refs),
    }


def _t_fixup(net: _Net, policy: TFixupPolicy, stacks: _Stacks, out: PolicyOutcome) -> None:
    """T-Fixup as we read Huang et al. 2020, Algorithm 1 [from memory]:

    1. Xavier (Glorot) initialisation for every weight except the input embeddings, which are
       Gaussian with std dim^(-1/2).
    2. Decoder: value and output projections of every attention block and the weights of every
       feed-forward block, and the input embeddings, scaled by (9M)^(-1/4).
    3. Encoder: value and output projections and feed-forward weights scaled by 0.67 N^(-1/4).
    4. No layer normalisation and no learning-rate warmup (a training-script matter).

    The paper treats an encoder-decoder with N layers each; for a single stack we use that
    stack's factor, and the embeddings take (9M)^(-1/4) when there is a decoder, (9N)^(-1/4)
    for an encoder alone (our extrapolation).
    """
    refs = (cite("huang-2020"),)
    src = short_cite("huang-2020", "Algorithm 1 [from memory]")
    n, m = stacks.encoder, stacks.decoder
    factors: dict[str, tuple[float, str]] = {}
    if n is not None:
        factors["encoder"] = (_inverse_root(n, 4, "0.67"), f"0.67 N^(-1/4) with N = {n}")
    if m is not None:
        factors["decoder"] = (_inverse_root(9 * m, 4), f"(9M)^(-1/4) with M = {m}")
    depth = m if m is not None else n
    assert depth is not None
    embed = _inverse_root(9 * depth, 4)
    embed_text = f"(9 x {depth})^(-1/4) = {_fmt(embed)}" + (
        "" if m is not None else " (encoder alone: our extrapolation of the decoder rule)")

    def change(slot: TensorSlot, c: Choice, b: Branch) -> Choice:
        stack = _stack_of(stacks, b) if n is not None and m is not None else (
            "encoder" if n is not None else "decoder")
        factor, formula = factors[stack]
        if slot.part in ("query.weight", "key.weight"):
            why = (f"T-Fixup ({src}): query and key projections are Glorot uniform, unscaled.")
            return _glorot(c, 1.0, "uniform", why, refs)
        what = "feed-forward" if slot.part == "weight" else slot.part.split(".")[0]
        why = (f"T-Fixup ({src}): {what} weights of the {stack}: Glorot uniform scaled by "
               f"{formula} = {_fmt(factor)}.")
        return _glorot(c, factor, "uniform", why, refs)

    _transformer_branches(net, "t_fixup", change)
    for k, layer in enumerate(net.request.layers):
        if layer.kind != "embedding":
            continue
        assert isinstance(layer, EmbeddingLayer)
        dim = layer.dim
        std = _mp(lambda c: c.mpf(embed) / c.sqrt(c.mpf(dim)))  # noqa: B023 (called at once)
        why = (f"T-Fixup ({src}): input embedding Gaussian with std dim^(-1/2) = "
               f"1/sqrt({dim}), scaled by {embed_text}: std {_fmt(std)}")
        net.rewrite(k, _to_normal(std, "t_fixup", why, refs))
    out.summary = {
        "name": policy.name,
        "parameters": {"architecture": policy.architecture, "encoder_layers": n,
                       "decoder_layers": m,
                       **{f"{s}_factor": f for s, (f, _) in factors.items()},
                       "embedding_factor": embed},
        "text": f"T-Fixup ({src}): " + "; ".join(f"{s} {t} = {_fmt(f)}"
                                                  for s, (f, t) in factors.items())
                + f"; embeddings {embed_text}. Train without norm layers and without warmup.",
        "references": list(refs),
    }
    net.warnings.append("depth_policy t_fixup: the scaling replaces layer normalisation and "
                        "learning-rate warmup; train without both, as the method assumes.")


# ---------------------------------------------------------------------------------------------
# width_transfer


def _width(net: _Net, policy: WidthTransferPolicy) -> tuple[int | None, list[Problem]]:
    if policy.width is not None:
        return policy.width, []
    widths = set()
    for k in net.outputs():
        w = input_width(net.layer(k))
        if w is not None:
            widths.add(w[0])
    if len(widths) == 1:
        return widths.pop(), []
    found = "no output layer" if not widths else f"output layers of widths {sorted(widths)}"
    return None, [Problem(_policy_field("width"), "missing_field",
                          f"width_transfer could not tell this model's width ({found}); give "
                          "width (a positive integer)")]  # fmt: skip


def _groups(net: _Net) -> tuple[list[int], list[int], list[int]]:
    """(input, hidden, output) layers with weights, in the sense of Yang et al. 2021: input
    layers map a fixed-size input to the width (embeddings, and the first map when no
    embedding precedes it), output layers map the width to a fixed size (role output)."""
    inputs: list[int] = []
    hidden: list[int] = []
    outputs: list[int] = []
    seen_map = False
    for k, layer in enumerate(net.request.layers):
        if layer.kind == "norm":
            continue
        if layer.role == "output":
            outputs.append(k)
        elif layer.kind == "embedding" or not seen_map:
            inputs.append(k)
        else:
            hidden.append(k)
        seen_map = True
    return inputs, hidden, outputs


def _width_transfer(net: _Net, policy: WidthTransferPolicy, width: int,
                    out: PolicyOutcome) -> None:
    """Width scaling in the spirit of Yang et al. 2021, Table 3 [from memory], relative to a
    base width at which every rule coincides with the standard parametrisation:

        weights      init variance                 Adam lr      SGD lr
        input        1/fan_in (unchanged)          x 1          x width/base
        hidden       1/fan_in (unchanged)          x base/width x 1
        output       1/fan_in x base/width         x base/width x base/width
        biases,      unchanged                     x 1          x width/base
        norm vectors

    Attention logits: 1/d_head instead of 1/sqrt(d_head), i.e. the usual scale times
    sqrt(base/width) with a fixed number of heads.
    """
    refs = (cite("yang-2021", "Table 3 [from memory]"),)
    src = short_cite("yang-2021", "Table 3 [from memory]")
    base = policy.base_width
    shrink = base / width
    factor = math.sqrt(shrink)
    inputs, hidden, outputs = _groups(net)
    tensors: dict[str, list[str]] = {"input": [], "hidden": [], "output": [], "vectors": []}

    for group, members in (("input", inputs), ("hidden", hidden), ("output", outputs)):
        for k in members:
            if group == "output":
                note = (f"width_transfer ({src}): output layer, variance 1/fan_in^2 relative "
                        f"to base width {base}: the standard variance times base/width = "
                        f"{base}/{width}, std times sqrt(base/width) = {_fmt(factor)}. These "
                        "are scalings, not exact constants.")
                net.rewrite(k, _scaling(factor, note, refs))
            else:
                note = (f"width_transfer ({src}): {group} weights keep variance ~ 1/fan_in; "
                        f"Adam learning rate x {_fmt(1.0 if group == 'input' else shrink)} "
                        "(see multipliers).")
                net.rewrite(k, _annotating(note, refs))
    for k, entries in enumerate(net.choices):
        layer = net.layer(k)
        for slot, _ in entries:
            if _is_weight(layer, slot):
                group = ("output" if k in outputs else "input" if k in inputs else "hidden")
                tensors[group].append(slot.tensor)
            else:
                tensors["vectors"].append(slot.tensor)

    def add(name: str, group: str, optimizer: str | None, value: float, text: str) -> None:
        out.multipliers.append({"name": name, "group": group, "optimizer": optimizer,
                                "value": value, "applies_to": tensors.get(group, []),
                                "text": text, "references": list(refs)})

    ratio = f"base/width = {base}/{width}"
    add("output_multiplier", "output", None, 1.0,
        f"1: the served output weights already carry the base/width variance factor. If your "
        f"model multiplies the output layer's result by {ratio} = {_fmt(shrink)} instead "
        f"(the multiplier form), draw the output weights at the standard scale times "
        f"sqrt(width/base) = {_fmt(1.0 / factor)} and do not use these.")
    for optimizer, rates in (("adam", {"input": 1.0, "hidden": shrink, "output": shrink,
                                       "vectors": 1.0}),
                             ("sgd", {"input": width / base, "hidden": 1.0, "output": shrink,
                                      "vectors": width / base})):
        for group, value in rates.items():
            add("learning_rate_scale", group, optimizer, value,
                f"{optimizer} learning rate of the {group} tensors: the base model's rate "
                f"times {_fmt(value)} ({src}; {ratio}).")
    if any(layer.kind == "attention" for layer in net.request.layers):
        out.multipliers.append({
            "name": "attention_logit_scale", "group": "attention", "optimizer": None,
            "value": factor,
            "applies_to": [layer.name for layer in net.request.layers
                           if layer.kind == "attention"],
            "text": f"multiply the usual 1/sqrt(d_head) attention-logit scale by sqrt({ratio})"
                    f" = {_fmt(factor)}: 1/d_head scaling with a fixed number of heads "
                    f"({short_cite('yang-2021', '[from memory]')}).",
            "references": list(refs),
        })
    out.summary = {
        "name": policy.name,
        "parameters": {"base_width": base, "width": width, "width_ratio": width / base},
        "text": f"Width scaling relative to base width {base} ({src}): output weights' "
                f"variance x {_fmt(shrink)}, learning-rate scalings under 'multipliers'. These "
                "are scalings, not exact constants.",
        "references": list(refs),
    }
    net.warnings.append(
        f"depth_policy width_transfer: the learning-rate scalings under 'multipliers' "
        f"(hidden and output weights x {_fmt(shrink)} with Adam) are part of the transfer; the "
        "initial weights alone do not make tuned hyperparameters carry over.")


# ---------------------------------------------------------------------------------------------
# Entry points


def _problems(net: _Net) -> list[Problem]:
    policy = net.request.depth_policy
    if isinstance(policy, FixupPolicy):
        return _fixup_problems(net)
    if isinstance(policy, SkipGatePolicy):
        return _need_branches(net, "skip_gate")
    if isinstance(policy, ScaledResidualPolicy):
        return _scaled_residual_problems(net, policy)
    if isinstance(policy, TransformerDepth):
        return _stacks(net, policy)[1]
    if isinstance(policy, WidthTransferPolicy):
        return _width(net, policy)[1]
    return []


def policy_problems(parsed: ParsedRequest) -> list[Problem]:
    """Why the request's depth policy cannot apply to its network (empty when it can)."""
    if parsed.request.depth_policy is None:
        return []
    return _problems(_Net(parsed.request, [], list(parsed.branches)))


def apply_policy(parsed: ParsedRequest, choices: Sequence[Sequence[Entry]]) -> PolicyOutcome:
    """The plan's choices (one list per layer) after the request's depth policy."""
    request = parsed.request
    net = _Net(request, [list(c) for c in choices], list(parsed.branches))
    out = PolicyOutcome(choices=net.choices)
    policy = request.depth_policy
    if policy is None:
        return out
    problems = _problems(net)
    if problems:
        raise RequestRejected(problems)
    if isinstance(policy, FixupPolicy):
        _fixup(net, policy, out)
    elif isinstance(policy, SkipGatePolicy):
        _skip_gate(net, policy, out)
    elif isinstance(policy, ScaledResidualPolicy):
        _scaled_residual(net, policy, out)
    elif isinstance(policy, DeepNormPolicy | TFixupPolicy):
        stacks, _ = _stacks(net, policy)
        assert stacks is not None
        if isinstance(policy, DeepNormPolicy):
            _deepnorm(net, policy, stacks, out)
        else:
            _t_fixup(net, policy, stacks, out)
    elif isinstance(policy, WidthTransferPolicy):
        width, _ = _width(net, policy)
        assert width is not None
        _width_transfer(net, policy, width, out)
    if net.skipped:
        shown = ", ".join(repr(n) for n in net.skipped[:5])
        more = f" and {len(net.skipped) - 5} more" if len(net.skipped) > 5 else ""
        net.warnings.append(f"depth_policy {policy.name}: layers with an explicit init keep "
                            f"it and are not changed by the policy: {shown}{more}.")
    out.choices = net.choices
    out.warnings = net.warnings
    return out


__all__ = ["PolicyOutcome", "apply_policy", "policy_problems"]
