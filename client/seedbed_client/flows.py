"""The client's logic without any I/O: what to send, when to retry, what to trust.

Each operation is a generator ("flow") that yields effects — `Send` an HTTP request, `Wait` some
seconds — and receives their outcomes (`Reply` or `Failure`). It returns the verified result or
raises a typed error. The sync `Client` and the `AsyncClient` only carry effects out
(`drivers.py`), so retries, cache use, error mapping and verification exist once.

Local file work (cache lookups, hashing, parsing) happens inside the flow; the async driver
advances the flow in a worker thread, so that work never blocks an event loop.
"""

from __future__ import annotations

import json
import random
import tempfile
import time
from collections.abc import Callable, Generator, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, BinaryIO, Literal

from seedbed_client.body_address import PREFIX as ADDRESS_PREFIX
from seedbed_client.body_address import address_of
from seedbed_client.cache import CacheEntry, WeightCache
from seedbed_client.containers import Inspection, inspect_body, page_releaser, require_intact
from seedbed_client.errors import (
    CacheCorrupted,
    IntegrityError,
    ServiceUnavailable,
    service_error,
)
from seedbed_client.retry import NO_RETRY, RETRY_STATUSES, RetryBudget, RetryPolicy
from seedbed_client.retry import retry_after_seconds as _retry_after
from seedbed_client.spool import (
    BodySink,
    FileSink,
    MemorySink,
    ProgressHook,
    copy_to_spool,
    map_file,
    map_handle,
    read_file,
)
from seedbed_client.wire import RecipeWeightsCall, WeightsCall

Source = Literal["service", "cache", "revalidated", "local"]


@dataclass(frozen=True)
class Send:
    """Send one HTTP request. A 200 body goes to `sink` when there is one, else to memory."""

    method: str
    path: str
    params: Mapping[str, str]
    headers: Mapping[str, str]
    body: bytes | None = None
    sink: BodySink | None = None


@dataclass(frozen=True)
class Wait:
    seconds: float


@dataclass(frozen=True)
class Reply:
    """An answer. `complete` is False when fewer body bytes arrived than Content-Length said."""

    status: int
    headers: Mapping[str, str]  # lower-case names
    content: bytes = b""  # the body, unless it went to the sink
    complete: bool = True
    received: int = 0
    expected: int | None = None


@dataclass(frozen=True)
class Failure:
    """No usable answer: `kind` connect (never reached), timeout, or dropped (cut mid-body)."""

    kind: Literal["connect", "timeout", "dropped"]
    detail: str
    received: int = 0
    expected: int | None = None


Effect = Send | Wait
Outcome = Reply | Failure | None
Flow = Generator[Effect, Outcome, Any]


@dataclass
class FlowContext:
    """What every flow needs besides its own arguments (built once per client)."""

    retry: RetryPolicy = field(default_factory=RetryPolicy)
    cache: WeightCache | None = None
    extra_headers: Mapping[str, str] = field(default_factory=dict)
    rng: random.Random = field(default_factory=random.Random)
    clock: Callable[[], float] = time.monotonic


@dataclass(frozen=True)
class Delivery:
    """A verified weights body: its parsed manifest and tensors, and where it came from."""

    inspection: Inspection
    buffer: Any  # a bytearray the client owns, or a read-only map of `path`
    etag: str | None
    source: Source
    path: Path | None  # with spool_dir: the spool file holding exactly this body
    # Without spool_dir: an open handle on the verified body file (in the cache, or a temporary
    # file already unlinked), for arrays to map instead of holding the body in memory.
    handle: BinaryIO | None = None

    @property
    def manifest(self) -> dict[str, Any]:
        return self.inspection.manifest


# --- one exchange, with retries --------------------------------------------------------------


def _truncation(outcome: Reply | Failure) -> str | None:
    if isinstance(outcome, Failure) and outcome.kind == "dropped":
        return (
            f"the connection dropped after {outcome.received} of "
            f"{outcome.expected if outcome.expected is not None else 'an unknown number of'} "
            f"body bytes ({outcome.detail})"
        )
    if isinstance(outcome, Reply) and not outcome.complete:
        return f"the body ended after {outcome.received} of {outcome.expected} bytes"
    return None


def _describe(outcome: Reply | Failure) -> str:
    if isinstance(outcome, Failure):
        return f"{outcome.kind}: {outcome.detail}"
    try:
        err = service_error(outcome.status, json.loads(outcome.content or b"null"))
        return str(err)
    except ValueError:
        return f"HTTP {outcome.status}"


def exchange(
    make: Callable[[], Send], policy: RetryPolicy, ctx: FlowContext
) -> Generator[Effect, Outcome, tuple[Send, Reply]]:
    """Send until an answer is usable: retry connection failures, cut bodies, 5xx and 429.

    Returns the last Send and its Reply, which is complete and has a non-retryable status.
    """
    budget = RetryBudget(policy, ctx.clock(), ctx.rng)
    while True:
        send = make()
        budget.attempts += 1
        outcome = yield send
        if outcome is None:
            raise RuntimeError("a driver answered a Send with nothing")
        if isinstance(outcome, Reply) and outcome.complete and outcome.status not in RETRY_STATUSES:
            return send, outcome
        if send.sink is not None:
            send.sink.abandon()
        retry_after = _retry_after(outcome.headers) if isinstance(outcome, Reply) else None
        wait = budget.next_wait(ctx.clock(), retry_after)
        if wait is None:
            tries = f"{budget.attempts} attempt{'s' if budget.attempts > 1 else ''}"
            cut = _truncation(outcome)
            if cut is not None:
                raise IntegrityError(f"{cut}; gave up after {tries}; no data was returned")
            status = outcome.status if isinstance(outcome, Reply) else None
            raise ServiceUnavailable(
                f"{send.method} {send.path}: no usable answer after {tries} "
                f"(last: {_describe(outcome)})",
                attempts=budget.attempts,
                last_status=status,
            )
        if wait > 0:
            yield Wait(wait)


def _headers(ctx: FlowContext, **more: str) -> dict[str, str]:
    headers = {"accept-encoding": "identity", **ctx.extra_headers}
    headers.update(more)
    return headers


def _json_reply(reply: Reply) -> Any:
    try:
        return json.loads(reply.content)
    except ValueError:
        return reply.content.decode("utf-8", errors="replace")


def _raise_for(reply: Reply) -> None:
    if reply.status != 200:
        raise service_error(reply.status, _json_reply(reply), reply.headers.get("x-request-id"))


# --- small JSON endpoints --------------------------------------------------------------------


def json_flow(
    method: str, path: str, body: bytes | None, ctx: FlowContext
) -> Generator[Effect, Outcome, Any]:
    """POST /v1/plan, GET /v1/catalog: one JSON document, retried, no cache."""
    _, doc = yield from document_flow(method, path, body, ctx)
    return doc


def document_flow(
    method: str,
    path: str,
    body: bytes | None,
    ctx: FlowContext,
    *,
    params: Mapping[str, str] | None = None,
    content_type: str = "application/json",
    accept: str = "application/json",
    ok: tuple[int, ...] = (200,),
    more_headers: Mapping[str, str] | None = None,
    retry: RetryPolicy | None = None,
) -> Generator[Effect, Outcome, tuple[Reply, Any]]:
    """One small document (JSON, or text when `accept` is not JSON), retried, no cache.

    Returns the reply and the parsed body; any status outside `ok` raises the service's error.
    """
    extra = {"content-type": content_type} if body is not None else {}
    headers = _headers(ctx, accept=accept, **extra, **(more_headers or {}))
    query = dict(params or {})
    _, reply = yield from exchange(
        lambda: Send(method, path, query, headers, body), retry or ctx.retry, ctx
    )
    if reply.status not in ok:
        raise service_error(reply.status, _json_reply(reply), reply.headers.get("x-request-id"))
    if "json" not in accept:
        return reply, reply.content.decode("utf-8", errors="replace")
    try:
        return reply, json.loads(reply.content)
    except ValueError:
        raise IntegrityError(
            f"{path} answered {reply.status} with a body that is not JSON"
        ) from None


# --- weights ---------------------------------------------------------------------------------


def _open_cached(
    entry: CacheEntry,
    call: WeightsCall | RecipeWeightsCall,
    spool_dir: Path | None,
) -> Delivery:
    """Open a cached body and verify it against its content address (its SHA-256, under which
    it was stored once its every tensor had matched the manifest), and its structure.

    JSON is read into memory; `save` gets its own copy in `spool_dir`; arrays map the cache file
    itself through a handle opened before the check. The cache only ever renames and unlinks
    its files (never writes one in place), so what was checked is what the arrays read, and
    their private mappings never write back.
    """
    if entry.format != call.format:
        raise IntegrityError(f"the cached entry is {entry.format}, its key says {call.format}")
    spooled: FileSink | None = None
    handle: BinaryIO | None = None
    release = None
    try:
        if spool_dir is None and call.format == "json":
            buffer: Any = read_file(entry.blob_path)
            digest = address_of(buffer, entry.blob)
        elif spool_dir is None:
            # The open handle keeps these very bytes readable if the entry is evicted or
            # replaced meanwhile (both are an unlink or a rename of the name, not a write).
            handle = open(entry.blob_path, "rb")  # noqa: SIM115 - handed to the caller
            buffer = map_handle(handle)
            digest = address_of(buffer, entry.blob)
            release = page_releaser(buffer)
        else:
            spooled = copy_to_spool(entry.blob_path, spool_dir)
            buffer = map_file(spooled.path)
            release = page_releaser(buffer)
            # The copy was hashed on the way in, in the current scheme; an older entry's name
            # is the plain SHA-256 of the body.
            same_scheme = entry.blob.startswith(ADDRESS_PREFIX)
            digest = spooled.digest() if same_scheme else address_of(buffer, entry.blob)
    except OSError as exc:
        if handle is not None:
            handle.close()
        raise IntegrityError(f"the cached body is unreadable: {exc}") from None
    try:
        if digest != entry.blob:
            raise IntegrityError("the cached body does not match its content address")
        # Only bodies that passed the full per-tensor check are stored, under their SHA-256;
        # with the address matched, hashing every tensor again would prove nothing new.
        inspection = inspect_body(buffer, call.format, release, rehash=False)
        require_intact(inspection, "the cached copy")
    except IntegrityError:
        if spooled is not None:
            spooled.abandon()
        if handle is not None:
            handle.close()
        raise
    path = spooled.path if spooled is not None and handle is None else None
    return Delivery(inspection, buffer, entry.etag, "cache", path, handle)


def _finish_download(
    send: Send,
    reply: Reply,
    call: WeightsCall | RecipeWeightsCall,
    ctx: FlowContext,
    keep_file: bool,
) -> Delivery:
    """Verify a received body. `keep_file` (save): the spool file is the caller's to rename;
    otherwise a spooled body moves into the cache (or is unlinked) and stays open for mapping."""
    sink = send.sink
    etag = reply.headers.get("etag")
    path: Path | None = None
    handle: BinaryIO | None = None
    release = None
    if isinstance(sink, MemorySink):
        buffer: Any = sink.buffer()
    elif isinstance(sink, FileSink):
        path = sink.close()
        handle = open(path, "rb")  # noqa: SIM115 - handed to the caller
        buffer = map_handle(handle)
        release = page_releaser(buffer)
    else:  # a driver must route a 200 body to the sink it was given
        raise RuntimeError("a weights body arrived without a sink")
    try:
        inspection = inspect_body(buffer, call.format, release)
        require_intact(inspection)
    except IntegrityError:
        if handle is not None:
            handle.close()
        sink.abandon()
        raise
    if ctx.cache is not None:
        # Copied, not moved: arrays map this private file, which nothing else can change.
        ctx.cache.store(
            call.cache_key, path or buffer, sink.digest(), call.format, etag, labels=call.labels
        )
    if keep_file:
        if handle is not None:
            handle.close()
        return Delivery(inspection, buffer, etag, "service", path)
    if path is not None:
        path.unlink(missing_ok=True)  # the open handle keeps the data readable
    return Delivery(inspection, buffer, etag, "service", None, handle)


def _temp_dir() -> Path:
    return Path(tempfile.gettempdir())


def weights_flow(
    call: WeightsCall | RecipeWeightsCall,
    ctx: FlowContext,
    *,
    progress: ProgressHook | None = None,
    spool_dir: Path | None = None,
) -> Generator[Effect, Outcome, Delivery]:
    """Fetch one weights response, from the cache when it holds a verified copy.

    With a cached copy the service is asked once, with If-None-Match (304: the copy is current;
    unreachable: the copy is used). A copy that fails verification is discarded and fetched
    again; if that is impossible, CacheCorrupted. The body is held in memory, or with
    `spool_dir` in a file there (`Delivery.path`, for `save` to rename into place).
    """
    cache = ctx.cache
    entry: CacheEntry | None = None
    cached: Delivery | None = None
    damage: IntegrityError | None = None
    landing = spool_dir or (cache.partial_dir() if cache is not None else _temp_dir())
    if cache is not None:
        entry = cache.lookup(call.cache_key)
        if entry is not None:
            try:
                cached = _open_cached(entry, call, spool_dir)
            except IntegrityError as exc:
                cache.discard(entry)
                entry, damage = None, exc

    if cached is not None and call.immutable:
        # A numbered recipe version never changes: a verified copy is the answer, unasked.
        assert entry is not None and cache is not None
        cache.touch(entry)
        return cached
    more = {"content-type": "application/json"} if call.body is not None else {}
    if cached is not None and cached.etag:
        more["if-none-match"] = cached.etag
    headers = _headers(ctx, **more)

    # Binary bodies always go to a file (beside the target for save, else in the cache's
    # partial/ folder or the temp dir) and are mapped, never held whole in memory; JSON bodies
    # are bounded by the service's JSON limit and decoded in memory anyway.
    in_memory = spool_dir is None and call.format == "json"

    def make() -> Send:
        # Only a file that becomes the caller's (save) must reach the disk before it is used.
        sink: BodySink = (
            MemorySink(progress)
            if in_memory
            else FileSink(landing, progress, durable=spool_dir is not None)
        )
        return Send(call.method, call.path, call.params, headers, call.body, sink)

    # Revalidating a verified copy is a single try: when it fails the copy is the answer.
    policy = NO_RETRY if cached is not None else ctx.retry
    try:
        send, reply = yield from exchange(make, policy, ctx)
    except (ServiceUnavailable, IntegrityError) as exc:
        if cached is not None:
            return cached
        if damage is not None:
            raise CacheCorrupted(
                f"the cached copy failed verification ({damage}) and was discarded; fetching "
                f"it again failed too ({exc}); no data was returned"
            ) from exc
        raise
    if reply.status != 200 and send.sink is not None:
        send.sink.abandon()
    if reply.status == 304:
        if cached is None or entry is None or cache is None:
            raise IntegrityError("the service answered 304 Not Modified to a plain request")
        cache.touch(entry, reply.headers.get("etag"))
        return Delivery(
            cached.inspection, cached.buffer, cached.etag, "revalidated", cached.path, cached.handle
        )
    if cached is not None and cached.path is not None:
        Path(cached.path).unlink(missing_ok=True)  # superseded by the new answer
    if cached is not None and cached.handle is not None:
        cached.handle.close()
    _raise_for(reply)
    return _finish_download(send, reply, call, ctx, keep_file=spool_dir is not None)


def run_flow_step(flow: Flow, outcome: Outcome) -> tuple[bool, Any]:
    """Advance a flow by one step: (False, next effect) or (True, its result).

    StopIteration cannot cross a thread or a future, so the async driver steps through this.
    """
    try:
        return False, flow.send(outcome)
    except StopIteration as done:
        return True, done.value


__all__ = [
    "Delivery",
    "Failure",
    "FlowContext",
    "Reply",
    "Send",
    "Wait",
    "document_flow",
    "exchange",
    "json_flow",
    "run_flow_step",
    "weights_flow",
]
