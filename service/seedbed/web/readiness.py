"""The start-up self-check behind /readyz: prove this machine produces the reference bytes.

A replica whose numpy, CPU or build produced different values from everyone else's would hand
out silently different "reproducible" weights. So before it reports ready, the service generates
a small fixed set of tensors through the real core and compares their SHA-256 with values baked
in below (recorded from the core itself; tests/test_web_readyz.py keeps them in agreement).
Only `exact` tensors take part: `platform` ones (orthogonal) may differ in the last bits by design.
"""

from __future__ import annotations

import hashlib
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from seedbed.core.plan import build_plan
from seedbed.core.render import iter_tensor_bytes
from seedbed.core.version import ALGORITHM

# An invented probe network touching each sampler and every output dtype path that is exact.
PROBE_REQUESTS: dict[str, dict[str, Any]] = {
    "probe32": {
        "seed": 424242,
        "dtype": "float32",
        "layers": [
            {"name": "intake", "kind": "dense", "n_in": 24, "n_out": 16, "activation": "relu"},
            {
                "name": "mixer",
                "kind": "dense",
                "n_in": 16,
                "n_out": 16,
                "activation": "tanh",
                "init": {"method": "glorot", "distribution": "truncated_normal"},
            },
            {
                "name": "spread",
                "kind": "dense",
                "n_in": 16,
                "n_out": 8,
                "activation": "linear",
                "init": {"method": "lecun", "distribution": "uniform"},
            },
        ],
    },
    "probe16": {
        "seed": "readiness-probe",
        "dtype": "float16",
        "layout": "in_out",
        "layers": [
            {
                "name": "edge",
                "kind": "conv",
                "channels_in": 3,
                "channels_out": 4,
                "kernel": [3, 3],
                "activation": "relu",
            },
        ],
    },
    "probe_bf16": {
        "seed": 7,
        "dtype": "bfloat16",
        "layers": [{"name": "lookup", "kind": "embedding", "vocab": 12, "dim": 6}],
    },
}

# "<probe>/<tensor>" -> hex SHA-256 of the tensor's raw little-endian bytes, for BAKED_ALGORITHM.
BAKED_ALGORITHM = "seedbed-philox4x64-v1"
BAKED_SHA256: dict[str, str] = {
    "probe32/intake.weight": "e14371149f885abddfdec432407e4de985ba98f477de8d2bf4db7e518b6ac5f6",
    "probe32/intake.bias": "f5a5fd42d16a20302798ef6ed309979b43003d2320d9f0e8ea9831a92759fb4b",
    "probe32/mixer.weight": "1778e7162258156aeb43391cdee0e87428c9048a2ceb9f2ade2b2cdc119a009f",
    "probe32/mixer.bias": "f5a5fd42d16a20302798ef6ed309979b43003d2320d9f0e8ea9831a92759fb4b",
    "probe32/spread.weight": "9829af0cced4079d3eb86433aef3d5f3e32ad0d64c5d78da4c17cd611edc9a60",
    "probe32/spread.bias": "66687aadf862bd776c8fc18b8e9f8e20089714856ee233b3902a591d0d5f2925",
    "probe16/edge.weight": "57bda7bfda07ae00d6b96006e2fa3048362794daa3d72aee09ffeb96f5ddd67f",
    "probe16/edge.bias": "af5570f5a1810b7af78caf4bc70a660f0df51e42baf91d4de5b2328de0e83dfc",
    "probe_bf16/lookup.weight": "4275f6d93135f876290242a968fc479cb5575a2e49b7162233920c0b45a06e54",
}


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
        }


NOT_CHECKED = Readiness(False, "the start-up self-check has not finished yet", ALGORITHM)


def tensor_digests(threads: int = 1) -> dict[str, str]:
    """Generate every probe tensor through the core and hash its bytes."""
    out: dict[str, str] = {}
    for probe, request in PROBE_REQUESTS.items():
        plan = build_plan(request)
        for t in plan.tensors:
            if t.reproducible != "exact":
                continue
            h = hashlib.sha256()
            for chunk in iter_tensor_bytes(plan, t, threads=threads):
                h.update(chunk)
            out[f"{probe}/{t.tensor}"] = h.hexdigest()
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
        got = tensor_digests(threads)
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
