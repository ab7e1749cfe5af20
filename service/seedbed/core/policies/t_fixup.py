"""t_fixup: Huang et al. 2020, "Improving Transformer Optimization Through Better
Initialization" (Algorithm 1 [from memory]).
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
    _to_normal,
)
from seedbed.core.policies.transformer_stacks import (
    _stack_of,
    _Stacks,
    _stacks,
    _transformer_branches,
)
from seedbed.core.references import cite, short_cite
from seedbed.core.request.branches import Branch
from seedbed.core.request.layers import EmbeddingLayer
from seedbed.core.request.policy_models import (
    TFixupPolicy,
)
from seedbed.core.request.problems import Problem
from seedbed.core.tensors import TensorSlot


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
        "" if m is not None else " (encoder alone: our extrapolation of the decoder rule)"
    )

    def change(slot: TensorSlot, c: Choice, b: Branch) -> Choice:
        stack = (
            _stack_of(stacks, b)
            if n is not None and m is not None
            else ("encoder" if n is not None else "decoder")
        )
        factor, formula = factors[stack]
        if slot.part in ("query.weight", "key.weight"):
            why = f"T-Fixup ({src}): query and key projections are Glorot uniform, unscaled."
            return _glorot(c, 1.0, "uniform", why, refs)
        what = "feed-forward" if slot.part == "weight" else slot.part.split(".")[0]
        why = (
            f"T-Fixup ({src}): {what} weights of the {stack}: Glorot uniform scaled by "
            f"{formula} = {_fmt(factor)}."
        )
        return _glorot(c, factor, "uniform", why, refs)

    _transformer_branches(net, "t_fixup", change)
    for k, layer in enumerate(net.request.layers):
        if layer.kind != "embedding":
            continue
        assert isinstance(layer, EmbeddingLayer)
        dim = layer.dim
        std = _mp(lambda c: c.mpf(embed) / c.sqrt(c.mpf(dim)))  # noqa: B023 (called at once)
        why = (
            f"T-Fixup ({src}): input embedding Gaussian with std dim^(-1/2) = "
            f"1/sqrt({dim}), scaled by {embed_text}: std {_fmt(std)}"
        )
        net.rewrite(k, _to_normal(std, "t_fixup", why, refs))
    out.summary = {
        "name": policy.name,
        "parameters": {
            "architecture": policy.architecture,
            "encoder_layers": n,
            "decoder_layers": m,
            **{f"{s}_factor": f for s, (f, _) in factors.items()},
            "embedding_factor": embed,
        },
        "text": f"T-Fixup ({src}): "
        + "; ".join(f"{s} {t} = {_fmt(f)}" for s, (f, t) in factors.items())
        + f"; embeddings {embed_text}. Train without norm layers and without warmup.",
        "references": list(refs),
    }
    net.warnings.append(
        "depth_policy t_fixup: the scaling replaces layer normalisation and "
        "learning-rate warmup; train without both, as the method assumes."
    )


def problems(net: _Net, policy: TFixupPolicy) -> list[Problem]:
    return _stacks(net, policy)[1]


def apply(net: _Net, policy: TFixupPolicy, out: PolicyOutcome) -> None:
    stacks, _ = _stacks(net, policy)
    assert stacks is not None  # problems() was empty
    _t_fixup(net, policy, stacks, out)
