"""What the service knows: methods, distributions and activations, each with gain and source.

The document is built from the same registries the planner uses, so it cannot drift from
what a plan actually does.
"""

from __future__ import annotations

from functools import lru_cache
from typing import Any

from seedbed.core.activations import (
    GAIN_DEFINITION,
    activation_names,
    describe_activation,
    gain_for,
)
from seedbed.core.references import cite
from seedbed.core.version import ALGORITHM
from seedbed_client.generator import TRUNCATION_BOUND, TRUNCATION_STD_FACTOR

_METHODS: tuple[tuple[str, str, tuple[str, ...]], ...] = (
    (
        "symmetric_uniform",
        "U(-b, b); b given, or gain/sqrt(fan) (the older heuristic U(-1/sqrt(n), 1/sqrt(n)))",
        ("glorot-2010",),
    ),
    (
        "glorot",
        "variance gain^2 * 2/(fan_in + fan_out); uniform bound gain*sqrt(6/(fan_in + fan_out))",
        ("glorot-2010",),
    ),
    ("he", "std gain/sqrt(fan), fan-in (forward) or fan-out (backward)", ("he-2015",)),
    ("lecun", "std gain/sqrt(fan_in)", ("lecun-1998",)),
    (
        "orthogonal",
        "Haar-random (semi-)orthogonal matrix times gain, per gate block; "
        "reproducible: platform (QR may differ in the last bits between BLAS builds)",
        ("saxe-2014", "mezzadri-2007"),
    ),
    (
        "identity",
        "identity matrix (dense, recurrent gate blocks) or Dirac delta at the kernel "
        "centre (conv), times gain",
        ("le-2015",),
    ),
    ("constant", "every element equals a value; on hidden weights it keeps units symmetric", ()),
)

# Depth/width policies a request may name in `depth_policy` (seedbed.core.policies).
_POLICIES: tuple[tuple[str, str, tuple[str, ...]], ...] = (
    (
        "fixup",
        "branch layers scaled by L^(-1/(2m-2)); last layer of each branch and the "
        "classifier zero; scalar multipliers 1 and offsets 0",
        ("zhang-2019",),
    ),
    (
        "skip_gate",
        "a scalar gate per residual branch, initialised 0",
        ("de-2020", "bachlechner-2020"),
    ),
    (
        "scaled_residual",
        "base std (0.02, common practice) and base/sqrt(N) on each residual "
        "branch's last map, N residual layers",
        ("radford-2019",),
    ),
    (
        "deepnorm",
        "residual multiplier alpha for the training script, gain beta on feed-forward, "
        "value and output projections, gain 1 on query and key",
        ("wang-2022",),
    ),
    (
        "t_fixup",
        "transformer scaling without normalisation or warm-up [from memory]",
        ("huang-2020",),
    ),
    (
        "width_transfer",
        "scalings relative to a base width, with the multipliers a training "
        "script applies [from memory]",
        ("yang-2021",),
    ),
)


@lru_cache(maxsize=1)
def catalog() -> dict[str, Any]:
    """JSON-ready description of every method, distribution and activation."""
    activations = []
    for name in activation_names():
        info = describe_activation(name).as_dict()
        gain = gain_for(name)
        info["gain"] = gain.value
        info["gain_closed_form"] = gain.closed_form
        info["gain_how"] = gain.how
        activations.append(info)
    return {
        "algorithm": ALGORITHM,
        "gain_definition": GAIN_DEFINITION,
        "methods": [
            {"name": name, "formula": formula, "references": [cite(k) for k in keys]}
            for name, formula, keys in _METHODS
        ],
        "depth_policies": [
            {"name": name, "summary": summary, "references": [cite(k) for k in keys]}
            for name, summary, keys in _POLICIES
        ],
        "distributions": [
            {"name": "uniform", "description": "U(-b, b), std b/sqrt(3)"},
            {
                "name": "normal",
                "description": "N(0, std^2) by inverse CDF (Wichura 1988, AS 241)",
                "references": [cite("wichura-1988")],
            },
            {
                "name": "truncated_normal",
                "description": f"N(0, sigma^2) cut at +-{TRUNCATION_BOUND:g} sigma; the realised "
                f"std is {TRUNCATION_STD_FACTOR!r} sigma",
                "references": [cite("wichura-1988")],
            },
        ],
        "activations": activations,
    }
