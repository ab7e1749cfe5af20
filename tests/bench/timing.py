"""Timing shared by the benchmark scripts (run as files, so this directory is importable)."""

from __future__ import annotations

import time
from collections.abc import Callable


def best_of(repeats: int, fn: Callable[[], object]) -> float:
    """Seconds of the fastest of `repeats` calls: the run least disturbed by other work."""
    times = []
    for _ in range(repeats):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)
