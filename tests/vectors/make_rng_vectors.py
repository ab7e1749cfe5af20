"""Write tests/vectors/rng_vectors.json, the generator's published test vectors.

The same JSON is shown in docs/generator.md; tests/test_rng_vectors.py checks that the code
reproduces it and that the document shows exactly this file. Regenerate only together with
a new ALGORITHM version:  PYTHONPATH=service:client python tests/vectors/make_rng_vectors.py
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from seedbed_client.generator import derive_key, raw_draws, round_to_dtype, standard_values
from seedbed_client.generator.keys import KEY_DOMAIN_TAG, key_digest, seed_bytes

OUT = Path(__file__).with_name("rng_vectors.json")
CASES = ((20261201, "harbour.encoder.0.weight"), ("tidal-gauge/7", "decoder.3.query.weight"))
FIRST = 6
FAR_START = 2**40 + 3


def _frame(data: bytes) -> bytes:
    return len(data).to_bytes(8, "little") + data


def build() -> dict[str, object]:
    cases = []
    for seed, name in CASES:
        key = derive_key(seed, name)
        message = KEY_DOMAIN_TAG + _frame(seed_bytes(seed)) + _frame(name.encode("utf-8"))
        case: dict[str, object] = {
            "seed": seed,
            "tensor_name": name,
            "hash_input_hex": message.hex(),
            "sha256_hex": key_digest(seed, name).hex(),
            "key_words_hex": [f"{w:016x}" for w in key],
            "raw_first_hex": [f"{int(x):016x}" for x in raw_draws(key, 0, FIRST)],
            "raw_far_start": FAR_START,
            "raw_far_hex": [f"{int(x):016x}" for x in raw_draws(key, FAR_START, 3)],
        }
        for dist in ("uniform", "normal", "truncated_normal"):
            values = standard_values(dist, key, 0, FIRST)
            case[f"{dist}_float64"] = [float(v).hex() for v in values]
            for dtype, view in (
                ("float32", np.uint32),
                ("float16", np.uint16),
                ("bfloat16", np.uint16),
            ):
                bits = round_to_dtype(values, dtype).view(view)
                width = np.dtype(view).itemsize * 2
                case[f"{dist}_{dtype}_bits"] = [f"{int(b):0{width}x}" for b in bits]
        cases.append(case)
    return {"first_index": 0, "count": FIRST, "cases": cases}


def render(vectors: dict[str, object]) -> str:
    """JSON with one field per line and short lists kept on their line (easier to read)."""
    lines = ["{", f'  "first_index": {vectors["first_index"]},', f'  "count": {vectors["count"]},']
    lines.append('  "cases": [')
    cases = vectors["cases"]
    assert isinstance(cases, list)
    for i, case in enumerate(cases):
        fields = [f"    {json.dumps(k)}: {json.dumps(v)}" for k, v in case.items()]
        lines.append("   {")
        lines.append(",\n".join(fields))
        lines.append("   }" + ("," if i + 1 < len(cases) else ""))
    lines.append("  ]")
    lines.append("}")
    return "\n".join(lines) + "\n"


def main() -> None:
    OUT.write_text(render(build()), encoding="utf-8")
    print(OUT.read_text(encoding="utf-8"))


if __name__ == "__main__":
    main()
