"""What happens when things go wrong: a stopped service, a damaged cache, a cut connection,
a service that answers 503, and requests the service refuses."""

from __future__ import annotations

import time
from collections.abc import Callable
from pathlib import Path

import httpx
import pytest

from seedbed_client import (
    CacheCorrupted,
    Client,
    IntegrityError,
    RequestInvalid,
    RequestTooLarge,
    RetryPolicy,
    ServiceUnavailable,
    SpecInvalid,
    UnknownTensor,
)
from support.networks import greenhouse_controller, single_dense
from support.server import RunningServer

from .conftest import FAST_RETRY, FaultyProxy, dead_url


def _blobs(cache_dir: Path) -> list[Path]:
    return sorted((cache_dir / "v2" / "by-content").iterdir())


def _flip_byte(path: Path, offset_from_end: int = 3) -> None:
    data = bytearray(path.read_bytes())
    data[-offset_from_end] ^= 0x01
    path.write_bytes(bytes(data))


def _served_304s(base_url: str) -> float:
    text = httpx.get(f"{base_url}/metrics").text
    total = 0.0
    for line in text.splitlines():
        if line.startswith("seedbed_http_requests_total") and 'status="304"' in line:
            total += float(line.rsplit(" ", 1)[1])
    return total


def test_second_fetch_works_with_the_service_stopped(
    servers: Callable[[], RunningServer], make_client: Callable[..., Client], cache_dir: Path
) -> None:
    own = servers()
    request = greenhouse_controller()
    first = make_client(own.base_url).weights(request, format="safetensors")
    assert first.source == "service" and len(_blobs(cache_dir)) == 1

    revalidated = make_client(own.base_url).weights(request, format="safetensors")
    assert revalidated.source == "revalidated"
    assert _served_304s(own.base_url) >= 1  # the service confirmed the copy, sent no body

    own.stop()
    offline = make_client(own.base_url).weights(request, format="safetensors")
    assert offline.source == "cache"
    for name in first:
        assert offline[name].tobytes() == first[name].tobytes()
    # Other formats and selections are other keys: not cached, so the stopped service shows.
    with pytest.raises(ServiceUnavailable) as caught:
        make_client(own.base_url).weights(request, format="npz")
    assert caught.value.last_status is None and caught.value.attempts == FAST_RETRY.attempts


def test_corrupted_cache_entry_is_discarded_and_fetched_again(
    service: RunningServer, make_client: Callable[..., Client], cache_dir: Path
) -> None:
    request = greenhouse_controller()
    good = make_client(service.base_url).weights(request, format="npz")
    (blob,) = _blobs(cache_dir)
    _flip_byte(blob, offset_from_end=len(blob.read_bytes()) // 2)

    again = make_client(service.base_url).weights(request, format="npz")
    assert again.source == "service"  # not "revalidated": the damaged copy was not offered
    for name in good:
        assert again[name].tobytes() == good[name].tobytes()
    (repaired,) = _blobs(cache_dir)
    assert (
        repaired.read_bytes() != b""
        and make_client(service.base_url).weights(request, format="npz").source == "revalidated"
    )


@pytest.mark.parametrize("damage", ["flip", "truncate", "delete-blob"])
def test_corrupted_cache_with_the_service_unreachable_raises(
    service: RunningServer, make_client: Callable[..., Client], cache_dir: Path, damage: str
) -> None:
    request = greenhouse_controller(dtype="float16")
    make_client(service.base_url).weights(request, format="safetensors")
    (blob,) = _blobs(cache_dir)
    if damage == "flip":
        _flip_byte(blob)
    elif damage == "truncate":
        blob.write_bytes(blob.read_bytes()[:-10])
    else:
        blob.unlink()

    client = make_client(dead_url())
    if damage == "delete-blob":  # a missing blob is a plain miss, not damage
        with pytest.raises(ServiceUnavailable):
            client.weights(request, format="safetensors")
    else:
        with pytest.raises(CacheCorrupted) as caught:
            client.weights(request, format="safetensors")
        assert isinstance(caught.value.__cause__, ServiceUnavailable)
    assert not list((cache_dir / "v2" / "by-request").glob("*.json"))  # the entry is gone


def test_a_cut_connection_raises_integrity_error_and_returns_nothing(
    service: RunningServer,
    make_client: Callable[..., Client],
    proxy: Callable[[list[str]], FaultyProxy],
    cache_dir: Path,
) -> None:
    cutter = proxy(["cut"])
    client = make_client(cutter.base_url)
    for fmt in ("npz", "safetensors", "json"):
        with pytest.raises(IntegrityError) as caught:
            client.weights(single_dense(64, 64), format=fmt)
        assert "body bytes" in str(caught.value) or "ended after" in str(caught.value)
    assert cutter.connections == 3 * FAST_RETRY.attempts  # each cut was retried, then refused
    assert not (cache_dir / "v2" / "by-request").exists() or not list(
        (cache_dir / "v2" / "by-request").iterdir()
    )
    partial = cache_dir / "v2" / "partial"
    leftovers = list(partial.glob("*")) if partial.exists() else []
    assert leftovers == []  # partial downloads are removed, not kept


def test_one_cut_then_success_recovers(
    service: RunningServer,
    make_client: Callable[..., Client],
    proxy: Callable[[list[str]], FaultyProxy],
) -> None:
    flaky = proxy(["cut", "forward"])
    weights = make_client(flaky.base_url, cache=False).weights(single_dense(32, 16))
    direct = make_client(service.base_url, cache=False).weights(single_dense(32, 16))
    assert weights["bulk.weight"].tobytes() == direct["bulk.weight"].tobytes()
    assert flaky.seen == ["cut", "forward"]


def test_retries_on_503_then_succeeds(
    service: RunningServer,
    make_client: Callable[..., Client],
    proxy: Callable[[list[str]], FaultyProxy],
) -> None:
    stub = proxy(["unavailable", "unavailable", "forward"])
    client = make_client(stub.base_url, cache=False)
    plan = client.plan(greenhouse_controller())
    assert stub.seen == ["unavailable", "unavailable", "forward"]
    assert plan == make_client(service.base_url).plan(greenhouse_controller())


def test_503_forever_gives_service_unavailable_within_the_budget(
    service: RunningServer,
    make_client: Callable[..., Client],
    proxy: Callable[[list[str]], FaultyProxy],
) -> None:
    stub = proxy(["unavailable"])
    policy = RetryPolicy(attempts=6, base_delay=0.01, max_delay=0.02, total_time=5.0)
    client = make_client(stub.base_url, retry=policy, cache=False)
    started = time.monotonic()
    with pytest.raises(ServiceUnavailable) as caught:
        client.weights(greenhouse_controller())
    assert time.monotonic() - started < policy.total_time  # bounded by the budget, not hung
    assert caught.value.last_status == 503 and caught.value.attempts == 6
    assert stub.connections == 6
    assert "try again" in str(caught.value)  # the service's own message is kept


def test_invalid_request_raises_request_invalid_naming_the_field(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    request = greenhouse_controller()
    request["layers"][1]["n_in"] = 0
    with pytest.raises(RequestInvalid) as caught:
        make_client(service.base_url).weights(request)
    err = caught.value
    assert err.status == 422 and err.field == "layers[1].n_in" and err.code == "invalid_value"
    assert err.request_id and "positive integer" in err.message


def test_unknown_tensor_and_bad_rows_are_typed(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    client = make_client(service.base_url)
    with pytest.raises(UnknownTensor) as caught:
        client.tensor(greenhouse_controller(), "no.such.weight")
    assert caught.value.field == "tensor" and "sensors.0.weight" in caught.value.message
    with pytest.raises(RequestInvalid) as rows:
        client.tensor(greenhouse_controller(), "sensors.0.weight", rows="0:999")
    assert rows.value.field == "rows" and rows.value.code == "out_of_range"
    with pytest.raises(SpecInvalid) as local:  # caught before sending
        client.tensor(greenhouse_controller(), "sensors.0.weight", rows="9:3")
    assert local.value.field == "rows"


def test_oversized_request_is_refused_locally_and_by_the_service(
    service: RunningServer, make_client: Callable[..., Client]
) -> None:
    huge = single_dense(1 << 15, 1 << 14)  # 2**29 elements in one tensor
    with pytest.raises(SpecInvalid) as local:
        make_client(service.base_url).plan(huge)
    assert local.value.code == "too_large" and local.value.field == "layers[0]"
    with pytest.raises(RequestTooLarge) as remote:
        make_client(service.base_url, limits=None).plan(huge)
    assert remote.value.status == 413 and remote.value.code == "too_large"
    assert remote.value.field == local.value.field
