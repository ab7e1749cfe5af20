"""Diagnostics time for a 50-layer, width-1024 ReLU MLP at batch 256, against bare numpy.

Measures in one run, best of N:

    baseline: 50 products     50 x (256 x 1024) @ (1024 x 1024) in float64 with numpy: the
                              forward pass's matrix products and nothing else
    baseline: 100 products    forward and backward products (what the simulation must do)
    weight rendering          the 50 planned 1024 x 1024 He-normal tensors from the core's
                              deterministic streams (seedbed.core.render), no simulation
    diagnose (one run)        seedbed.core.diagnostics.diagnose end to end: parse, plan, render,
                              forward, backward, statistics, twin units, verdict, mean field

and prints seconds and ratios against the 100-product baseline. The difference between the
last two rows is the simulation's own overhead (activations, statistics, twin detection).

    .venv/bin/python tests/bench/bench_diagnostics.py [--repeats N] [--batch B]
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

from seedbed.core.diagnostics import diagnose
from seedbed.core.plan import build_plan
from seedbed.core.render import render_rows

WIDTH, DEPTH = 1024, 50


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--batch", type=int, default=256)
    args = parser.parse_args()
    batch = args.batch

    request = {
        "seed": "bench-diagnostics",
        "layers": [
            {
                "name": f"h{i}",
                "kind": "dense",
                "n_in": WIDTH,
                "n_out": WIDTH,
                "activation": "relu",
                "bias": False,
            }
            for i in range(DEPTH)
        ],
    }
    body = {"request": request, "batch": batch}

    rng = np.random.default_rng(1)
    x = rng.standard_normal((batch, WIDTH))
    weights = [rng.standard_normal((WIDTH, WIDTH)) for _ in range(4)]

    def products(count: int) -> Callable[[], object]:
        def run() -> object:
            y = x
            for i in range(count):
                y = y @ weights[i % len(weights)].T
                y /= 32.0  # keeps values finite; one cheap pass, like an activation
            return y

        return run

    plan = build_plan(request)

    def render_all() -> object:
        return [render_rows(plan, t) for t in plan.tensors]

    def run_diagnose() -> object:
        return diagnose(body)

    rows = [
        (f"baseline: {DEPTH} products", best_of(args.repeats, products(DEPTH))),
        (f"baseline: {2 * DEPTH} products", best_of(args.repeats, products(2 * DEPTH))),
        ("weight rendering", best_of(args.repeats, render_all)),
        ("diagnose (one run)", best_of(args.repeats, run_diagnose)),
    ]
    reference = rows[1][1]
    blas = os.environ.get("OPENBLAS_NUM_THREADS", "default")
    print(
        f"{DEPTH}-layer ReLU MLP, width {WIDTH}, batch {batch}, float64; "
        f"best of {args.repeats}; OPENBLAS_NUM_THREADS={blas}, {os.cpu_count()} CPUs"
    )
    rows.append(("simulation (diagnose - rendering)", rows[3][1] - rows[2][1]))
    print(f"{'case':<36}{'seconds':>10}{'x 100 products':>16}")
    for name, seconds in rows:
        print(f"{name:<36}{seconds:>10.3f}{seconds / reference:>16.2f}")


if __name__ == "__main__":
    main()
