"""The cache's content address: pieces of 16 MiB, each hashed with SHA-256 (FIPS 180-4), and
the digest of their digests. Checked against hashlib computing the definition directly; the
incremental form (downloads) equals the threaded one (cache reads) at every piece boundary;
bodies stored by earlier clients under their plain SHA-256 are still read and checked."""

from __future__ import annotations

import hashlib
import sys
from pathlib import Path

import numpy as np
import pytest

from seedbed.core.plan import build_plan
from seedbed.web.weights_response import encode_weights
from seedbed_client.body_address import PIECE_BYTES, PREFIX, AddressHasher, address_of
from seedbed_client.cache import WeightCache
from seedbed_client.errors import IntegrityError
from seedbed_client.flows import _open_cached
from seedbed_client.wire import weights_call

sys.path.insert(0, str(Path(__file__).resolve().parents[2]))
from support.networks import single_dense

SIZES = [0, 1, PIECE_BYTES - 1, PIECE_BYTES, PIECE_BYTES + 1, 2 * PIECE_BYTES + 12_345]


def _by_definition(body: bytes) -> str:
    pieces = [body[i : i + PIECE_BYTES] for i in range(0, len(body), PIECE_BYTES)]
    return PREFIX + hashlib.sha256(b"".join(hashlib.sha256(p).digest() for p in pieces)).hexdigest()


@pytest.mark.parametrize("size", SIZES)
def test_every_way_of_computing_the_address_agrees(size: int) -> None:
    body = np.random.default_rng(size).integers(0, 256, size, dtype=np.uint8).tobytes()
    want = _by_definition(body)
    assert address_of(body, PREFIX, threads=1) == want
    assert address_of(body, PREFIX, threads=4) == want
    hasher = AddressHasher()
    cuts = np.random.default_rng(size + 1).integers(1, 3 << 20, 64)
    at = 0
    for cut in cuts:
        hasher.update(body[at : at + int(cut)])
        at += int(cut)
    hasher.update(body[at:])
    assert hasher.hexdigest() == want
    assert hasher.hexdigest() == want  # reading it does not change it


def test_an_address_without_the_prefix_is_the_plain_sha256() -> None:
    body = b"an earlier client's blob" * 1000
    plain = hashlib.sha256(body).hexdigest()
    assert address_of(body, plain) == plain
    assert address_of(body + b"!", plain) != plain


@pytest.mark.parametrize("scheme", ["pieces", "plain"])
def test_cached_bodies_of_either_scheme_are_read_and_checked(tmp_path: Path, scheme: str) -> None:
    request = single_dense(64, 48, seed=31)
    plan = build_plan(request)
    body = b"".join(encode_weights(plan, None, "safetensors", 1 << 16, 1).body)
    name = _by_definition(body) if scheme == "pieces" else hashlib.sha256(body).hexdigest()
    cache = WeightCache(tmp_path / "cache")
    call = weights_call(request, "safetensors")
    entry = cache.store(call.cache_key, body, name, "safetensors", None)
    assert entry is not None and entry.blob == name
    for spool in (None, tmp_path / "saved"):
        delivery = _open_cached(entry, call, spool)
        assert delivery.source == "cache"
        assert [t.name for t in delivery.inspection.tensors] == [t.tensor for t in plan.tensors]
        if delivery.handle is not None:
            delivery.handle.close()
    # One flipped byte in the stored body is caught, whichever scheme named it.
    damaged = bytearray(entry.blob_path.read_bytes())
    damaged[-1] ^= 1
    entry.blob_path.write_bytes(bytes(damaged))
    with pytest.raises(IntegrityError, match="content address"):
        _open_cached(entry, call, None)
