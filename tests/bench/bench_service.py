"""Service benchmark: the real server over loopback, against baselines measured in the same run.

    .venv/bin/python tests/bench/bench_service.py [--repeats 5] [--requests 400] [--threads 1]
                                                 [--quick]

Starts `python -m seedbed.cli serve` on a free loopback port (the same launcher as the
end-to-end tests) and prints:

(a) the time to fetch a 4096 x 4096 float32 He-normal tensor as safetensors (and npz) over HTTP,
    divided by the time numpy takes to draw as many float32 normals in this process
    (np.random.default_rng().standard_normal(n, dtype=np.float32)). The server does more than
    numpy: counter-based, platform-independent draws, a SHA-256 per tensor, and for safetensors
    a hashing pass before the first byte (the digests sit in the header). The in-process core
    render time is printed too, so the gap can be split between generation and HTTP.
(b) POST /v1/plan requests per second for a 12-layer network at concurrency 1, 8 and 32, with
    latency percentiles, against GET /healthz (the cheapest round trip the service has) at the
    same concurrency (aim: plan >= half of healthz).
(c) the server's peak resident memory while it streams a 1 GiB safetensors response (one
    16384 x 16384 float32 layer, consumed and discarded by the client), against its idle
    resident memory measured just before (aim: a rise of at most 128 MiB).

Times in (a) are the best of N repeats (the run least disturbed by other work on the machine);
compare ratios, not absolute times, between machines.
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import threading
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[2]
sys.path[:0] = [str(ROOT / "tests"), str(ROOT / "service")]

from timing import best_of  # noqa: E402

from support.networks import river_gauge_forecaster, single_dense  # noqa: E402
from support.server import RunningServer, start_server  # noqa: E402

SIDE = 4096


def best_seconds(action: Callable[[], object], repeats: int) -> float:
    action()  # warm-up: first-touch page faults, imports, connection set-up
    return best_of(repeats, action)


def numpy_baseline(count: int, repeats: int) -> float:
    def draw() -> np.ndarray:
        return np.random.default_rng().standard_normal(count, dtype=np.float32)

    return best_seconds(draw, repeats)


def core_render(request: dict[str, Any], repeats: int, threads: int) -> float:
    from seedbed.core.plan import build_plan
    from seedbed.core.render import render_rows

    plan = build_plan(request)
    tensor = plan.tensors[0]
    return best_seconds(lambda: render_rows(plan, tensor, threads=threads), repeats)


def fetch_seconds(
    server: RunningServer, request: dict[str, Any], fmt: str, repeats: int
) -> tuple[float, int]:
    size = 0
    with httpx.Client(base_url=server.base_url, timeout=300) as http:

        def fetch() -> None:
            nonlocal size
            received = 0
            with http.stream("POST", "/v1/weights", params={"format": fmt}, json=request) as r:
                r.raise_for_status()
                for piece in r.iter_raw(chunk_size=1 << 20):
                    received += len(piece)
            size = received

        return best_seconds(fetch, repeats), size


def load(
    server: RunningServer, method: str, path: str, body: Any, concurrency: int, total: int
) -> tuple[float, list[float]]:
    """`total` requests split over `concurrency` threads, each with its own keep-alive
    connection. Returns (requests per second, sorted latencies in seconds)."""
    latencies: list[float] = []
    lock = threading.Lock()
    errors: list[str] = []
    per_thread = [total // concurrency + (i < total % concurrency) for i in range(concurrency)]
    start_line = threading.Barrier(concurrency + 1)

    def worker(count: int) -> None:
        mine = []
        with httpx.Client(base_url=server.base_url, timeout=60) as http:
            http.request(method, path, json=body)  # open the connection before the clock
            start_line.wait()
            for _ in range(count):
                t0 = time.perf_counter()
                r = http.request(method, path, json=body)
                mine.append(time.perf_counter() - t0)
                if r.status_code != 200:
                    errors.append(f"{r.status_code}: {r.text[:200]}")
        with lock:
            latencies.extend(mine)

    threads = [threading.Thread(target=worker, args=(n,)) for n in per_thread]
    for t in threads:
        t.start()
    start_line.wait()
    started = time.perf_counter()
    for t in threads:
        t.join()
    elapsed = time.perf_counter() - started
    if errors:
        raise RuntimeError(f"{len(errors)} requests failed, first: {errors[0]}")
    return total / elapsed, sorted(latencies)


def stream_memory(server: RunningServer) -> None:
    """(c): sample the server's VmRSS every 20 ms while a 1 GiB body streams to a discarding
    client; print idle, peak and the rise."""
    side = 16384
    request = single_dense(side, side, activation="relu")
    idle = server.rss_bytes()
    peak = idle
    done = threading.Event()

    def sample() -> None:
        nonlocal peak
        while not done.is_set():
            peak = max(peak, server.rss_bytes())
            time.sleep(0.02)

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    received = 0
    began = time.perf_counter()
    with (
        httpx.Client(base_url=server.base_url, timeout=600) as http,
        http.stream(
            "POST", "/v1/weights", params={"format": "safetensors"}, json=request
        ) as response,
    ):
        response.raise_for_status()
        for piece in response.iter_bytes():
            received += len(piece)
    seconds = time.perf_counter() - began
    done.set()
    sampler.join()
    mib = 2**20
    print(f"(c) 1 GiB safetensors stream ({received / mib:.0f} MiB in {seconds:.1f} s)")
    print(
        f"    server RSS idle {idle / mib:.1f} MiB, peak {peak / mib:.1f} MiB, "
        f"rise {(peak - idle) / mib:.1f} MiB = {(peak - idle) / (128 * mib):.2f} x the "
        "128 MiB budget"
    )


def percentile(sorted_values: list[float], q: float) -> float:
    # Nearest-rank percentile: the smallest value with at least q% of the sample at or below.
    rank = max(1, int(np.ceil(q / 100 * len(sorted_values))))
    return sorted_values[rank - 1]


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeats", type=int, default=5, help="timed repeats per figure")
    parser.add_argument("--requests", type=int, default=400, help="requests per load figure")
    parser.add_argument(
        "--threads",
        type=int,
        default=1,
        help="SEEDBED_GENERATION_THREADS for the server and the in-process render (default 1, "
        "the service default)",
    )
    parser.add_argument("--quick", action="store_true", help="2 repeats, 100 requests")
    args = parser.parse_args(argv)
    repeats, requests = (2, 100) if args.quick else (args.repeats, args.requests)

    with tempfile.TemporaryDirectory(prefix="seedbed-bench-") as scratch:
        return run(args, repeats, requests, Path(scratch))


def run(args: argparse.Namespace, repeats: int, requests: int, scratch: Path) -> int:
    server = start_server({"SEEDBED_GENERATION_THREADS": str(args.threads)}, log_dir=scratch)
    try:
        print(
            f"service: {server.base_url} (pid {server.pid}); numpy {np.__version__}; "
            f"generation threads {args.threads}"
        )
        print(f"times in (a): best of {repeats} repeats after one warm-up\n")

        request = single_dense(SIDE, SIDE, activation="relu")
        with httpx.Client(base_url=server.base_url, timeout=60) as http:
            entry = http.post("/v1/plan", json=request).json()["tensors"][0]
        assert (entry["method"], entry["distribution"]) == ("he", "normal"), entry
        count = SIDE * SIDE
        base = numpy_baseline(count, repeats)
        core = core_render(request, repeats, args.threads)
        print(f"(a) {SIDE} x {SIDE} float32 He-normal ({count * 4 / 2**20:.0f} MiB)")
        print(f"    {'what':<44}{'seconds':>10}{'x numpy':>10}")
        print(f"    {'numpy default_rng standard_normal (baseline)':<44}{base:>10.3f}{1:>10.2f}")
        print(f"    {'seedbed core render_rows, in process':<44}{core:>10.3f}{core / base:>10.2f}")
        for fmt in ("safetensors", "npz"):
            seconds, size = fetch_seconds(server, request, fmt, repeats)
            label = f"HTTP fetch, {fmt} ({size / 2**20:.1f} MiB body)"
            print(f"    {label:<44}{seconds:>10.3f}{seconds / base:>10.2f}")
        print("    target: safetensors fetch <= 2 x numpy\n")

        network = river_gauge_forecaster()
        print(f"(b) POST /v1/plan, {len(network['layers'])}-layer network, {requests} requests")
        header = f"    {'route':<14}{'conc.':>6}{'req/s':>10}{'p50 ms':>9}{'p90 ms':>9}"
        print(header + f"{'p99 ms':>9}{'max ms':>9}{'x healthz':>11}")
        for concurrency in (1, 8, 32):
            floor, _ = load(server, "GET", "/healthz", None, concurrency, requests)
            rps, lat = load(server, "POST", "/v1/plan", network, concurrency, requests)
            for route, rate, values in (("/healthz", floor, None), ("/v1/plan", rps, lat)):
                if values is None:
                    print(f"    {route:<14}{concurrency:>6}{rate:>10.1f}{'':>36}{1:>11.2f}")
                    continue
                cells = "".join(f"{percentile(values, q) * 1000:>9.2f}" for q in (50, 90, 99, 100))
                print(f"    {route:<14}{concurrency:>6}{rate:>10.1f}{cells}{rate / floor:>11.2f}")
        print("    target: /v1/plan >= 0.5 x /healthz\n")
        stream_memory(server)
    finally:
        server.stop()
    return 0


if __name__ == "__main__":
    sys.exit(main())
