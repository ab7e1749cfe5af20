"""The one way the service answers with weights: `weights_response(request, plan, options)`.

POST /v1/weights, the weights of a stored recipe version and any later route that serves a
plan's values call it with their own `WeightsOptions` (selection, stored digests, extra
headers, file name); ETag, 304, the JSON size limit, Content-Length, streaming and metrics are
decided here once. The HTTP `rows=START:STOP` parameter is parsed here too (`parse_rows`).

From a plan (and an optional block selection) to an encoded body: this is the seam between
the core, which produces a tensor's bytes on demand, and the format writers, which arrange
them in a container. Nothing here holds a whole tensor, with one bounded exception:
safetensors needs every digest in its header, so its body walks the tensors twice (a hashing
pass, then the data). Tensors that fit a per-response budget (`HOLD_BUDGET_BYTES`, enforced by
the safetensors writer) send the bytes of the hashing pass instead of being generated and
hashed again; larger ones are generated twice, so memory stays bounded.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Iterator, Mapping
from dataclasses import dataclass, field
from functools import partial
from typing import Any

from fastapi import Request, Response
from fastapi.responses import StreamingResponse
from starlette.concurrency import run_in_threadpool

from seedbed.core.plan_types import Plan, TensorPlan
from seedbed.core.render import block_shape, iter_tensor_bytes
from seedbed.core.request.problems import Problem, RequestRejected
from seedbed.formats import EncodedBody, OutgoingTensor, encode_body, json_size
from seedbed.web.dependencies import digest_memo_of, metrics_of, settings_of
from seedbed.web.digest_memo import digest_key
from seedbed.web.documents import block_entry, response_document
from seedbed.web.errors import ApiError
from seedbed.web.etag import none_match, strong_etag
from seedbed.web.metrics import ServiceMetrics
from seedbed.web.read_ahead import read_ahead

# Bytes a safetensors response may hold between its hashing pass and its data pass. One 4096 x
# 4096 float32 tensor fits; a 1 GiB response still raises memory by less than the 128 MiB the
# service promises.
HOLD_BUDGET_BYTES = 64 << 20


@dataclass(frozen=True)
class Selection:
    """Rows [start, stop) of one tensor's served first axis."""

    tensor: TensorPlan
    start: int
    stop: int

    @property
    def shape(self) -> tuple[int, ...]:
        return tuple(block_shape(self.tensor, self.start, self.stop))

    @property
    def count(self) -> int:
        return math.prod(self.shape)

    def describe(self) -> dict[str, object]:
        return {"tensor": self.tensor.tensor, "rows": [self.start, self.stop]}


def outgoing_tensors(
    plan: Plan,
    selection: Selection | None,
    chunk_bytes: int,
    threads: int,
) -> list[OutgoingTensor]:
    def producer(t: TensorPlan, start: int, stop: int | None) -> OutgoingTensor:
        def generate() -> Iterator[bytes]:
            return iter_tensor_bytes(plan, t, start, stop, chunk_bytes=chunk_bytes, threads=threads)

        if stop is None:
            shape, entry = t.shape, t.manifest()
        else:
            shape = tuple(block_shape(t, start, stop))
            entry = block_entry(t, shape, start, stop)
        nbytes = math.prod(shape) * t.itemsize
        # Tensors of several pieces generate the next piece while this one is hashed and sent.
        source = read_ahead(generate) if nbytes >= 2 * chunk_bytes else generate
        return OutgoingTensor(
            name=t.tensor,
            dtype=t.dtype,
            shape=shape,
            nbytes=nbytes,
            entry=entry,
            chunks=source,
        )

    if selection is None:
        return [producer(t, 0, None) for t in plan.tensors]
    return [producer(selection.tensor, selection.start, selection.stop)]


@dataclass(frozen=True)
class Rearranged:
    """A plan's values served under a framework's own names and layouts (ONNX initializers):
    `tensors()` builds the outgoing tensors, `document` is added to the response document and
    `etag_parts` to what the ETag hashes (the arrangement changes the bytes)."""

    tensors: Callable[[], list[OutgoingTensor]]
    document: Mapping[str, Any]
    etag_parts: Mapping[str, Any]


def json_size_of(
    plan: Plan, selection: Selection | None, rearranged: Rearranged | None = None
) -> int:
    """Exact size of the JSON response, computed without generating any value."""
    if rearranged is not None:
        doc = {**response_document(plan, None), **rearranged.document}
        return int(json_size(doc, rearranged.tensors()))
    tensors = outgoing_tensors(plan, selection, 1 << 20, 1)
    doc = response_document(plan, None if selection is None else selection.describe())
    return int(json_size(doc, tensors))


def encode_weights(
    plan: Plan,
    selection: Selection | None,
    fmt: str,
    chunk_bytes: int,
    threads: int,
    digests: Mapping[str, str] | None = None,
    rearranged: Rearranged | None = None,
    on_digests: Callable[[Mapping[str, str]], None] | None = None,
) -> EncodedBody:
    """The encoded body. With `digests` (sha256 per tensor, known in advance) the formats verify
    every tensor while streaming and skip their own hashing pass; the bytes are the same."""
    if rearranged is not None:
        doc = {**response_document(plan, None), **rearranged.document}
        return encode_body(
            fmt,
            doc,
            rearranged.tensors(),
            digests=digests,
            hold_bytes=HOLD_BUDGET_BYTES,
            on_digests=on_digests,
        )
    tensors = outgoing_tensors(plan, selection, chunk_bytes, threads)
    doc = response_document(plan, None if selection is None else selection.describe())
    # Without digests, safetensors runs its hashing pass lazily, at the body's first step
    # (in the threadpool, after the headers went out).
    return encode_body(
        fmt, doc, tensors, digests=digests, hold_bytes=HOLD_BUDGET_BYTES, on_digests=on_digests
    )


# ---------------------------------------------------------------------------------------------
# Selecting a block


def parse_rows(text: str, t: TensorPlan) -> tuple[int, int]:
    """Parse 'START:STOP' for the served first axis of `t` (STOP exclusive, both required)."""
    rows = t.shape[0]
    allowed = (
        f"START:STOP with 0 <= START < STOP <= {rows} (rows of {t.tensor}, shape {list(t.shape)})"
    )
    parts = text.split(":")
    if len(parts) != 2 or not all(p.isdigit() and len(p) <= 19 for p in parts):
        problem = Problem("rows", "invalid_value", f"rows must be {allowed}; got {text!r}")
        raise RequestRejected([problem])
    start, stop = int(parts[0]), int(parts[1])
    if not 0 <= start < stop <= rows:
        problem = Problem("rows", "out_of_range", f"rows must be {allowed}; got {text!r}")
        raise RequestRejected([problem])
    return start, stop


def select(plan: Plan, tensor: str | None, rows: str | None) -> Selection | None:
    """The block the `tensor=` and `rows=` query parameters name (None: every tensor)."""
    if tensor is None:
        if rows is not None:
            raise ApiError.one(
                422, "rows", "needs_tensor", "rows selects rows of one tensor; name it with tensor="
            )
        return None
    try:
        t = plan.tensor(tensor)
    except KeyError:
        names = [x.tensor for x in plan.tensors]
        shown = ", ".join(names[:8]) + (f" ... ({len(names)} in all)" if len(names) > 8 else "")
        raise ApiError.one(
            422,
            "tensor",
            "unknown_tensor",
            f"no tensor named {tensor!r} in this request; it has: {shown}",
        ) from None
    if rows is None:
        start, stop = 0, (t.shape[0] if t.shape else 1)
    else:
        start, stop = parse_rows(rows, t)
    return Selection(t, start, stop)


# ---------------------------------------------------------------------------------------------
# The response


@dataclass(frozen=True)
class WeightsOptions:
    """How one route serves a plan's weights.

    format        json, npz or safetensors
    selection     one block of one tensor, or None for every tensor
    digests       sha256 per tensor known in advance (a stored recipe's fingerprints): the body
                  is verified against them while it streams and ends early on a mismatch
    headers       extra response headers, sent with 304 answers too (Cache-Control ...)
    filename      the attachment's name without extension
    selectable    whether the route takes tensor= (the 413 advice mentions it only then)
    weak          a weak ETag even for exact tensors (a URL whose body may change: `latest`)
    rearranged    the values under a framework's names and layouts instead of seedbed's
    """

    format: str
    selection: Selection | None = None
    digests: Mapping[str, str] | None = None
    headers: Mapping[str, str] = field(default_factory=dict)
    filename: str = "weights"
    selectable: bool = False
    weak: bool = False
    rearranged: Rearranged | None = None


async def weights_response(request: Request, plan: Plan, options: WeightsOptions) -> Response:
    """The weights of `plan` as the route's options say; 304 when If-None-Match matches."""
    settings = settings_of(request)
    fmt, selection = options.format, options.selection
    etag = strong_etag(
        "weights",
        request=plan.canonical_request,
        algorithm=plan.algorithm,
        format=fmt,
        tensor=None if selection is None else selection.tensor.tensor,
        rows=None if selection is None else [selection.start, selection.stop],
        **({} if options.rearranged is None else {"arranged": options.rearranged.etag_parts}),
    )
    served = plan.tensors if selection is None else (selection.tensor,)
    exact = all(t.reproducible == "exact" for t in served)
    if not exact or options.weak:
        # Orthogonal values may differ in the last bits between BLAS builds, so two replicas
        # can send different bytes under the same tag: only a weak validator is honest then
        # (and stored fingerprints are one platform's, not a promise for every replica).
        etag = "W/" + etag
    headers = {"ETag": etag, **options.headers, "X-Seedbed-Algorithm": plan.algorithm}
    if none_match(request.headers.get("if-none-match"), etag):
        return Response(status_code=304, headers=headers)
    if fmt == "json":
        # Serialising thousands of manifest entries to measure them is CPU work: off the loop.
        size = await run_in_threadpool(json_size_of, plan, selection, options.rearranged)
        if size > settings.max_json_response_bytes:
            advice = "ask for format=npz or format=safetensors"
            if options.selectable:
                advice += ", or select one tensor with tensor="
            raise ApiError.one(
                413,
                "format",
                "json_too_large",
                f"this JSON response would be {size} bytes, above the limit of "
                f"{settings.max_json_response_bytes} (SEEDBED_MAX_JSON_RESPONSE_BYTES); {advice}",
            )
    digests = options.digests if exact else None
    on_digests = None
    memo = digest_memo_of(request)
    if exact and digests is None and options.rearranged is None and memo is not None:
        # A request served before: its digests are known, so safetensors need not hash first.
        key = digest_key(
            plan.canonical_request,
            plan.algorithm,
            None if selection is None else selection.tensor.tensor,
            None if selection is None else (selection.start, selection.stop),
        )
        digests = memo.get(key)
        if digests is None:
            on_digests = partial(memo.put, key)
    # safetensors hashes every tensor before its first byte: that pass must not block the loop.
    encoded = await run_in_threadpool(
        encode_weights,
        plan,
        selection,
        fmt,
        settings.chunk_bytes,
        settings.threads_per_request(),
        digests,
        options.rearranged,
        on_digests,
    )
    headers["Content-Length"] = str(encoded.content_length)
    headers["Content-Disposition"] = f'attachment; filename="{options.filename}.{fmt}"'
    if request.method == "HEAD":
        return Response(status_code=200, media_type=encoded.media_type, headers=headers)
    values = plan.total_count if selection is None else selection.count
    return StreamingResponse(
        _count_when_done(encoded.body, metrics_of(request), fmt, values),
        media_type=encoded.media_type,
        headers=headers,
    )


def _count_when_done(
    body: Iterator[bytes], metrics: ServiceMetrics, fmt: str, values: int
) -> Iterator[bytes]:
    # A sync generator: StreamingResponse runs each step in the threadpool, so generation never
    # blocks the event loop. The values count only once the whole body went out.
    yield from body
    metrics.values_served.labels(format=fmt).inc(values)
