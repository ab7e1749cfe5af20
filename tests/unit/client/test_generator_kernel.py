"""The compiled generator kernel gives the numpy reference's bytes, value for value.

Float64 values are compared bit for bit, not only float32: a fused multiply-add changes about
half of the float64 outputs but almost none of the float32 ones, so float32 alone would hide
it. Golden vectors (tests/vectors/rng_vectors.json, printed in docs/generator.md) and the
Random123 known answer tie both implementations to outside facts.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest

from seedbed.core.plan import build_plan
from seedbed.core.render import iter_tensor_bytes, render_rows
from seedbed.web.readiness import PROBE_REQUESTS
from seedbed_client.generator import DISTRIBUTIONS, derive_key, fill_standard, kernel, standard_runs
from seedbed_client.generator.fill import fill_reference, fill_scaled
from seedbed_client.generator.philox import DrawSource

ROOT = Path(__file__).resolve().parents[3]
VECTORS = json.loads((ROOT / "tests" / "vectors" / "rng_vectors.json").read_text("utf-8"))
KEYS = [derive_key(c["seed"], c["tensor_name"]) for c in VECTORS["cases"]]


@pytest.fixture(scope="module")
def compiled():
    module = kernel.loaded()
    if module is None:
        if os.environ.get("SEEDBED_REQUIRE_KERNEL") == "1":
            pytest.fail(f"CI builds the kernel, but it did not load: {kernel.status().detail}")
        pytest.skip(f"no compiled kernel here: {kernel.status().detail}")
    return module


@pytest.fixture
def reference_only():
    kernel.set_enabled(False)
    try:
        yield
    finally:
        kernel.set_enabled(True)


def _bits(a: np.ndarray) -> np.ndarray:
    return a.view(np.uint64 if a.dtype.itemsize == 8 else np.uint32)


def test_random123_known_answer(compiled) -> None:
    # Random123 kat_vectors, philox4x64_10: counter 0, key 0 (Salmon et al. 2011).
    out = np.empty(4, dtype=np.uint64)
    compiled.raw(0, 0, 0, 0, out)
    want = [0x16554D9ECA36314C, 0xDB20FE9D672D0FDC, 0xD7E772CEE186176B, 0x7E68B68AEC7BA23B]
    assert [int(w) for w in out] == want


@pytest.mark.parametrize("start", [0, 1, 2, 3, 1021, 2**40 + 3, 2**63 - 5000])
@pytest.mark.parametrize("stream", [0, 1, 2**64 - 1])
def test_raw_draws_equal_numpy_philox(compiled, start: int, stream: int) -> None:
    for key in KEYS:
        out = np.empty(4099, dtype=np.uint64)
        compiled.raw(key[0], key[1], stream, start, out)
        assert np.array_equal(out, DrawSource(key).draws(start, 4099, stream))


def test_golden_vectors_as_float64(compiled) -> None:
    for case, key in zip(VECTORS["cases"], KEYS, strict=True):
        for dist in DISTRIBUTIONS:
            out = np.empty(VECTORS["count"], dtype=np.float64)
            compiled.fill(kernel.DIST_CODES[dist], key[0], key[1], 0, 0, 1.0, out)
            assert [v.hex() for v in out.tolist()] == [
                float.fromhex(h).hex() for h in case[f"{dist}_float64"]
            ]
            bits32 = [f"{b:08x}" for b in _bits(out.astype(np.float32)).tolist()]
            assert bits32 == case[f"{dist}_float32_bits"]


@pytest.mark.parametrize("dist", DISTRIBUTIONS)
@pytest.mark.parametrize(
    ("start", "count"),
    # chunk edges (1024 values), lane offsets, a far block and the top of the index range
    [
        (0, 1),
        (3, 1023),
        (1, 1024),
        (5, 1025),
        (0, 300_001),
        (2**40 + 3, 70_000),
        (2**63 - 9000, 9000),
    ],
)
def test_float64_values_equal_the_reference(compiled, dist: str, start: int, count: int) -> None:
    for stream in (0, 7):
        for key in KEYS:
            want = np.empty(count, dtype=np.float64)
            fill_reference(dist, key, want, start, stream=stream)
            got = np.empty(count, dtype=np.float64)
            compiled.fill(kernel.DIST_CODES[dist], key[0], key[1], stream, start, 1.0, got)
            assert np.array_equal(_bits(got), _bits(want)), (dist, start, count, stream)


@pytest.mark.parametrize("dist", DISTRIBUTIONS)
@pytest.mark.parametrize("scale", [1.0, 0.0213, 3.1e-6, 7000.0, -0.37, 2.0**-140])
def test_scaled_float32_and_float64_equal_the_reference(compiled, dist, scale) -> None:
    key = KEYS[0]
    want = np.empty(50_003, dtype=np.float64)
    fill_reference(dist, key, want, 11)
    want *= scale
    for dtype in (np.float64, np.float32):
        got = np.empty(want.shape[0], dtype=dtype)
        fill_scaled(dist, key, got, 11, scale, threads=2)
        assert np.array_equal(_bits(got), _bits(want.astype(dtype)))


def test_float32_overflow_is_refused_like_the_reference(compiled) -> None:
    out = np.empty(1000, dtype=np.float32)
    with pytest.raises(ValueError, match="largest float32"):
        fill_scaled("normal", KEYS[0], out, 0, 3e38)


@pytest.mark.parametrize("threads", [2, 3, 8])
def test_threads_do_not_change_a_byte(compiled, threads: int) -> None:
    for dist in DISTRIBUTIONS:
        one = np.empty(400_003, dtype=np.float64)
        fill_standard(dist, KEYS[1], one, 9, threads=1)
        many = np.empty_like(one)
        fill_standard(dist, KEYS[1], many, 9, threads=threads)
        assert np.array_equal(_bits(one), _bits(many))


def test_runs_equal_the_reference(compiled, reference_only) -> None:
    starts = [0, 5, 4096 * 3 + 1, 2**40]
    want = {d: standard_runs(d, KEYS[0], starts, 777) for d in DISTRIBUTIONS}
    kernel.set_enabled(True)
    for dist in DISTRIBUTIONS:
        got = standard_runs(dist, KEYS[0], starts, 777)
        assert np.array_equal(_bits(got), _bits(want[dist]))


def _served_bytes() -> dict[str, bytes]:
    """Every exact tensor of the readiness probes (all dtypes, both layouts, conv kernels),
    whole and as row blocks."""
    out: dict[str, bytes] = {}
    for probe, request in PROBE_REQUESTS.items():
        plan = build_plan(request)
        for t in plan.tensors:
            if t.reproducible != "exact":
                continue
            out[f"{probe}/{t.tensor}"] = b"".join(iter_tensor_bytes(plan, t, chunk_bytes=4096))
            rows = t.shape[0]
            if rows >= 3:
                block = render_rows(plan, t, 1, rows - 1)
                out[f"{probe}/{t.tensor}[1:-1]"] = block.tobytes()
    return out


def test_served_tensors_equal_with_and_without_the_kernel(compiled) -> None:
    with_kernel = _served_bytes()
    kernel.set_enabled(False)
    try:
        reference = _served_bytes()
    finally:
        kernel.set_enabled(True)
    assert with_kernel.keys() == reference.keys()
    assert len(with_kernel) > 10
    differ = sorted(k for k in reference if reference[k] != with_kernel[k])
    assert not differ


def _run(code: str, extra_env: dict[str, str]) -> dict[str, object]:
    env = {k: v for k, v in os.environ.items() if not k.startswith("NPY_")}
    env.update(extra_env)
    env["PYTHONPATH"] = str(ROOT / "service")
    done = subprocess.run(
        [sys.executable, "-c", code],
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
        check=False,
    )
    assert done.returncode == 0, done.stderr[-3000:]
    return json.loads(done.stdout.strip().splitlines()[-1])


_COMPARE = """
import json, numpy as np
from seedbed_client.generator import kernel, derive_key
from seedbed_client.generator.fill import fill_reference
key = derive_key("estuary-7", "pump.0.weight")
same = True
for dist, code in kernel.DIST_CODES.items():
    want = np.empty(200_003); fill_reference(dist, key, want, 3)
    got = np.empty(200_003); kernel.loaded().fill(code, key[0], key[1], 0, 3, 1.0, got)
    same = same and bool(np.array_equal(want.view(np.uint64), got.view(np.uint64)))
print(json.dumps({"status": kernel.status().describe(), "same": same}))
"""


def test_baseline_loops_under_disabled_cpu_features(compiled) -> None:
    # numpy's variable; the kernel honours it too, so this runs its non-AVX2 loops. numpy
    # refuses to disable its baseline, so only its dispatch targets present here are named.
    try:
        from numpy._core._multiarray_umath import __cpu_dispatch__, __cpu_features__
    except ImportError:  # numpy 1.x
        from numpy.core._multiarray_umath import __cpu_dispatch__, __cpu_features__
    names = [f for f in __cpu_dispatch__ if __cpu_features__.get(f)]
    if not any(n in ("AVX2", "X86_V3") for n in names):
        pytest.skip("AVX2 is not a dispatch target of this numpy on this CPU")
    result = _run(_COMPARE, {"NPY_DISABLE_CPU_FEATURES": " ".join(names)})
    assert "baseline loops" in str(result["status"])
    assert result["same"] is True


def test_without_the_kernel_the_same_fingerprints_and_the_reason_shown() -> None:
    # A fresh install without a compiler has no extension module; making the import fail
    # reproduces that in a child process.
    code = (
        "import sys; sys.modules['seedbed_client.generator._kernel'] = None\n"
        "import json, runpy, io, contextlib\n"
        f"sys.path.insert(0, {str(ROOT / 'tests' / 'vectors')!r})\n"
        "from rng_fingerprint import fingerprints\n"
        "from seedbed_client.generator import kernel\n"
        "print(json.dumps({'status': kernel.status().describe(), 'prints': fingerprints()}))\n"
    )
    result = _run(code, {})
    assert str(result["status"]).startswith("reference (compiled kernel unavailable")
    golden = json.loads((ROOT / "tests" / "vectors" / "rng_golden.json").read_text("utf-8"))
    assert result["prints"] == golden


def test_no_fused_multiply_add_in_the_built_kernel(compiled) -> None:
    objdump = shutil.which("objdump")
    if objdump is None:
        pytest.skip("objdump (binutils) is not installed")
    listing = subprocess.run(
        [objdump, "-d", compiled.__file__], capture_output=True, text=True, check=True
    ).stdout
    fused = [
        line
        for line in listing.splitlines()
        if "vfmadd" in line or "vfmsub" in line or "vfnmadd" in line or "vfnmsub" in line
    ]
    assert "mulpd" in listing or "mulsd" in listing  # the disassembly is of the real loops
    assert not fused, fused[:5]
