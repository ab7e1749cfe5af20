"""JSON bodies read back with json.loads + base64, and sized before generation."""

from __future__ import annotations

import base64
import json
from collections.abc import Iterator

import ml_dtypes
import numpy as np

from seedbed.formats import OutgoingTensor, json_body, json_size
from support.format_helpers import DEMO_DOCUMENT, array_tensor, collect, sha256_hex

_NP_DTYPES = {
    "float32": np.float32,
    "float64": np.float64,
    "float16": np.float16,
    "bfloat16": ml_dtypes.bfloat16,
}


def _demo_arrays() -> dict[str, np.ndarray]:
    rng = np.random.default_rng(31)
    return {
        "embed.weight": rng.standard_normal((5, 3)).astype(np.float32),  # 60 bytes: 3 | n
        "embed.bias": rng.standard_normal(1).astype(np.float16),  # 2 bytes: one padding '='
        "gate.weight": rng.standard_normal((2, 2)).astype(np.float64),  # 32 bytes: '='
        "tiny.scale": rng.standard_normal(2).astype(ml_dtypes.bfloat16),  # 4 bytes: '=='
        "empty.weight": np.zeros((0,), np.float32),
    }


def test_json_loads_and_base64_give_back_the_arrays() -> None:
    arrays = _demo_arrays()
    tensors = [array_tensor(k, v, dtype=v.dtype.name, pieces=(1, 2, 4)) for k, v in arrays.items()]
    body = collect(json_body(DEMO_DOCUMENT, tensors))
    doc = json.loads(body)
    assert {k: doc[k] for k in DEMO_DOCUMENT} == DEMO_DOCUMENT
    for entry, (name, arr) in zip(doc["tensors"], arrays.items(), strict=True):
        raw = base64.b64decode(entry["data"], validate=True)
        back = np.frombuffer(raw, dtype=_NP_DTYPES[arr.dtype.name]).reshape(arr.shape)
        assert back.tobytes() == arr.tobytes()
        assert entry["sha256"] == sha256_hex(arr.tobytes())
        assert entry["layer"] == name.rsplit(".", 1)[0]


def test_body_is_the_standard_librarys_canonical_serialisation() -> None:
    # Python's json with sort_keys and compact separators is the oracle for the exact bytes.
    arrays = _demo_arrays()
    tensors = [array_tensor(k, v, dtype=v.dtype.name, pieces=(5,)) for k, v in arrays.items()]
    body = collect(json_body(DEMO_DOCUMENT, tensors))
    expected = dict(DEMO_DOCUMENT)
    expected["tensors"] = [
        {
            **t.entry,
            "data": base64.b64encode(arr.tobytes()).decode(),
            "sha256": sha256_hex(arr.tobytes()),
        }
        for t, arr in zip(tensors, arrays.values(), strict=True)
    ]
    assert body == json.dumps(expected, sort_keys=True, separators=(",", ":")).encode()


def test_json_size_needs_no_generation() -> None:
    calls = [0]

    def chunks() -> Iterator[bytes]:
        calls[0] += 1
        yield bytes(10)

    t = OutgoingTensor("w", "float16", (5,), 10, {"layer": "w"}, chunks)
    size = json_size(DEMO_DOCUMENT, [t])
    assert calls[0] == 0
    assert size == len(collect(json_body(DEMO_DOCUMENT, [t])))
    assert calls[0] == 1  # the JSON body itself is a single pass


def test_empty_payload() -> None:
    body = collect(json_body(DEMO_DOCUMENT, []))
    assert json.loads(body) == {**DEMO_DOCUMENT, "tensors": []}
    assert json_size({}, []) == len(b'{"tensors":[]}')
