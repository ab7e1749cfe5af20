"""The start-up self-check behind /readyz: prove this machine produces the reference bytes.

A replica whose numpy, CPU or build produced different values from everyone else's would hand
out silently different "reproducible" weights. So before it reports ready, the service generates
a fixed set of probe tensors through the real core and compares their SHA-256 with values baked
in below. The probe requests are the golden cases of tests/support/golden_cases.py and the baked
values a subset of tests/golden/core_digests.json (tests/unit/web/test_readyz.py keeps both in
agreement), chosen to cover every dtype, both layouts and each exact sampler (normal, uniform,
truncated normal, identity, constant; a transposed conv; permuted LSTM gates). Orthogonal
tensors are `platform`-reproducible by design and take no part.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any

from seedbed.core.plan import build_plan
from seedbed.core.render import iter_tensor_bytes
from seedbed.core.version import ALGORITHM
from seedbed_client.generator import kernel as generator_kernel

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

PROBE_REQUESTS: dict[str, dict[str, Any]] = {
    f"{dtype}-{layout}": {
        "seed": seed,
        "dtype": dtype,
        "layout": layout,
        "layers": _LAYERS,
        "widths": "unchecked",
    }  # one of each kind, not a chain
    for dtype, layout, seed in [
        ("float32", "out_in", 20261201),
        ("float64", "in_out", "kestrel-ridge"),
        ("float16", "out_in", 7),
        ("bfloat16", "in_out", 2**63 - 1),
    ]
}

# "<probe>/<tensor>" -> hex SHA-256 of the tensor's raw little-endian bytes, for BAKED_ALGORITHM.
BAKED_ALGORITHM = "seedbed-philox4x64-v1"
_BAKED_TEXT = """
float32-out_in/patch.weight 72129e6a5832fb096f4a111d088a3cfbdce11dc922697c2603a6c2ca09eb5ef1
float32-out_in/lift.weight d5853679234434ed080e09b5d7ac445796f62037ccdd6f70cb83992442f24cf2
float32-out_in/memory.input_weight ae62bf81f14f019d65f4b29730eb6605dd3b83828cea79f25e152ab79df1dbb1
float32-out_in/squash.weight da08e68a8f550e620fd6f4713ddd1da7068aae2b480529661498277b7eb021ea
float32-out_in/keep.weight 6420361cfd60ac1035ad9f7758fd72d8420f1968d1aa095b05a2fa4c93197415
float32-out_in/head.bias 5d9dfc7ec6a6c7bf7371236a9c48ea28b56f53f83f3c56664cc65c2dec661457
float64-in_out/patch.weight 838e8c275c0e39a450e00f33ae2f2d6f6b8db8150998842c07de93c9a0a86a70
float64-in_out/lift.weight 6a29f94d1a164022d91a36b371dded80daa3568733dc0a715707b426edf2e0c2
float64-in_out/memory.input_weight 77f371541432d8aee8275f910e89f467a9bc2a8c795c6e16c93df8fab0701f64
float64-in_out/squash.weight b3808f275e74c2933e21d065a35ce686023ee5d13b33414db750ec85bc05d7b9
float64-in_out/keep.weight f36e4ffe9826d9e84dbb21b80e0e3222d416970ad5762c4d0794a2bb21b30514
float64-in_out/head.bias b82b753290a33c1d1f2727fd5a56f81cbd93f8cf89a4f7ae67278d762afccc18
float16-out_in/patch.weight 92175bff63e6502ebc3f4514454ad8bb1c740de49f3d5d44f0aa3f0c0ac49478
float16-out_in/lift.weight 68689c6fbb56960fba27e42520cf25c09f9d52f299789c9455aa3803b379e8e3
float16-out_in/memory.input_weight bbd359aad3e58b90225af5a34ba5e513a66f1efa6ec18b49f3fb290afb8164e0
float16-out_in/squash.weight 81fa559d408c5d286a2f9a7a0622132ee6619028d425948fbe799da10a805d76
float16-out_in/keep.weight d3062f45dd8880ec1e4b4e912d61c28ac2113624774a44f02139d1ad4d961a8b
float16-out_in/head.bias a4e2f001773e83ff66b6cb16573a5c2e6477fc1f3945072578183949c0c7f037
bfloat16-in_out/patch.weight d54c00f4a3acabb12a5111239482cfb1ec15845e8fabb2860d8da91b8456948b
bfloat16-in_out/lift.weight 6bd3bc27dda6fe2c81db7a37ac068d8a29ae26f3252cec7c3020cede0b9e4030
bfloat16-in_out/memory.input_weight ca75d6788aaf1a1e5100f7cca144fd3f20b4568d1ed324386ff826bdf0ca5e45
bfloat16-in_out/squash.weight 281b67e2e05e2b46f935a46cc560367b7969c35150a253fdbd3e5d38afd0442f
bfloat16-in_out/keep.weight bf44fcab868733d842613918237c162c0237bd90ce82260c96a8e9f698a5a0c3
bfloat16-in_out/head.bias 58ddbb85debff88dfde5cc37b93a2c7c66de1533901ea18ab1e5904cbfe07031
"""
BAKED_SHA256: dict[str, str] = dict(
    line.split() for line in _BAKED_TEXT.splitlines() if line.strip()
)


@dataclass(frozen=True)
class Readiness:
    ready: bool
    reason: str
    algorithm: str
    checked: int = 0
    seconds: float = 0.0
    mismatches: list[str] = field(default_factory=list)

    def body(self) -> dict[str, Any]:
        return {
            "status": "ready" if self.ready else "not_ready",
            "reason": self.reason,
            "algorithm": self.algorithm,
            "tensors_checked": self.checked,
            "mismatches": self.mismatches,
            "seconds": round(self.seconds, 4),
            "generator": generator_kernel.status().describe(),
        }


NOT_CHECKED = Readiness(False, "the start-up self-check has not finished yet", ALGORITHM)


def tensor_digests(names: Collection[str] | None = None, threads: int = 1) -> dict[str, str]:
    """Generate probe tensors through the core and hash their bytes: those named
    "<probe>/<tensor>" in `names`, or every exact tensor of every probe."""
    out: dict[str, str] = {}
    for probe, request in PROBE_REQUESTS.items():
        plan = build_plan(request)
        for t in plan.tensors:
            key = f"{probe}/{t.tensor}"
            if t.reproducible != "exact" or (names is not None and key not in names):
                continue
            h = hashlib.sha256()
            for chunk in iter_tensor_bytes(plan, t, threads=threads):
                h.update(chunk)
            out[key] = h.hexdigest()
    return out


def self_check(
    expected: Mapping[str, str] | None = None,
    expected_algorithm: str = BAKED_ALGORITHM,
    threads: int = 1,
) -> Readiness:
    """Compare freshly generated probe tensors with the expected digests; never raises."""
    want = dict(BAKED_SHA256 if expected is None else expected)
    started = time.perf_counter()
    if expected_algorithm != ALGORITHM:
        return Readiness(
            False,
            f"the core's algorithm is {ALGORITHM!r} but the baked reference values are for "
            f"{expected_algorithm!r}; record new values for this algorithm",
            ALGORITHM,
        )
    if not want:
        return Readiness(False, "no reference values are baked in", ALGORITHM)
    try:
        got = tensor_digests(want, threads)
    except Exception as exc:  # a broken core must show as not ready, not as a crashed start-up
        return Readiness(
            False, f"generating the probe tensors failed: {type(exc).__name__}: {exc}", ALGORITHM
        )
    bad = sorted(k for k in want if got.get(k) != want[k])
    elapsed = time.perf_counter() - started
    if bad:
        first = bad[0]
        return Readiness(
            False,
            f"{len(bad)} of {len(want)} probe tensors differ from the reference bytes, first "
            f"{first}: expected sha256 {want[first]}, got {got.get(first, 'nothing')}; this "
            "machine does not reproduce the published values",
            ALGORITHM,
            checked=len(want),
            seconds=elapsed,
            mismatches=bad,
        )
    return Readiness(
        True,
        f"{len(want)} probe tensors match the reference bytes",
        ALGORITHM,
        checked=len(want),
        seconds=elapsed,
    )
