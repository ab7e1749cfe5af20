"""width_transfer: Yang et al. 2021, "Tensor Programs V: Tuning Large Neural Networks via
Zero-Shot Hyperparameter Transfer" (Table 3 [from memory]).
"""

from __future__ import annotations

import math

from seedbed.core.policies.common import (
    PolicyOutcome,
    _annotating,
    _fmt,
    _is_weight,
    _Net,
    _policy_field,
    _scaling,
)
from seedbed.core.references import cite, short_cite
from seedbed.core.request.branches import input_width
from seedbed.core.request.policy_models import (
    WidthTransferPolicy,
)
from seedbed.core.request.problems import Problem


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


def _width_transfer(net: _Net, policy: WidthTransferPolicy, width: int, out: PolicyOutcome) -> None:
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
                note = (
                    f"width_transfer ({src}): output layer, variance 1/fan_in^2 relative "
                    f"to base width {base}: the standard variance times base/width = "
                    f"{base}/{width}, std times sqrt(base/width) = {_fmt(factor)}. These "
                    "are scalings, not exact constants."
                )
                net.rewrite(k, _scaling(factor, note, refs))
            else:
                note = (
                    f"width_transfer ({src}): {group} weights keep variance ~ 1/fan_in; "
                    f"Adam learning rate x {_fmt(1.0 if group == 'input' else shrink)} "
                    "(see multipliers)."
                )
                net.rewrite(k, _annotating(note, refs))
    for k, entries in enumerate(net.choices):
        layer = net.layer(k)
        for slot, _ in entries:
            if _is_weight(layer, slot):
                group = "output" if k in outputs else "input" if k in inputs else "hidden"
                tensors[group].append(slot.tensor)
            else:
                tensors["vectors"].append(slot.tensor)

    def add(name: str, group: str, optimizer: str | None, value: float, text: str) -> None:
        out.multipliers.append(
            {
                "name": name,
                "group": group,
                "optimizer": optimizer,
                "value": value,
                "applies_to": tensors.get(group, []),
                "text": text,
                "references": list(refs),
            }
        )

    ratio = f"base/width = {base}/{width}"
    add(
        "output_multiplier",
        "output",
        None,
        1.0,
        f"1: the served output weights already carry the base/width variance factor. If your "
        f"model multiplies the output layer's result by {ratio} = {_fmt(shrink)} instead "
        f"(the multiplier form), draw the output weights at the standard scale times "
        f"sqrt(width/base) = {_fmt(1.0 / factor)} and do not use these.",
    )
    for optimizer, rates in (
        ("adam", {"input": 1.0, "hidden": shrink, "output": shrink, "vectors": 1.0}),
        ("sgd", {"input": width / base, "hidden": 1.0, "output": shrink, "vectors": width / base}),
    ):
        for group, value in rates.items():
            add(
                "learning_rate_scale",
                group,
                optimizer,
                value,
                f"{optimizer} learning rate of the {group} tensors: the base model's rate "
                f"times {_fmt(value)} ({src}; {ratio}).",
            )
    if any(layer.kind == "attention" for layer in net.request.layers):
        out.multipliers.append(
            {
                "name": "attention_logit_scale",
                "group": "attention",
                "optimizer": None,
                "value": factor,
                "applies_to": [
                    layer.name for layer in net.request.layers if layer.kind == "attention"
                ],
                "text": f"multiply the usual 1/sqrt(d_head) attention-logit scale by sqrt({ratio})"
                f" = {_fmt(factor)}: 1/d_head scaling with a fixed number of heads "
                f"({short_cite('yang-2021', '[from memory]')}).",
                "references": list(refs),
            }
        )
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
        "initial weights alone do not make tuned hyperparameters carry over."
    )


def problems(net: _Net, policy: WidthTransferPolicy) -> list[Problem]:
    return _width(net, policy)[1]


def apply(net: _Net, policy: WidthTransferPolicy, out: PolicyOutcome) -> None:
    width, _ = _width(net, policy)
    assert width is not None  # problems() was empty
    _width_transfer(net, policy, width, out)
