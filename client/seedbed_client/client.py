"""`Client` and `AsyncClient`: plan a network, fetch its weights, verified, cached.

    from seedbed_client import Client
    with Client("http://seedbed.internal:8600") as client:
        arrays = client.weights(request, format="npz")     # {"encoder.0.weight": ndarray, ...}

Both classes build the same flows (flows.py) from the same settings (`_Setup`); they differ
only in the driver that performs the HTTP calls. Nothing is returned unless every tensor's
sha256 matched its manifest.
"""

from __future__ import annotations

import asyncio
import os
import random
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import httpx
import numpy as np

from seedbed_client._version import __version__
from seedbed_client.cache import WeightCache, default_cache_dir, default_max_bytes
from seedbed_client.containers import to_arrays
from seedbed_client.drivers import drive_async, drive_sync
from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.flows import Delivery, Flow, FlowContext, Source, json_flow, weights_flow
from seedbed_client.limits import RequestLimits
from seedbed_client.retry import RetryPolicy
from seedbed_client.spool import ProgressHook
from seedbed_client.wire import (
    SUFFIXES,
    RequestLike,
    WeightFormat,
    canonical_json,
    check_format,
    request_dict,
    weights_call,
)

__all__ = [
    "AsyncClient",
    "Client",
    "SavedWeights",
    "Timeouts",
    "WeightSet",
]

DEFAULT_URL = "http://127.0.0.1:8600"
ENV_URL = "SEEDBED_URL"
DEFAULT_FORMAT: WeightFormat = "npz"


@dataclass(frozen=True)
class Timeouts:
    """Seconds allowed for each phase of one attempt. `read` is the longest silence between two
    pieces of a body: safetensors bodies start only after the service hashed every tensor, so
    for multi-GiB requests keep it generous."""

    connect: float = 5.0
    read: float = 120.0
    write: float = 60.0
    pool: float = 10.0

    def for_httpx(self) -> httpx.Timeout:
        return httpx.Timeout(connect=self.connect, read=self.read, write=self.write, pool=self.pool)


class WeightSet(dict[str, np.ndarray]):
    """Tensor name -> array, every one verified; plus the manifest and where it came from.

    `source` is "service" (downloaded now), "revalidated" (cached copy, the service confirmed
    it with 304) or "cache" (cached copy used without asking the service, which was
    unreachable). Arrays are writable; writing to them changes neither the cache nor the file.
    """

    def __init__(
        self,
        arrays: Mapping[str, np.ndarray],
        manifest: dict[str, Any],
        etag: str | None,
        source: Source,
    ) -> None:
        super().__init__(arrays)
        self.manifest = manifest
        self.etag = etag
        self.source: Source = source

    @property
    def algorithm(self) -> str:
        return str(self.manifest.get("algorithm", ""))

    def entry(self, name: str) -> dict[str, Any]:
        """The manifest entry (plan entry + sha256) of one tensor."""
        for item in self.manifest["tensors"]:
            if item["tensor"] == name:
                return dict(item)
        raise KeyError(name)


@dataclass(frozen=True)
class SavedWeights:
    """A verified weights file written by `save`."""

    path: Path
    format: WeightFormat
    size: int
    manifest: dict[str, Any]
    source: Source


def _base_url(base_url: str | None) -> str:
    url = base_url or os.environ.get(ENV_URL) or DEFAULT_URL
    if not url.startswith(("http://", "https://")):
        raise SpecInvalid(
            [
                Problem(
                    "base_url",
                    "invalid_value",
                    f"got {url!r}; allowed: an http:// or https:// URL of the seedbed service",
                )
            ]
        )
    return url.rstrip("/")


def format_for_path(path: Path, fmt: str | None) -> WeightFormat:
    """The explicit format, else the one the file name's suffix names."""
    if fmt is not None:
        return check_format(fmt)
    suffix = path.suffix.lower()
    if suffix not in SUFFIXES:
        raise SpecInvalid(
            [
                Problem(
                    "format",
                    "missing_field",
                    f"cannot tell the format from {path.name!r}; give format= json, npz or "
                    "safetensors, or name the file *.json, *.npz or *.safetensors",
                )
            ]
        )
    return SUFFIXES[suffix]


def _place(delivery: Delivery, target: Path) -> int:
    """Move the verified spool file (written beside `target`) into place atomically."""
    if delivery.path is None:  # save() always spools; guard the invariant all the same
        raise RuntimeError("save() needs a spooled delivery")
    # The spool file was created private (mkstemp: 0600); the saved file gets the mode any other
    # program's new file gets, 0666 less the process umask, before it appears under its name.
    os.chmod(delivery.path, 0o666 & ~current_umask())
    os.replace(delivery.path, target)
    return target.stat().st_size


def current_umask() -> int:
    """The process umask. Reading it means setting it, so it is put back at once."""
    mask = os.umask(0o077)
    os.umask(mask)
    return mask


class _Setup:
    """Settings shared by both clients, and the flows built from them."""

    def __init__(
        self,
        base_url: str | None,
        timeout: float | Timeouts,
        retry: RetryPolicy,
        cache: bool,
        cache_dir: str | os.PathLike[str] | None,
        cache_max_bytes: int | None,
        limits: RequestLimits | None,
        headers: Mapping[str, str] | None,
        rng: random.Random | None,
    ) -> None:
        self.base_url = _base_url(base_url)
        self.timeout = timeout if isinstance(timeout, Timeouts) else Timeouts(*(timeout,) * 4)
        self.limits = limits
        store = None
        if cache:
            directory = Path(cache_dir) if cache_dir is not None else default_cache_dir()
            size = default_max_bytes() if cache_max_bytes is None else cache_max_bytes
            store = WeightCache(directory, size)
        self.context = FlowContext(
            retry=retry,
            cache=store,
            extra_headers={"user-agent": f"seedbed-client/{__version__}", **(headers or {})},
            rng=rng or random.Random(),
        )

    @property
    def cache(self) -> WeightCache | None:
        return self.context.cache

    def httpx_options(self) -> dict[str, Any]:
        return {"base_url": self.base_url, "timeout": self.timeout.for_httpx()}

    def plan_flow(self, request: RequestLike) -> Flow:
        body = canonical_json(request_dict(request, self.limits))
        return json_flow("POST", "/v1/plan", body, self.context)

    def catalog_flow(self) -> Flow:
        return json_flow("GET", "/v1/catalog", None, self.context)

    def weights_flow(
        self,
        request: RequestLike,
        fmt: str,
        tensor: str | None,
        rows: object,
        progress: ProgressHook | None = None,
        spool_dir: Path | None = None,
    ) -> Flow:
        call = weights_call(request, fmt, tensor=tensor, rows=rows, limits=self.limits)
        return weights_flow(call, self.context, progress=progress, spool_dir=spool_dir)

    @staticmethod
    def weight_set(delivery: Delivery) -> WeightSet:
        arrays = to_arrays(delivery.inspection)
        return WeightSet(arrays, delivery.manifest, delivery.etag, delivery.source)

    @staticmethod
    def one_tensor(delivery: Delivery, name: str) -> np.ndarray:
        arrays = to_arrays(delivery.inspection)
        if name not in arrays:  # the service always answers with the selected tensor
            raise SpecInvalid([Problem("tensor", "unknown_tensor", f"{name!r} not in answer")])
        return arrays[name]

    def saved(self, delivery: Delivery, target: Path, fmt: WeightFormat) -> SavedWeights:
        size = _place(delivery, target)
        return SavedWeights(target, fmt, size, delivery.manifest, delivery.source)

    @staticmethod
    def spool_dir_for(target: Path) -> Path:
        target.parent.mkdir(parents=True, exist_ok=True)
        return target.parent


_SETUP_DOC = """
    Arguments (all optional; see docs/client.md for the full table):
      base_url         the service, default SEEDBED_URL or http://127.0.0.1:8600
      timeout          seconds for every phase, or a Timeouts
      retry            RetryPolicy: attempts, backoff and total time for connection errors,
                       cut bodies, 5xx and 429
      cache            keep verified responses on disk (default True)
      cache_dir        where; default SEEDBED_CACHE_DIR or the user's cache dir + seedbed
      cache_max_bytes  size cap with least-recently-used eviction; default
                       SEEDBED_CACHE_MAX_BYTES or 2 GiB
      limits           RequestLimits checked before sending (None: leave it to the service)
      headers          extra HTTP headers (e.g. an Authorization header for a gateway)
"""


class Client:
    __doc__ = "Talk to a seedbed service (blocking).\n" + _SETUP_DOC

    def __init__(
        self,
        base_url: str | None = None,
        *,
        timeout: float | Timeouts = Timeouts(),
        retry: RetryPolicy = RetryPolicy(),  # noqa: B008 - frozen, safe to share
        cache: bool = True,
        cache_dir: str | os.PathLike[str] | None = None,
        cache_max_bytes: int | None = None,
        limits: RequestLimits | None = RequestLimits(),  # noqa: B008 - frozen
        headers: Mapping[str, str] | None = None,
        rng: random.Random | None = None,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        self._setup = _Setup(
            base_url, timeout, retry, cache, cache_dir, cache_max_bytes, limits, headers, rng
        )
        self._http = httpx.Client(transport=transport, **self._setup.httpx_options())

    @property
    def base_url(self) -> str:
        return self._setup.base_url

    @property
    def cache(self) -> WeightCache | None:
        return self._setup.cache

    def plan(self, request: RequestLike) -> dict[str, Any]:
        """The service's plan: one entry per tensor (shape, method, scale, rationale), no data."""
        result: dict[str, Any] = drive_sync(self._setup.plan_flow(request), self._http)
        return result

    def catalog(self) -> dict[str, Any]:
        """The methods, distributions and activations the service knows."""
        result: dict[str, Any] = drive_sync(self._setup.catalog_flow(), self._http)
        return result

    def weights(self, request: RequestLike, format: str = DEFAULT_FORMAT) -> WeightSet:
        """Every tensor of `request`, verified against its manifest sha256."""
        flow = self._setup.weights_flow(request, format, None, None)
        return self._setup.weight_set(drive_sync(flow, self._http))

    def tensor(
        self,
        request: RequestLike,
        name: str,
        rows: object = None,
        format: str = DEFAULT_FORMAT,
    ) -> np.ndarray:
        """One tensor, or rows START:STOP of it (`slice`, pair or "START:STOP"), verified.

        The block equals the same slice of the full tensor, byte for byte.
        """
        flow = self._setup.weights_flow(request, format, name, rows)
        return self._setup.one_tensor(drive_sync(flow, self._http), name)

    def save(
        self,
        request: RequestLike,
        path: str | os.PathLike[str],
        format: str | None = None,
        *,
        tensor: str | None = None,
        rows: object = None,
        progress: ProgressHook | None = None,
    ) -> SavedWeights:
        """Write the verified response to `path` (format from `format` or the file suffix).

        The file appears only once complete and verified (written beside it, then renamed).
        """
        target = Path(path)
        fmt = format_for_path(target, format)
        spool = self._setup.spool_dir_for(target)
        flow = self._setup.weights_flow(request, fmt, tensor, rows, progress, spool)
        return self._setup.saved(drive_sync(flow, self._http), target, fmt)

    def close(self) -> None:
        self._http.close()

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


class AsyncClient:
    __doc__ = "Talk to a seedbed service from asyncio; same arguments as Client.\n" + _SETUP_DOC

    def __init__(
        self,
        base_url: str | None = None,
        *,
        timeout: float | Timeouts = Timeouts(),
        retry: RetryPolicy = RetryPolicy(),  # noqa: B008 - frozen, safe to share
        cache: bool = True,
        cache_dir: str | os.PathLike[str] | None = None,
        cache_max_bytes: int | None = None,
        limits: RequestLimits | None = RequestLimits(),  # noqa: B008 - frozen
        headers: Mapping[str, str] | None = None,
        rng: random.Random | None = None,
        transport: httpx.AsyncBaseTransport | None = None,
    ) -> None:
        self._setup = _Setup(
            base_url, timeout, retry, cache, cache_dir, cache_max_bytes, limits, headers, rng
        )
        self._http = httpx.AsyncClient(transport=transport, **self._setup.httpx_options())

    @property
    def base_url(self) -> str:
        return self._setup.base_url

    @property
    def cache(self) -> WeightCache | None:
        return self._setup.cache

    async def plan(self, request: RequestLike) -> dict[str, Any]:
        result: dict[str, Any] = await drive_async(self._setup.plan_flow(request), self._http)
        return result

    async def catalog(self) -> dict[str, Any]:
        result: dict[str, Any] = await drive_async(self._setup.catalog_flow(), self._http)
        return result

    async def weights(
        self,
        request: RequestLike,
        format: str = DEFAULT_FORMAT,
    ) -> WeightSet:
        flow = self._setup.weights_flow(request, format, None, None)
        delivery = await drive_async(flow, self._http)
        return await asyncio.to_thread(self._setup.weight_set, delivery)

    async def tensor(
        self,
        request: RequestLike,
        name: str,
        rows: object = None,
        format: str = DEFAULT_FORMAT,
    ) -> np.ndarray:
        flow = self._setup.weights_flow(request, format, name, rows)
        delivery = await drive_async(flow, self._http)
        return await asyncio.to_thread(self._setup.one_tensor, delivery, name)

    async def save(
        self,
        request: RequestLike,
        path: str | os.PathLike[str],
        format: str | None = None,
        *,
        tensor: str | None = None,
        rows: object = None,
        progress: ProgressHook | None = None,
    ) -> SavedWeights:
        target = Path(path)
        fmt = format_for_path(target, format)
        spool = self._setup.spool_dir_for(target)
        flow = self._setup.weights_flow(request, fmt, tensor, rows, progress, spool)
        delivery = await drive_async(flow, self._http)
        return await asyncio.to_thread(self._setup.saved, delivery, target, fmt)

    async def aclose(self) -> None:
        await self._http.aclose()

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()
