"""Print SHA-256 fingerprints of a fixed set of generated values, as JSON.

Run by the portability tests in other processes (other CPU feature levels, the oldest
supported numpy) and compared with the same computation in the test process; the committed
rng_golden.json holds the expected values. Only the rng package is imported, so this runs
in a bare environment with numpy, mpmath and ml_dtypes:

    PYTHONPATH=service:client python tests/vectors/rng_fingerprint.py [--write-golden]
"""

from __future__ import annotations

import hashlib
import json
import sys
from pathlib import Path

import numpy as np

from seedbed_client.generator import (
    DISTRIBUTIONS,
    OUTPUT_DTYPES,
    derive_key,
    deterministic_log,
    normal_quantile,
    raw_draws,
    round_to_dtype,
    standard_runs,
    standard_values,
)

GOLDEN = Path(__file__).with_name("rng_golden.json")
CASES = ((20261201, "harbour.encoder.0.weight"), ("tidal-gauge/7", "decoder.3.query.weight"))
FAR = 2**40 + 3
# Scales put values into float16's subnormal range and near the top of its normal range.
SCALES = (1.0, 0.0213, 3.1e-6, 7000.0)  # 7000 * 8.3 (the largest |z|) < 65504


def _sha(data: bytes) -> str:
    return hashlib.sha256(data).hexdigest()


def _le_bytes(arr: np.ndarray) -> bytes:
    # Fingerprints are of little-endian bytes; every supported platform is little-endian.
    assert sys.byteorder == "little"
    return np.ascontiguousarray(arr).tobytes()


def _quantile_grid() -> np.ndarray:
    # Odd multiples of 2**-53 (the generator's p grid) in both tails, including the far
    # region r > 5 that random draws almost never reach, built from integers only so the
    # inputs themselves cannot depend on the machine.
    small = list(range(1, 4001, 2))
    spread = [(2**k + j * 2 ** max(k - 3, 0)) | 1 for k in range(1, 52) for j in range(8)]
    middle = [(i * (2**53 // 998)) | 1 for i in range(1, 998)]
    odd = np.array(small + spread, dtype=np.int64)
    p = odd.astype(np.float64) * 2.0**-53
    mid = np.array(middle, dtype=np.int64).astype(np.float64) * 2.0**-53
    return np.concatenate([p, 1.0 - p, mid])


def fingerprints() -> dict[str, str]:
    result: dict[str, str] = {}
    for seed, name in CASES:
        key = derive_key(seed, name)
        tag = f"{seed}|{name}"
        raw = np.concatenate(
            [raw_draws(key, 0, 2003), raw_draws(key, FAR, 501), raw_draws(key, 5, 99, stream=1)]
        )
        result[f"{tag}|raw"] = _sha(_le_bytes(raw))
        for dist in DISTRIBUTIONS:
            values = np.concatenate(
                [
                    standard_values(dist, key, 0, 20_000),
                    standard_values(dist, key, FAR, 1001),
                    standard_runs(dist, key, [7, 1000, 99_999], 33).ravel(),
                ]
            )
            result[f"{tag}|{dist}|float64"] = _sha(_le_bytes(values))
            for dtype in OUTPUT_DTYPES:
                parts = [_le_bytes(round_to_dtype(values * s, dtype)) for s in SCALES]
                result[f"{tag}|{dist}|{dtype}"] = _sha(b"".join(parts))
    grid = _quantile_grid()
    result["normal_quantile"] = _sha(_le_bytes(normal_quantile(grid)))
    result["deterministic_log"] = _sha(
        _le_bytes(deterministic_log(np.concatenate([grid, grid * 1e300, [5e-324]])))
    )
    result["all"] = _sha(json.dumps(result, sort_keys=True).encode())
    return result


def main() -> None:
    prints = fingerprints()
    if "--write-golden" in sys.argv[1:]:
        GOLDEN.write_text(json.dumps(prints, indent=2, sort_keys=True) + "\n", encoding="utf-8")
    print(json.dumps(prints, sort_keys=True))


if __name__ == "__main__":
    main()
