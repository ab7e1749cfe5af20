"""Generation throughput of seedbed's deterministic streams against numpy's fastest paths.

Produces a 4096 x 4096 float32 tensor (16.8M values) of uniform and of normal values through
fill_standard (threads = os.cpu_count()) plus round_to_dtype, and measures in the same run
numpy's default_rng().random / .standard_normal with dtype=float32 and the raw Philox stream
(random_raw) as baselines. Prints best-of-N wall times and ratios (seedbed / numpy).

    .venv/bin/python tests/bench/bench_generation.py [--repeats N] [--threads T]
"""

from __future__ import annotations

import argparse
import os
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[2] / "service"))

from timing import best_of

from seedbed_client.generator import derive_key, fill_standard, round_to_dtype

SHAPE = (4096, 4096)
COUNT = SHAPE[0] * SHAPE[1]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--threads", type=int, default=os.cpu_count() or 1)
    args = parser.parse_args()

    key = derive_key(20261201, "bench.encoder.weight")
    scratch = np.empty(COUNT, dtype=np.float64)
    rng = np.random.default_rng(12345)
    bitgen = np.random.Philox(12345)

    def ours(dist: str, threads: int) -> Callable[[], object]:
        def run() -> object:
            fill_standard(dist, key, scratch, 0, threads=threads)
            return round_to_dtype(scratch, "float32").reshape(SHAPE)

        return run

    cases = {
        "numpy Philox random_raw (uint64)": lambda: bitgen.random_raw(COUNT),
        "numpy random float32": lambda: rng.random(COUNT, dtype=np.float32),
        "numpy standard_normal float32": lambda: rng.standard_normal(COUNT, dtype=np.float32),
        f"seedbed uniform float32 ({args.threads} threads)": ours("uniform", args.threads),
        f"seedbed normal float32 ({args.threads} threads)": ours("normal", args.threads),
        f"seedbed truncated_normal float32 ({args.threads} threads)": ours(
            "truncated_normal", args.threads
        ),
        "seedbed uniform float32 (1 thread)": ours("uniform", 1),
        "seedbed normal float32 (1 thread)": ours("normal", 1),
    }
    # Interleave the repetitions so a noisy neighbour affects every case alike.
    times = {name: float("inf") for name in cases}
    for _ in range(args.repeats):
        for name, fn in cases.items():
            times[name] = min(times[name], best_of(1, fn))

    print(
        f"numpy {np.__version__}, {os.cpu_count()} CPUs, {SHAPE[0]}x{SHAPE[1]} = {COUNT:,} values, "
        f"best of {args.repeats}"
    )
    for name, t in times.items():
        print(f"  {name:<48s} {t * 1e3:8.1f} ms  {COUNT / t / 1e6:7.1f} M values/s")
    uniform_base = times["numpy random float32"]
    normal_base = times["numpy standard_normal float32"]
    print("ratios (seedbed time / numpy time; aims: uniform <= 1.5, normal <= 2.0):")
    for name, t in times.items():
        if name.startswith("seedbed uniform"):
            print(f"  {name:<48s} {t / uniform_base:5.2f}x numpy random")
        elif name.startswith("seedbed"):
            print(f"  {name:<48s} {t / normal_base:5.2f}x numpy standard_normal")
    raw = times["numpy Philox random_raw (uint64)"]
    print(
        f"  raw Philox alone is {raw / uniform_base:.2f}x numpy random float32 "
        "(the floor for any Philox-based generator)"
    )


if __name__ == "__main__":
    main()
