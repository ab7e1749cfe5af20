"""The benchmark scripts under tests/bench still start: their imports resolve and their
command lines parse. Nothing is timed here (speed is measured by running the scripts).

pytest does not collect the scripts themselves (they are not test_*.py), so without this a
moved helper module would go unnoticed until someone ran a benchmark by hand.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import pytest

BENCH = Path(__file__).resolve().parents[1] / "bench"
SCRIPTS = sorted(p.name for p in BENCH.glob("*.py") if p.name != "timing.py")


def test_every_benchmark_script_is_checked() -> None:
    assert SCRIPTS == [
        "bench_client.py",
        "bench_diagnostics.py",
        "bench_generation.py",
        "bench_service.py",
        "targets.py",
    ]


@pytest.mark.parametrize("script", SCRIPTS)
def test_benchmark_script_starts(script: str) -> None:
    # From another working directory: the scripts must find their helpers by their own path.
    done = subprocess.run(
        [sys.executable, str(BENCH / script), "--help"],
        cwd=BENCH.parents[1] / "docs",
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    assert done.stdout.startswith("usage:")
