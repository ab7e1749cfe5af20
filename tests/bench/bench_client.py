"""Client benchmark: a 1 GiB request fetched from the real service, and generated locally.

    .venv/bin/python tests/bench/bench_client.py [--mib 1024] [--keep]

Starts `python -m seedbed.cli serve` on a loopback port (the end-to-end tests' launcher) and
runs each measurement in a fresh Python process, so each peak resident memory figure (Linux
VmHWM) belongs to that operation alone. Prints, for a request of `--mib` MiB of float32 weights
(four square dense layers; the largest tensor is a quarter of the total):

- fetch, arrays returned  Client.weights(request): download (npz), verify, map the arrays
- fetch, arrays read      the same, then every array summed and dropped one at a time
- fetch, saved to disk    Client.save(request, path)
- local generation        Client.weights(request, origin="local"): plan call, every tensor
                          generated in this process (the arrays are the result, so they are
                          resident)
- numpy baseline          np.random.default_rng(0).standard_normal(n, dtype=np.float32) for the
                          same number of values, in-process

with each one's wall time and peak RSS growth (peak minus the process's resident memory just
before the operation), and the ratio of both to the numpy baseline. The memory budget for a
1 GiB download is a growth of at most 64 MiB when saving, and 64 MiB + the largest tensor when
returning arrays; the script says whether each fetch figure is within it. The cache is off, so
every fetch downloads. Times depend on the machine: compare ratios.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import textwrap
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT / "tests"), str(ROOT / "service")]

from support.server import start_server  # noqa: E402

MIB = 1 << 20

# Runs in a child process: prints {"seconds", "growth"} as JSON on its last line.
CHILD = textwrap.dedent(
    """
    import json, sys, time
    import numpy as np
    from seedbed_client import Client

    def status(field):
        with open("/proc/self/status", encoding="ascii") as fh:
            for line in fh:
                if line.startswith(field + ":"):
                    return int(line.split()[1]) * 1024
        raise RuntimeError(field)

    mode, url, request_json, target = sys.argv[1:5]
    request = json.loads(request_json)
    client = Client(url, cache=False, limits=None)
    values = sum(l["n_in"] * l["n_out"] for l in request["layers"])
    if mode == "numpy":
        np.random.default_rng(0).standard_normal(1024, dtype=np.float32)
    client.plan(request)  # connection and imports warm
    before = status("VmRSS")
    t0 = time.perf_counter()
    if mode == "returned":
        result = client.weights(request)
    elif mode == "read":
        result = client.weights(request)
        for name in list(result):
            float(np.sum(result.pop(name), dtype=np.float64))
    elif mode == "saved":
        result = client.save(request, target)
    elif mode == "local":
        result = client.weights(request, origin="local")
    else:
        result = np.random.default_rng(0).standard_normal(values, dtype=np.float32)
    seconds = time.perf_counter() - t0
    print(json.dumps({"seconds": seconds, "growth": status("VmHWM") - before}))
    """
)


def request_of(mib: int) -> dict[str, Any]:
    # Invented: the projection stack of a seismograph-denoising model.
    side = int(((mib * MIB) // 4 // 4) ** 0.5)
    layers = [
        {
            "name": f"quake.{i}",
            "kind": "dense",
            "n_in": side,
            "n_out": side,
            "bias": False,
            "activation": "relu",
        }
        for i in range(4)
    ]
    return {"seed": "seismograph/denoise", "dtype": "float32", "layers": layers}


def measure(mode: str, url: str, request: dict[str, Any], target: Path) -> dict[str, float]:
    done = subprocess.run(
        [sys.executable, "-c", CHILD, mode, url, json.dumps(request), str(target)],
        capture_output=True,
        text=True,
        check=False,
        env={"PYTHONPATH": str(ROOT / "client"), "PATH": "/usr/bin:/bin"},
    )
    if done.returncode != 0:
        raise SystemExit(f"{mode} failed:\n{done.stderr}")
    result: dict[str, float] = json.loads(done.stdout.strip().splitlines()[-1])
    target.unlink(missing_ok=True)
    return result


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--mib", type=int, default=1024, help="request size in MiB (float32)")
    args = parser.parse_args()
    request = request_of(args.mib)
    side = request["layers"][0]["n_in"]
    total = 4 * side * side * 4
    largest = side * side * 4
    with tempfile.TemporaryDirectory() as scratch:
        server = start_server(
            {"SEEDBED_MAX_JSON_RESPONSE_BYTES": str(1 << 20)}, log_dir=Path(scratch)
        )
        try:
            target = Path(scratch) / "weights.npz"
            rows = {
                "numpy baseline": measure("numpy", server.base_url, request, target),
                "fetch, arrays returned": measure("returned", server.base_url, request, target),
                "fetch, arrays read": measure("read", server.base_url, request, target),
                "fetch, saved to disk": measure("saved", server.base_url, request, target),
                "local generation": measure("local", server.base_url, request, target),
            }
        finally:
            server.stop()
    base = rows["numpy baseline"]
    print(
        f"request: 4 dense layers {side} x {side} float32 = {total / MIB:.0f} MiB "
        f"(largest tensor {largest / MIB:.0f} MiB); cache off; fresh process per row"
    )
    print(
        f"{'operation':<24}{'seconds':>9}{'x numpy':>9}{'peak RSS growth':>17}{'x numpy':>9}"
        "  budget"
    )
    budgets = {
        "fetch, arrays returned": 64 * MIB + largest,
        "fetch, arrays read": 64 * MIB + largest,
        "fetch, saved to disk": 64 * MIB,
    }
    for name, r in rows.items():
        budget = budgets.get(name)
        verdict = (
            ""
            if budget is None
            else (f"  {'within' if r['growth'] <= budget else 'OVER'} {budget / MIB:.0f} MiB")
        )
        print(
            f"{name:<24}{r['seconds']:>9.2f}{r['seconds'] / base['seconds']:>9.2f}"
            f"{r['growth'] / MIB:>13.1f} MiB{r['growth'] / base['growth']:>9.2f}{verdict}"
        )


if __name__ == "__main__":
    main()
