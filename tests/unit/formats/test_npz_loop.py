"""The loop docs/formats.md gives for an NPZ loads every tensor and skips the manifest.

Outside reference: the file is written by this service's NPZ writer and read by numpy's own
loader (numpy.load), with the loop taken verbatim from the doc.
"""

from __future__ import annotations

import io
import re
from pathlib import Path

import numpy as np

from seedbed.core.plan import build_plan
from seedbed.web.weights_response import encode_weights

DOC = (Path(__file__).resolve().parents[3] / "docs" / "formats.md").read_text(encoding="utf-8")

# An invented network: a pond-level sensor fusion.
POND = {
    "seed": "pond/4",
    "layers": [
        {"name": "gauge", "kind": "dense", "n_in": 5, "n_out": 8, "activation": "relu"},
        {"name": "level", "kind": "dense", "n_in": 8, "n_out": 1, "role": "output"},
    ],
}


def test_the_documented_loop_skips_the_manifest(tmp_path: Path) -> None:
    plan = build_plan(POND)
    encoded = encode_weights(plan, None, "npz", 1 << 16, 1)
    path = tmp_path / "weights.npz"
    path.write_bytes(b"".join(encoded.body))
    block = re.search(r"> ```python\n((?:> .*\n)+)> ```", DOC)
    assert block is not None, "the loop is in docs/formats.md"
    code = "\n".join(line[2:] for line in block.group(1).splitlines())
    scope: dict[str, object] = {"np": np}
    exec(code.replace('"weights.npz"', repr(str(path))), scope)
    arrays = scope["arrays"]
    assert isinstance(arrays, dict)
    assert sorted(arrays) == ["gauge.bias", "gauge.weight", "level.bias", "level.weight"]
    assert all(isinstance(a, np.ndarray) and a.dtype == np.float32 for a in arrays.values())
    # The naive loop meets the manifest: its value is bytes, not an array.
    with np.load(io.BytesIO(path.read_bytes()), allow_pickle=False) as npz:
        assert "seedbed-manifest.json" in list(npz)
