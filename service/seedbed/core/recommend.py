"""What each tensor gets, and why: the recommendation rules and the caller's overrides.

Recommended (no `init` override), by layer kind and the activation that follows:

    dense / conv weight, role output            Glorot uniform, gain 1: logits start at O(1)
    dense / conv weight, rectifier-like         He normal, fan-in, gain of the activation
      (relu, leaky_relu, elu, gelu, silu, softplus)
    dense / conv weight, selu                   LeCun normal (gain 1; Klambauer et al. 2017)
    dense / conv weight, tanh, sigmoid, linear  Glorot uniform times the activation's gain
    embedding                                   LeCun normal with fan-in 1: unit-variance rows
    recurrent input weight                      Glorot uniform per gate block, gain 1
    recurrent recurrent weight                  orthogonal per gate block, gain 1 (Saxe et al.
                                                2014); identity for simple ReLU cells (Le et
                                                al. 2015)
    attention projections                       Glorot uniform, gain 1
    norm scale / shift                          constant 1 / constant 0
    biases                                      0; LSTM forget gate `forget_bias` (default 1;
                                                Gers et al. 2000, Jozefowicz et al. 2015);
                                                output layer with `class_prior` pi:
                                                log(pi/(1-pi)) (Lin et al. 2017)

Every choice carries a rationale with the numbers and its sources, and warnings where the
start would harm training (symmetric units, a fan that frameworks take the other way round).
"""

from __future__ import annotations

import math
from typing import Any

from seedbed.core import fans as fan_rules
from seedbed.core.activations import describe_activation, gain_for
from seedbed.core.choice import Choice
from seedbed.core.meanfield import mean_field, rationale_sentence
from seedbed.core.references import cite, short_cite
from seedbed.core.request.overrides import WeightOverride
from seedbed.core.scales import (
    Realised,
    Scale,
    distribution_for_bound,
    distribution_for_std,
    glorot_scale,
    he_scale,
    lecun_scale,
    prior_bias,
    realise,
    symmetric_uniform_scale,
)
from seedbed.core.tensors import TensorSlot

_SQRT3 = math.sqrt(3.0)


def _fmt(x: float) -> str:
    return f"{x:.6g}"


# ---------------------------------------------------------------------------------------------
# Fans


def fans_for(layer: Any, slot: TensorSlot) -> fan_rules.Fans:
    kind = layer.kind
    if kind == "dense":
        return fan_rules.dense_fans(layer.n_in, layer.n_out)
    if kind == "conv":
        return fan_rules.conv_fans(
            layer.channels_in,
            layer.channels_out,
            tuple(layer.kernel),
            layer.groups,
            layer.transposed,
            None if layer.stride is None else tuple(layer.stride),
        )
    if kind == "embedding":
        return fan_rules.embedding_fans(layer.vocab, layer.dim)
    if kind == "recurrent":
        part = "input" if slot.part == "input_weight" else "recurrent"
        return fan_rules.recurrent_fans(layer.n_in, layer.hidden, layer.cell, part)
    if kind == "attention":
        return fan_rules.attention_fans(layer.dim, layer.heads, slot.part.split(".")[0])
    raise ValueError(f"layer kind {kind!r} has no weight fans")


# ---------------------------------------------------------------------------------------------
# Weights


def _random_choice(
    scale: Scale,
    realised: Realised,
    fans: fan_rules.Fans,
    why: str,
    refs: tuple[str, ...],
    warnings: tuple[str, ...] = (),
) -> Choice:
    return Choice(
        method=scale.method,
        distribution=realised.distribution,
        sampler=realised.distribution,
        scale=realised.sampler_scale,
        fan_in=fans.fan_in,
        fan_out=fans.fan_out,
        gain=scale.gain,
        std=realised.std,
        bound=realised.bound,
        value=None,
        rationale=f"{why} {scale.text}; drawn as {realised.text}. {fans.explanation}.",
        references=tuple(dict.fromkeys(refs + scale.references)),
        warnings=warnings,
    )


def _gain_text(activation: str, param: float | None) -> tuple[float, str, tuple[str, ...]]:
    g = gain_for(activation, param)
    return g.value, g.how, g.references


def _transposed_warning(layer: Any, fans: fan_rules.Fans) -> tuple[str, ...]:
    if layer.kind != "conv" or not layer.transposed:
        return ()
    taps = math.prod(layer.kernel)
    stored = layer.channels_out // layer.groups * taps
    return (
        f"transposed conv: fan_in here counts the inputs each output gathers ({fans.fan_in}); "
        f"a framework that reads fans off a transposed kernel's stored shape takes the other "
        f"direction ({stored}) and scales these weights by sqrt({fans.fan_in}/{stored}) = "
        f"{_fmt(math.sqrt(float(fans.fan_in) / stored))} relative to this plan.",
    )


def recommend_weight(layer: Any, slot: TensorSlot, recurrent_identity: bool = False) -> Choice:
    """The recommended initialisation of one weight tensor (not a bias, not a norm vector)."""
    fans = fans_for(layer, slot)
    act = layer.activation or "linear"
    info = describe_activation(act)
    warn = _transposed_warning(layer, fans)
    kind = layer.kind

    if kind == "embedding":
        scale = lecun_scale(float(fans.fan_in), 1.0)
        why = (
            "Embedding rows are looked up, not summed: fan-in is 1, so LeCun's rule gives "
            "unit-variance components, as a normalised input would have (common practice)."
        )
        return _random_choice(scale, realise(scale, "normal"), fans, why, ())
    if kind == "recurrent" and slot.part == "recurrent_weight":
        return _recurrent_matrix(layer, slot, fans, recurrent_identity)
    if kind == "recurrent":
        scale = glorot_scale(float(fans.fan_in), float(fans.fan_out), 1.0)
        why = (
            f"Input weights of a {layer.cell} cell: Glorot uniform per gate block (each of the "
            f"{slot.gate_blocks} block(s) is its own {layer.hidden} x {layer.n_in} map), "
            "gain 1 because the gates' own nonlinearities act on sums of input and recurrent "
            "terms (common practice)."
        )
        return _random_choice(scale, realise(scale, "uniform"), fans, why, ())
    if kind == "attention":
        scale = glorot_scale(float(fans.fan_in), float(fans.fan_out), 1.0)
        why = (
            f"Attention {slot.part.split('.')[0]} projection: a linear map, so Glorot uniform "
            "with gain 1 (common practice for attention projections)."
        )
        return _random_choice(scale, realise(scale, "uniform"), fans, why, ())

    # dense and conv
    if layer.role == "output":
        scale = glorot_scale(float(fans.fan_in), float(fans.fan_out), 1.0)
        why = (
            f"Output layer (followed by {act}): Glorot uniform with gain 1 so the outputs "
            "start at unit scale; no later layer needs its variance preserved."
        )
        return _random_choice(scale, realise(scale, "uniform"), fans, why, (), warn)
    gain, how, grefs = _gain_text(act, layer.activation_param)
    if act == "selu":
        scale = lecun_scale(float(fans.fan_in), 1.0)
        why = (
            f"Followed by selu: LeCun normal, std 1/sqrt(fan_in), the scaling under which "
            f"SELU is self-normalising ({short_cite('klambauer-2017')})."
        )
        return _random_choice(
            scale, realise(scale, "normal"), fans, why, (cite("klambauer-2017"), *grefs), warn
        )
    if info.rectifier_like:
        scale = he_scale(float(fans.fan_in), float(fans.fan_out), gain, "in")
        why = f"Followed by {act} (rectifier-like): He normal in fan-in mode; gain {how}."
        return _random_choice(scale, realise(scale, "normal"), fans, why, grefs, warn)
    scale = glorot_scale(float(fans.fan_in), float(fans.fan_out), gain)
    why = (
        f"Followed by {act}: Glorot uniform, balancing forward and backward variance, times "
        f"the activation's gain: {how}."
    )
    if info.saturating:
        # For saturating units the mean-field figures say where this scale sits relative to
        # the edge of chaos, which the gain alone does not show. Rounded to 4 digits in the
        # text; they never touch the values.
        sigma_w2 = float(fans.fan_in) * scale.std * scale.std
        figures = mean_field(act, sigma_w2, 0.0, layer.activation_param)
        why += " " + rationale_sentence(figures)
        grefs = (*grefs, cite("poole-2016"), cite("schoenholz-2017"))
    return _random_choice(scale, realise(scale, "uniform"), fans, why, grefs, warn)


def _recurrent_matrix(layer: Any, slot: TensorSlot, fans: fan_rules.Fans, identity: bool) -> Choice:
    h = layer.hidden
    blocks = slot.gate_blocks
    rms = 1.0 / math.sqrt(h)
    if identity:
        return Choice(
            method="identity",
            distribution=None,
            sampler="identity",
            scale=1.0,
            fan_in=fans.fan_in,
            fan_out=fans.fan_out,
            gain=1.0,
            std=rms,
            bound=None,
            value=None,
            rationale=(
                f"Simple cell followed by relu: identity recurrent matrix ({h} x {h}) with "
                f"zero bias, so the hidden state is carried unchanged at the start "
                f"({short_cite('le-2015')}). Element RMS 1/sqrt({h}) = {_fmt(rms)}."
            ),
            references=(cite("le-2015"),),
        )
    return Choice(
        method="orthogonal",
        distribution=None,
        sampler="orthogonal",
        scale=1.0,
        fan_in=fans.fan_in,
        fan_out=fans.fan_out,
        gain=1.0,
        std=rms,
        bound=None,
        value=None,
        rationale=(
            f"Recurrent weights: a Haar-random orthogonal {h} x {h} matrix per gate block "
            f"({blocks} block(s)), gain 1, so repeated application through time neither "
            f"grows nor shrinks the state: all singular values are 1 "
            f"({short_cite('saxe-2014')}); sign-corrected QR of a Gaussian matrix "
            f"({short_cite('mezzadri-2007')}). Element RMS 1/sqrt({h}) = {_fmt(rms)}."
        ),
        references=(cite("saxe-2014"), cite("mezzadri-2007")),
        reproducible="platform",
    )


def _symmetry_warning(layer: Any, value: float) -> tuple[str, ...]:
    if layer.role == "residual_out" and value == 0.0:
        return (
            "zero weights on a residual branch's last layer start the branch as the "
            "identity (Fixup/SkipInit style); the earlier layers of the branch must be "
            "random or the branch never learns distinct features.",
        )
    return (
        f"every weight of {layer.name} equals {value!r}: all units of the layer compute the "
        "same function and receive the same gradient, so they stay identical forever "
        "(symmetry is never broken). Use a random method for hidden layers.",
    )


def override_weight(
    layer: Any, slot: TensorSlot, ov: WeightOverride, recommended: Choice
) -> Choice:
    """The caller's explicit `init` for a weight tensor, explained against the recommendation."""
    fans = fans_for(layer, slot)
    act = layer.activation or "linear"
    m = ov.method
    versus = (
        f" (the recommendation was {recommended.method} with std {_fmt(recommended.std or 0.0)})"
    )
    if m == "constant":
        assert ov.value is not None
        return Choice(
            method="constant",
            distribution=None,
            sampler="constant",
            scale=ov.value,
            fan_in=fans.fan_in,
            fan_out=fans.fan_out,
            gain=None,
            std=0.0,
            bound=None,
            value=ov.value,
            rationale=f"Caller's override: every element {ov.value!r}.{versus}",
            references=(),
            warnings=_symmetry_warning(layer, ov.value),
            scale_ratio=0.0 if recommended.std else 1.0,
        )
    if m in ("orthogonal", "identity"):
        return _structured_override(layer, slot, ov, fans, act, versus, recommended)
    gain = ov.gain if ov.gain is not None else gain_for(act, layer.activation_param).value
    dist = ov.distribution or "uniform"
    if ov.std is not None or ov.bound is not None:
        realised = (
            distribution_for_std(ov.std, dist)
            if ov.std is not None
            else distribution_for_bound(ov.bound or 0.0, dist)
        )
        scale = Scale(
            m,
            realised.std,
            realised.bound or realised.std * _SQRT3,
            1.0,
            None,
            f"explicit {'std' if ov.std is not None else 'bound'} from the caller",
            (),
        )
    else:
        if m == "glorot":
            scale = glorot_scale(float(fans.fan_in), float(fans.fan_out), gain)
        elif m == "he":
            scale = he_scale(float(fans.fan_in), float(fans.fan_out), gain, ov.fan or "in")
        elif m == "lecun":
            if ov.fan in (None, "in"):
                scale = lecun_scale(float(fans.fan_in), gain)
            else:
                base = he_scale(float(fans.fan_in), float(fans.fan_out), gain, ov.fan)
                scale = Scale(
                    "lecun",
                    base.std,
                    base.uniform_bound,
                    gain,
                    base.fan,
                    base.text.replace("He:", "LeCun-style:"),
                    base.references,
                )
        else:
            fan = {
                "in": fans.fan_in,
                "out": fans.fan_out,
                "mean": (float(fans.fan_in) + float(fans.fan_out)) / 2,
            }[ov.fan or "in"]
            scale = symmetric_uniform_scale(float(fan), None, gain)
        realised = realise(scale, dist)
    ratio = realised.std / recommended.std if recommended.std else 1.0
    choice = _random_choice(scale, realised, fans, "Caller's override:", ())
    note = f"{versus}; this is {_fmt(ratio)} times the recommended std."
    return Choice(
        **{
            **choice.__dict__,
            "method": m,
            "rationale": choice.rationale + note,
            "scale_ratio": ratio,
        }
    )


def _structured_override(
    layer: Any,
    slot: TensorSlot,
    ov: WeightOverride,
    fans: fan_rules.Fans,
    act: str,
    versus: str,
    recommended: Choice,
) -> Choice:
    rows = slot.logical_shape[0] // slot.gate_blocks
    cols = math.prod(slot.logical_shape) // slot.logical_shape[0]
    rms_unit = math.sqrt(min(rows, cols) / (rows * cols))
    if ov.method == "identity":
        gain = ov.gain if ov.gain is not None else 1.0
        what = (
            "Dirac delta: each output channel copies its own input channel at the kernel centre"
            if layer.kind == "conv"
            else "identity matrix per block"
        )
        text = f"Caller's override: {what}, times gain {_fmt(gain)}.{versus}"
        refs: tuple[str, ...] = (cite("le-2015"),) if layer.kind == "recurrent" else ()
        sampler, reproducible = "identity", "exact"
    else:
        gain = ov.gain if ov.gain is not None else gain_for(act, layer.activation_param).value
        text = (
            f"Caller's override: Haar-random (semi-)orthogonal {rows} x {cols} block(s) times "
            f"gain {_fmt(gain)}, all singular values equal to the gain "
            f"({short_cite('saxe-2014')}; sign-corrected QR, "
            f"{short_cite('mezzadri-2007')}).{versus}"
        )
        refs = (cite("saxe-2014"), cite("mezzadri-2007"))
        sampler, reproducible = "orthogonal", "platform"
    std = gain * rms_unit
    ratio = std / recommended.std if recommended.std else 1.0
    return Choice(
        method=ov.method,
        distribution=None,
        sampler=sampler,
        scale=gain,
        fan_in=fans.fan_in,
        fan_out=fans.fan_out,
        gain=gain,
        std=std,
        bound=None,
        value=None,
        rationale=f"{text} Element RMS gain*sqrt(min(rows, cols)/(rows*cols)) = {_fmt(std)}.",
        references=refs,
        reproducible=reproducible,
        scale_ratio=ratio,
    )


# ---------------------------------------------------------------------------------------------
# Biases and norm vectors


def _constant(
    value: float,
    why: str,
    refs: tuple[str, ...] = (),
    block_values: tuple[float, ...] | None = None,
) -> Choice:
    return Choice(
        method="constant",
        distribution=None,
        sampler="constant",
        scale=value,
        fan_in=None,
        fan_out=None,
        gain=None,
        std=0.0 if block_values is None else None,
        bound=None,
        value=None if block_values is not None else value,
        rationale=why,
        references=refs,
        block_values=block_values,
    )


def _norm_scale_override(ov: WeightOverride) -> Choice:
    """A norm scale set by the caller: a constant, or a distribution with an explicit scale."""
    if ov.method == "constant":
        assert ov.value is not None
        return _constant(ov.value, f"Caller's override: every scale element {ov.value!r}.")
    dist = ov.distribution or "uniform"
    realised = (
        distribution_for_std(ov.std, dist)
        if ov.std is not None
        else distribution_for_bound(ov.bound or 0.0, dist)
    )
    return Choice(
        method=ov.method,
        distribution=dist,
        sampler=dist,
        scale=realised.sampler_scale,
        fan_in=None,
        fan_out=None,
        gain=None,
        std=realised.std,
        bound=realised.bound,
        value=None,
        rationale=f"Caller's override of the normalisation scale: {realised.text}.",
        references=(),
    )


def vector_choice(layer: Any, slot: TensorSlot) -> Choice:
    """Biases, norm scales and shifts: constants, with the published exceptions."""
    if layer.kind == "norm":
        if slot.part == "scale" and layer.init is not None:
            return _norm_scale_override(layer.init)
        if slot.part == "scale":
            return _constant(
                1.0,
                "Normalisation scale starts at 1 so the layer begins as plain "
                "normalisation (common practice).",
            )
        return _constant(0.0, "Normalisation shift starts at 0 (common practice).")
    if layer.bias_init is not None:
        return _constant(
            layer.bias_init.value,
            f"Caller's override: every bias element {layer.bias_init.value!r}.",
        )
    if layer.kind == "recurrent" and layer.cell == "lstm":
        forget = layer.forget_bias if layer.forget_bias is not None else 1.0
        values = tuple(forget if g == "forget" else 0.0 for g in slot.gate_names)
        order = ", ".join(f"{g}={v!r}" for g, v in zip(slot.gate_names, values, strict=True))
        return _constant(
            0.0,
            (
                f"LSTM bias per gate block ({order}): the forget gate starts at {forget!r} so the "
                f"cell keeps its memory early in training ({short_cite('gers-2000')}; "
                f"{short_cite('jozefowicz-2015')}); the other gates start at 0."
            ),
            (cite("gers-2000"), cite("jozefowicz-2015")),
            block_values=values,
        )
    if layer.role == "output" and layer.class_prior is not None:
        prior = prior_bias(layer.class_prior)
        return _constant(prior.value, prior.text + ".", prior.references)
    return _constant(
        0.0,
        "Biases start at 0: the weights already break the symmetry between "
        "units, and a zero bias adds no offset to the variance (common practice).",
    )
