"""Remembered digests: a repeated safetensors request streams without a hashing pass, with
the same bytes as a fresh service; the memo stays within its bounds."""

from __future__ import annotations

import hashlib
import json
import struct

import safetensors.numpy
from fastapi.testclient import TestClient

from seedbed.web import Settings, create_app
from seedbed.web.digest_memo import DigestMemo, digest_key

NETWORK = {
    "seed": "memo/estuary-sensor",
    "layers": [
        {"name": "a", "kind": "dense", "n_in": 40, "n_out": 30, "activation": "relu"},
        {"name": "b", "kind": "dense", "n_in": 30, "n_out": 5},
    ],
}


def _manifest(body: bytes) -> dict:
    (length,) = struct.unpack("<Q", body[:8])
    header = json.loads(body[8 : 8 + length])
    return json.loads(header["__metadata__"]["seedbed.manifest"])


def test_a_repeated_request_uses_the_remembered_digests_and_sends_the_same_bytes() -> None:
    with TestClient(create_app(Settings(plan_cache_entries=0))) as plain:
        fresh = plain.post("/v1/weights?format=safetensors", json=NETWORK).content
        assert len(plain.app.state.digest_memo) == 0  # turned off with the plan cache
    with TestClient(create_app()) as client:
        memo: DigestMemo = client.app.state.digest_memo
        first = client.post("/v1/weights?format=safetensors", json=NETWORK).content
        assert len(memo) == 1
        again = client.post("/v1/weights?format=safetensors", json=NETWORK).content
        npz = client.post("/v1/weights?format=npz", json=NETWORK)
    assert first == again == fresh
    assert npz.status_code == 200
    # What was remembered is what the manifest says and what hashlib says of the tensors.
    remembered = next(iter(memo._entries.values()))
    arrays = safetensors.numpy.load(first)
    for entry in _manifest(first)["tensors"]:
        name = entry["tensor"]
        assert remembered[name] == entry["sha256"]
        assert hashlib.sha256(arrays[name].tobytes()).hexdigest() == entry["sha256"]


def test_keys_follow_request_algorithm_and_selection_not_format() -> None:
    base = digest_key({"seed": 1}, "v1", None, None)
    assert base == digest_key({"seed": 1}, "v1", None, None)
    others = {
        digest_key({"seed": 2}, "v1", None, None),
        digest_key({"seed": 1}, "v2", None, None),
        digest_key({"seed": 1}, "v1", "a.weight", None),
        digest_key({"seed": 1}, "v1", "a.weight", (0, 3)),
    }
    assert base not in others and len(others) == 4


def test_the_memo_is_bounded_by_entries_and_digests() -> None:
    memo = DigestMemo(max_entries=2, max_digests=5)
    memo.put("k1", {"a": "1", "b": "2"})
    memo.put("k2", {"c": "3"})
    assert memo.get("k1") is not None  # k1 is now the most recent
    memo.put("k3", {"d": "4"})
    assert memo.get("k2") is None and len(memo) == 2
    memo.put("k4", {f"t{i}": str(i) for i in range(4)})  # 1 + 4 digests fit only without k1
    assert memo.get("k1") is None and memo.get("k3") is not None
    memo.put("k5", {f"t{i}": str(i) for i in range(6)})  # more than the whole budget
    assert memo.get("k5") is None
    off = DigestMemo(max_entries=0)
    off.put("k", {"a": "1"})
    assert len(off) == 0
