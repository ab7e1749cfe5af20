"""A fixed set of requests whose output bytes are pinned by SHA-256
(tests/unit/core/test_golden.py).

Runnable as a script: prints {"<case>/<tensor>": sha256} as JSON, so the same computation can be
repeated in a subprocess with different CPU features disabled.
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path
from typing import Any

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "service"))

from seedbed.core.plan import build_plan
from seedbed.core.render import iter_tensor_bytes

# An invented small vision-and-sequence model, exercising every kind and sampler. Its layers are
# a collection (each kind once), not one chain, so the requests say widths "unchecked"; a
# tensor's bytes depend only on the seed, its name and its own spec, so that does not move them.
_LAYERS: list[dict[str, Any]] = [
    {
        "name": "patch",
        "kind": "conv",
        "channels_in": 3,
        "channels_out": 16,
        "kernel": [4, 4],
        "activation": "gelu",
    },
    {
        "name": "mix",
        "kind": "conv",
        "channels_in": 16,
        "channels_out": 16,
        "kernel": [3, 3],
        "groups": 16,
        "activation": "silu",
    },
    {
        "name": "lift",
        "kind": "conv",
        "channels_in": 16,
        "channels_out": 8,
        "kernel": [2, 2],
        "transposed": True,
        "stride": [2, 2],
        "activation": "leaky_relu",
        "activation_param": 0.2,
    },
    {"name": "tokens", "kind": "embedding", "vocab": 97, "dim": 24},
    {
        "name": "memory",
        "kind": "recurrent",
        "cell": "lstm",
        "n_in": 24,
        "hidden": 12,
        "gate_order": ["forget", "input", "cell", "output"],
    },
    {"name": "relay", "kind": "recurrent", "cell": "gru", "n_in": 12, "hidden": 10},
    {"name": "mixer", "kind": "attention", "dim": 24, "heads": 4},
    {"name": "post", "kind": "norm", "dim": 24},
    {"name": "body", "kind": "dense", "n_in": 24, "n_out": 40, "activation": "selu"},
    {
        "name": "squash",
        "kind": "dense",
        "n_in": 40,
        "n_out": 40,
        "activation": "tanh",
        "init": {"method": "glorot", "distribution": "truncated_normal"},
    },
    {
        "name": "turn",
        "kind": "dense",
        "n_in": 40,
        "n_out": 40,
        "activation": "relu",
        "init": {"method": "orthogonal"},
    },
    {"name": "keep", "kind": "dense", "n_in": 40, "n_out": 40, "init": {"method": "identity"}},
    {
        "name": "head",
        "kind": "dense",
        "n_in": 40,
        "n_out": 5,
        "activation": "sigmoid",
        "role": "output",
        "class_prior": 0.01,
    },
]

CASES: dict[str, dict[str, Any]] = {
    f"{dtype}-{layout}": {
        "seed": seed,
        "dtype": dtype,
        "layout": layout,
        "layers": _LAYERS,
        "widths": "unchecked",
    }
    for dtype, layout, seed in [
        ("float32", "out_in", 20261201),
        ("float64", "in_out", "kestrel-ridge"),
        ("float16", "out_in", 7),
        ("bfloat16", "in_out", 2**63 - 1),
    ]
}


def digests(include_platform: bool = True) -> dict[str, str]:
    """SHA-256 of every tensor's bytes in every case (orthogonal ones only if asked)."""
    out: dict[str, str] = {}
    for case, request in CASES.items():
        plan = build_plan(request)
        for t in plan.tensors:
            if t.reproducible != "exact" and not include_platform:
                continue
            h = hashlib.sha256()
            for piece in iter_tensor_bytes(plan, t, chunk_bytes=1000):
                h.update(piece)
            out[f"{case}/{t.tensor}"] = h.hexdigest()
    return out


if __name__ == "__main__":
    print(json.dumps(digests(include_platform=False), sort_keys=True))
