"""Golden SHA-256 of generated tensors: a byte change without a new ALGORITHM is a failure.

The same digests must come out in a subprocess whose numpy runs with its optional SIMD
dispatch targets turned off (NPY_DISABLE_CPU_FEATURES): the reproducibility contract says CPU
feature levels must not change a single byte (docs/architecture.md, reproducibility contract).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

from support.golden_cases import digests

HERE = Path(__file__).resolve().parents[2]
GOLDEN = json.loads((HERE / "golden" / "core_digests.json").read_text())
BUMP = (
    "output bytes changed: if intended, bump ALGORITHM in service/seedbed/core/version.py "
    "and regenerate tests/golden/core_digests.json with tests/support/golden_cases.py"
)


def _enabled_dispatch_targets() -> list[str]:
    try:
        from numpy._core import _multiarray_umath as umath  # numpy >= 2
    except ImportError:  # pragma: no cover - numpy 1.x
        from numpy.core import _multiarray_umath as umath  # type: ignore[no-redef]
    features = umath.__cpu_features__
    return [name for name in umath.__cpu_dispatch__ if features.get(name)]


def test_digests_match_the_committed_golden_values() -> None:
    assert digests(include_platform=False) == GOLDEN, BUMP


def test_same_digests_with_simd_dispatch_disabled() -> None:
    targets = _enabled_dispatch_targets()
    env = {**os.environ, "NPY_DISABLE_CPU_FEATURES": " ".join(targets)}
    script = HERE / "support" / "golden_cases.py"
    probe = (
        "from numpy._core._multiarray_umath import __cpu_features__ as f;"
        "import json; print(json.dumps({k: bool(v) for k, v in f.items()}))"
    )
    seen = json.loads(
        subprocess.run(
            [sys.executable, "-c", probe], env=env, check=True, capture_output=True, text=True
        ).stdout
    )
    assert not any(seen[t] for t in targets), "the features were not actually disabled"
    run = subprocess.run(
        [sys.executable, str(script)], env=env, check=True, capture_output=True, text=True
    )
    assert json.loads(run.stdout) == GOLDEN


def test_platform_tensors_are_close_to_this_machine_and_marked() -> None:
    # Orthogonal tensors depend on LAPACK's QR: checked for structure elsewhere, and here only
    # for being labelled as such in every case.
    exact = set(GOLDEN)
    every = digests(include_platform=True)
    platform = {k for k in every if k not in exact}
    assert platform and all(k.endswith("turn.weight") or "recurrent_weight" in k for k in platform)
