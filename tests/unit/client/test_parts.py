"""The client's parts without a network: retry timing, error mapping, cache bookkeeping,
container checks, layer helpers, and the public API list."""

from __future__ import annotations

import email.utils
import hashlib
import importlib
import inspect
import io
import json
import os
import random
import struct
import zipfile
from pathlib import Path
from typing import Any

import numpy as np
import pytest

import seedbed_client
from seedbed_client import (
    AttentionSpec,
    ConvSpec,
    DenseSpec,
    EmbeddingSpec,
    InitOverride,
    IntegrityError,
    NetworkSpec,
    NormSpec,
    RecurrentSpec,
    RequestInvalid,
    RequestLimits,
    RetryPolicy,
    ServiceError,
    SpecInvalid,
    UnknownTensor,
    WeightCache,
    default_cache_dir,
    inspect_body,
    limit_problems,
    service_error,
)
from seedbed_client.containers import require_intact, sniff_format
from seedbed_client.flows import Failure, FlowContext, Reply, Send, Wait, exchange
from seedbed_client.retry import RetryBudget, retry_after_seconds
from seedbed_client.wire import parse_rows, weights_call

# --- public API ------------------------------------------------------------------------------

PUBLIC_MODULES = [
    "seedbed_client.client",
    "seedbed_client.errors",
    "seedbed_client.layers",
    "seedbed_client.limits",
    "seedbed_client.retry",
    "seedbed_client.cache",
    "seedbed_client.containers",
    "seedbed_client.records",
]


def test_every_public_name_is_exported_and_every_export_exists() -> None:
    exported = set(seedbed_client.__all__)
    assert len(exported) == len(seedbed_client.__all__), "a name is listed twice"
    for name in exported:
        assert hasattr(seedbed_client, name), f"__all__ lists {name!r}, which does not exist"
    for module_name in PUBLIC_MODULES:
        module = importlib.import_module(module_name)
        # Every public class or function a public module defines must be in its __all__ ...
        defined = {
            n
            for n, obj in vars(module).items()
            if not n.startswith("_")
            and (inspect.isclass(obj) or inspect.isfunction(obj))
            and obj.__module__ == module_name
        }
        listed = set(module.__all__)
        missing = defined - listed - _INTERNAL.get(module_name, set())
        assert not missing, f"{module_name} defines public names not in its __all__: {missing}"
        # ... and everything a public module exports is exported by the package.
        assert listed <= exported, f"{module_name}: not re-exported: {listed - exported}"


# Helpers that modules need to share but that are not part of the API.
_INTERNAL: dict[str, set[str]] = {
    "seedbed_client.client": {"format_for_path"},
    "seedbed_client.limits": {"layer_tensors"},
    "seedbed_client.retry": {"RetryBudget", "retry_after_seconds"},
    "seedbed_client.cache": {"CacheEntry", "default_max_bytes"},
    "seedbed_client.containers": {
        "mapped_arrays",
        "numpy_dtype",
        "page_releaser",
        "require_intact",
        "to_arrays",
    },
}


def test_client_limits_equal_the_service_defaults() -> None:
    # The service's own Limits dataclass is the source; the client mirrors its numbers.
    from seedbed.core.request.limits import MAX_SIZE, Limits
    from seedbed_client.limits import MAX_SIZE as CLIENT_MAX_SIZE

    ours, theirs = RequestLimits(), Limits()
    assert {f: getattr(ours, f) for f in vars(ours)} == {
        f: getattr(theirs, f) for f in vars(theirs)
    }
    assert CLIENT_MAX_SIZE == MAX_SIZE


# --- retries ---------------------------------------------------------------------------------


def test_full_jitter_stays_inside_the_exponential_envelope() -> None:
    policy = RetryPolicy(attempts=8, base_delay=0.5, max_delay=3.0, total_time=100)
    rng = random.Random(4)
    for failures in range(1, 8):
        ceiling = min(3.0, 0.5 * 2 ** (failures - 1))
        draws = [policy.backoff(failures, rng) for _ in range(400)]
        assert all(0 <= d <= ceiling for d in draws)
        assert max(draws) > 0.9 * ceiling and min(draws) < 0.1 * ceiling  # spread, not fixed


def test_retry_after_in_seconds_and_as_http_date() -> None:
    now = 1_800_000_000.0
    date = email.utils.formatdate(now + 7, usegmt=True)  # RFC 9110 sec. 10.2.3: an HTTP-date
    assert retry_after_seconds({"retry-after": "3"}, now) == 3.0
    assert retry_after_seconds({"retry-after": date}, now) == pytest.approx(7.0)
    assert retry_after_seconds({"retry-after": "soon"}, now) is None
    assert retry_after_seconds({}, now) is None


def test_budget_stops_on_attempts_and_on_total_time() -> None:
    budget = RetryBudget(RetryPolicy(attempts=3, total_time=10.0), 0.0, random.Random(1))
    budget.attempts = 1
    assert budget.next_wait(1.0, retry_after=2.0) == 2.0
    assert budget.next_wait(9.0, retry_after=2.0) is None  # would end past 10 s
    budget.attempts = 3
    assert budget.next_wait(1.0, retry_after=0.0) is None


def _drive(flow: Any, outcomes: list[Reply | Failure]) -> tuple[list[Any], Any]:
    """Run a flow against scripted outcomes; returns the effects it yielded and its result."""
    effects: list[Any] = []
    answer: Reply | Failure | None = None
    while True:
        try:
            effect = flow.send(answer)
        except StopIteration as done:
            return effects, done.value
        effects.append(effect)
        answer = outcomes.pop(0) if isinstance(effect, Send) else None


def test_exchange_honours_retry_after_and_returns_the_good_reply() -> None:
    ctx = FlowContext(retry=RetryPolicy(attempts=4), rng=random.Random(0), clock=lambda: 0.0)
    outcomes: list[Reply | Failure] = [
        Reply(503, {"retry-after": "2"}),
        Failure("connect", "refused"),
        Reply(200, {}, b"{}"),
    ]
    effects, (_, reply) = _drive(
        exchange(lambda: Send("GET", "/x", {}, {}), ctx.retry, ctx), outcomes
    )
    kinds = [type(e).__name__ for e in effects]
    assert kinds == ["Send", "Wait", "Send", "Wait", "Send"]
    assert effects[1] == Wait(2.0) and reply.status == 200


def test_exchange_does_not_retry_4xx() -> None:
    ctx = FlowContext(retry=RetryPolicy(attempts=4), clock=lambda: 0.0)
    effects, (_, reply) = _drive(
        exchange(lambda: Send("GET", "/x", {}, {}), ctx.retry, ctx), [Reply(422, {}, b"{}")]
    )
    assert len(effects) == 1 and reply.status == 422


# --- errors ----------------------------------------------------------------------------------


def test_service_errors_are_mapped_from_status_and_code() -> None:
    body = {
        "error": {
            "status": 422,
            "code": "unknown_tensor",
            "field": "tensor",
            "message": "no tensor named 'x'",
            "problems": [{"field": "tensor", "code": "unknown_tensor", "message": "m"}],
        }
    }
    err = service_error(422, body, "rid-1")
    assert type(err) is UnknownTensor and isinstance(err, RequestInvalid)
    assert err.field == "tensor" and err.request_id == "rid-1" and len(err.problems) == 1
    odd = service_error(502, "<html>bad gateway</html>")
    assert type(odd) is ServiceError and odd.code == "http_502" and "bad gateway" in odd.message


# --- request building ------------------------------------------------------------------------


def test_rows_spellings_and_refusals() -> None:
    assert parse_rows(slice(2, 5)) == parse_rows("2:5") == parse_rows((2, 5)) == (2, 5)
    for bad in (slice(5, 2), "5:2", "a:b", (1, 2, 3), slice(0, 4, 2), (True, 3), "-1:3"):
        with pytest.raises(SpecInvalid) as caught:
            parse_rows(bad)
        assert caught.value.field == "rows"


def test_cache_key_ignores_key_order_but_not_the_selection() -> None:
    a = {"seed": 1, "layers": [{"name": "d", "kind": "dense", "n_in": 2, "n_out": 3}]}
    b = {"layers": [{"n_out": 3, "n_in": 2, "kind": "dense", "name": "d"}], "seed": 1}
    assert weights_call(a, "npz").cache_key == weights_call(b, "npz").cache_key
    keys = {
        weights_call(a, "npz").cache_key,
        weights_call(a, "json").cache_key,
        weights_call(a, "npz", tensor="d.weight").cache_key,
        weights_call(a, "npz", tensor="d.weight", rows="0:1").cache_key,
    }
    assert len(keys) == 4
    with pytest.raises(SpecInvalid):
        weights_call({**a, "seed": float("nan")}, "npz")
    with pytest.raises(SpecInvalid):
        weights_call(a, "hdf5")


# --- cache -----------------------------------------------------------------------------------


def test_default_cache_dir_follows_the_environment(tmp_path: Path) -> None:
    assert default_cache_dir({"SEEDBED_CACHE_DIR": str(tmp_path)}) == tmp_path
    if os.name == "posix" and os.uname().sysname == "Linux":
        assert default_cache_dir({"XDG_CACHE_HOME": "/var/c"}) == Path("/var/c/seedbed")
        assert default_cache_dir({}) == Path.home() / ".cache" / "seedbed"


def _store(cache: WeightCache, key: str, body: bytes) -> None:
    cache.store(key, body, hashlib.sha256(body).hexdigest(), "npz", f'"{key}"')


def test_cache_evicts_least_recently_used_to_stay_under_the_cap(tmp_path: Path) -> None:
    cache = WeightCache(tmp_path, max_bytes=2500)
    for i, key in enumerate(["a", "b"]):
        _store(cache, key, bytes([i]) * 1000)
        entry = cache.lookup(key)
        assert entry is not None
        os.utime(entry.entry_path, (1000 + i, 1000 + i))  # a used before b
    a = cache.lookup("a")
    assert a is not None
    cache.touch(a)  # now a is the most recently used, b the least
    _store(cache, "c", b"\x09" * 1000)  # 3000 bytes > 2500: one entry must go
    assert cache.lookup("b") is None
    assert cache.lookup("a") is not None and cache.lookup("c") is not None
    assert cache.size_bytes() == 2000


def test_identical_bodies_share_one_blob_and_oversized_ones_are_not_kept(tmp_path: Path) -> None:
    cache = WeightCache(tmp_path, max_bytes=10_000)
    _store(cache, "k1", b"same body")
    _store(cache, "k2", b"same body")
    assert cache.size_bytes() == len(b"same body")
    one = cache.lookup("k1")
    assert one is not None
    cache.discard(one)
    assert cache.lookup("k2") is not None  # its blob is still referenced
    big = b"x" * 20_000
    assert cache.store("k3", big, hashlib.sha256(big).hexdigest(), "npz", None) is None


def test_a_crash_while_storing_leaves_no_entry(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    cache = WeightCache(tmp_path)
    real_replace = os.replace

    def crash_on_entry(src: Any, dst: Any) -> None:
        if str(dst).endswith(".json"):
            raise OSError("disk vanished")
        real_replace(src, dst)

    monkeypatch.setattr(os, "replace", crash_on_entry)
    with pytest.raises(OSError):
        _store(cache, "k", b"body")
    monkeypatch.undo()
    assert cache.lookup("k") is None
    assert list((tmp_path / "v2" / "by-request").iterdir()) == []  # no temporary entry left
    assert list((tmp_path / "v2" / "partial").iterdir()) == []


# --- containers ------------------------------------------------------------------------------


def _safetensors(tensors: dict[str, np.ndarray], tamper: bool = False) -> bytes:
    """A safetensors body built by hand from the format description, with a seedbed manifest."""
    entries, header, data, offset = [], {}, b"", 0
    for name, arr in tensors.items():
        raw = arr.astype("<f4").tobytes()
        entries.append(
            {
                "tensor": name,
                "shape": list(arr.shape),
                "dtype": "float32",
                "sha256": hashlib.sha256(raw).hexdigest(),
            }
        )
        header[name] = {
            "dtype": "F32",
            "shape": list(arr.shape),
            "data_offsets": [offset, offset + len(raw)],
        }
        data, offset = data + raw, offset + len(raw)
    manifest = {"algorithm": "test", "tensors": entries}
    header = {"__metadata__": {"seedbed.manifest": json.dumps(manifest)}, **header}
    text = json.dumps(header).encode()
    text += b" " * (-(8 + len(text)) % 8)
    if tamper:
        data = data[:-1] + bytes([data[-1] ^ 1])
    return struct.pack("<Q", len(text)) + text + data


def test_hand_built_safetensors_passes_and_a_flipped_bit_is_named() -> None:
    tensors = {"w": np.arange(6, dtype="<f4").reshape(2, 3), "b": np.ones(3, dtype="<f4")}
    good = inspect_body(_safetensors(tensors), "safetensors")
    require_intact(good)
    bad = inspect_body(_safetensors(tensors, tamper=True), "safetensors")
    assert [t.name for t in bad.failed] == ["b"] and "sha256" in str(bad.failed[0].problem)
    with pytest.raises(IntegrityError) as caught:
        require_intact(bad)
    assert caught.value.tensors == ["b"]
    with pytest.raises(IntegrityError):
        inspect_body(_safetensors(tensors)[:40], "safetensors")


def test_without_rehash_the_structure_is_still_checked_and_digests_come_from_the_manifest() -> None:
    # rehash=False serves the cache, whose caller has matched the whole body's SHA-256 first.
    tensors = {"w": np.arange(6, dtype="<f4").reshape(2, 3)}
    body = _safetensors(tensors)
    trusted = inspect_body(body, "safetensors", rehash=False)
    assert [t.sha256 for t in trusted.tensors] == [
        t.sha256 for t in inspect_body(body, "safetensors").tensors
    ]
    # A shape that disagrees with the manifest is caught without any hashing.
    wrong = body.replace(b'"shape": [2, 3], "data_offsets"', b'"shape": [3, 2], "data_offsets"')
    assert wrong != body
    assert "shape" in str(inspect_body(wrong, "safetensors", rehash=False).failed[0].problem)


def test_npz_written_by_numpy_is_read_and_checked() -> None:
    # numpy.savez is an outside writer of the same container (stored zip of .npy members).
    w = np.linspace(-1, 1, 12, dtype="<f4").reshape(3, 4)
    manifest = {
        "tensors": [
            {
                "tensor": "w",
                "shape": [3, 4],
                "dtype": "float32",
                "sha256": hashlib.sha256(w.tobytes()).hexdigest(),
            }
        ]
    }
    buffer = io.BytesIO()
    np.savez(buffer, w=w)
    with zipfile.ZipFile(buffer, "a") as archive:
        archive.writestr("seedbed-manifest.json", json.dumps(manifest))
    body = buffer.getvalue()
    assert sniff_format(body) == "npz"
    inspection = inspect_body(body, "npz")
    require_intact(inspection)
    assert bytes(inspection.tensors[0].raw) == w.tobytes()


# --- layer helpers ---------------------------------------------------------------------------


def test_helpers_write_only_what_was_set() -> None:
    net = NetworkSpec(seed="kiln/3", dtype="float16").add(
        DenseSpec("probe", 48, 128, activation="leaky_relu", activation_param=0.2),
        ConvSpec("scan", 8, 16, 3, groups=2, stride=2),
        RecurrentSpec("history", "lstm", n_in=16, hidden=32, forget_bias=2.0),
        AttentionSpec("focus", 32, 4, bias=False),
        NormSpec("focus.norm", 32),
        EmbeddingSpec("kiln.id", 12, 32, init=InitOverride("he", fan="out")),
        DenseSpec("vent", 32, 1, role="output", class_prior=0.05),
    )
    request = net.to_request()
    assert request["layers"][0] == {
        "name": "probe",
        "kind": "dense",
        "n_in": 48,
        "n_out": 128,
        "activation": "leaky_relu",
        "activation_param": 0.2,
    }
    assert request["layers"][1]["kernel"] == [3] and request["layers"][1]["stride"] == [2]
    assert request["layers"][5]["init"] == {"method": "he", "fan": "out"}
    assert request["layers"][6]["class_prior"] == 0.05


@pytest.mark.parametrize(
    ("layer", "field", "code"),
    [
        (DenseSpec("d", 0, 3), "layers[0].n_in", "invalid_value"),
        (DenseSpec("bad name!", 2, 3), "layers[0].name", "invalid_value"),
        (ConvSpec("c", 6, 4, (3, 3), groups=4), "layers[0].groups", "invalid_value"),
        (ConvSpec("c", 4, 4, (3, 3, 3, 3)), "layers[0].kernel", "invalid_value"),
        (AttentionSpec("a", 10, 3), "layers[0].heads", "invalid_value"),
        (
            RecurrentSpec("r", "gru", n_in=2, hidden=2, gate_order=("reset",)),
            "layers[0].gate_order",
            "invalid_value",
        ),
        (
            RecurrentSpec("r", "lstm", n_in=2, hidden=2, activation="tanh"),
            "layers[0].activation",
            "not_allowed",
        ),
        (DenseSpec("d", 2, 3, class_prior=0.1), "layers[0].class_prior", "not_allowed"),
        (DenseSpec("d", 1 << 15, 1 << 14), "layers[0]", "too_large"),
        (RecurrentSpec("r", "simple", n_in=2, hidden=9000), "layers[0].hidden", "too_large"),
    ],
)
def test_helpers_refuse_locally_with_the_request_field(layer: Any, field: str, code: str) -> None:
    with pytest.raises(SpecInvalid) as caught:
        NetworkSpec(seed=1, layers=[layer]).to_request()
    assert (caught.value.field, caught.value.code) == (field, code)


def test_network_level_checks_report_every_problem() -> None:
    net = NetworkSpec(seed=-1, dtype="float8", layers=[DenseSpec("a", 1, 1), DenseSpec("a", 1, 1)])
    fields = [p.field for p in net.problems()]
    assert fields == ["seed", "dtype", "layers[1].name"]


def test_limits_count_every_kind_like_the_service() -> None:
    # Element counts of each kind, against the service's own tensor table (seedbed.core).
    from seedbed.core.request.parse import parse
    from seedbed.core.tensors import request_slots

    request = (
        # one layer of each kind, not a network: their widths need not chain
        NetworkSpec(seed=3, widths="unchecked")
        .add(
            DenseSpec("d", 5, 7),
            ConvSpec("c", 6, 4, (3, 2), groups=2, transposed=True),
            EmbeddingSpec("e", 11, 3),
            RecurrentSpec("r", "gru", n_in=3, hidden=5),
            AttentionSpec("a", 8, 2),
            NormSpec("n", 8, bias=False),
        )
        .to_request()
    )
    theirs = sum(int(np.prod(s.logical_shape)) for s in request_slots(parse(request).request))
    tight = RequestLimits(max_request_elements=theirs)
    assert limit_problems(request, tight) == []
    over = limit_problems(request, RequestLimits(max_request_elements=theirs - 1))
    assert [p.code for p in over] == ["too_large"] and f"{theirs} elements" in over[0].message
