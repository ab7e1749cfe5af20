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
import hashlib
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
from seedbed_client.containers import mapped_arrays, to_arrays
from seedbed_client.drivers import drive_async, drive_sync
from seedbed_client.endpoint_flows import (
    RecipeDelivery,
    audit_flow,
    chart_flow,
    diagnose_body,
    diagnose_flow,
    publish_flow,
    publishing_key,
    recipe_list_flow,
    recipe_versions_flow,
    recipe_weights_flow,
    stored_recipe_flow,
)
from seedbed_client.environment import ENV_URL, environment
from seedbed_client.errors import Problem, SpecInvalid
from seedbed_client.flows import Delivery, Flow, FlowContext, Source, json_flow, weights_flow
from seedbed_client.limits import RequestLimits
from seedbed_client.local import (
    PlatformChoice,
    check_origin,
    check_platform,
    expected_digests,
    local_manifest,
    make_tensors,
    platform_names,
)
from seedbed_client.local_files import write_local
from seedbed_client.records import (
    AuditReport,
    DiagnosisReport,
    PublishedRecipe,
    RecipeSummary,
    StoredRecipe,
)
from seedbed_client.retry import RetryPolicy
from seedbed_client.spool import ProgressHook
from seedbed_client.wire import (
    SUFFIXES,
    RecipeRef,
    RequestLike,
    WeightFormat,
    canonical_json,
    check_format,
    parse_ref,
    parse_rows,
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
DEFAULT_FORMAT: WeightFormat = "npz"
# A request, or a recipe reference "name@version" / "name@latest" (a bare name means latest).
WeightsSource = RequestLike | str


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
    it with 304), "cache" (cached copy used without asking the service: it was unreachable,
    or the copy is a numbered recipe version, which never changes) or "local" (generated in
    this process from the plan). Arrays are writable; writing to them changes neither the cache
    nor the file.
    """

    def __init__(
        self,
        arrays: Mapping[str, np.ndarray],
        manifest: dict[str, Any],
        etag: str | None,
        source: Source,
        *,
        recipe: str | None = None,
        note: str | None = None,
        platform_made: tuple[str, ...] = (),
    ) -> None:
        super().__init__(arrays)
        self.manifest = manifest
        self.etag = etag
        self.source: Source = source
        # For recipe weights: the concrete "name@version" served (also when asked for latest).
        self.recipe = recipe
        # Set when something the caller should know happened (latest fell back to the cache).
        self.note = note
        # origin="local" with platform_tensors="generate": tensors whose bits were made here
        # although they depend on the platform's LAPACK (they may differ from the service's).
        self.platform_made = platform_made

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
    recipe: str | None = None
    note: str | None = None


def _base_url(base_url: str | None) -> str:
    url = base_url or environment().get(ENV_URL) or DEFAULT_URL
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
    os.chmod(delivery.path, 0o666 & ~_current_umask())
    os.replace(delivery.path, target)
    return target.stat().st_size


def _arrays_of(delivery: Delivery) -> dict[str, np.ndarray]:
    """Arrays on the verified body: private maps of its file, or views of memory we own."""
    if delivery.handle is None:
        return to_arrays(delivery.inspection)
    try:
        return mapped_arrays(delivery.inspection, delivery.handle)
    finally:
        delivery.handle.close()  # each array's map keeps its own reference to the file


def _current_umask() -> int:
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

    def recipe_weights_flow(
        self,
        ref: RecipeRef,
        fmt: str,
        progress: ProgressHook | None = None,
        spool_dir: Path | None = None,
    ) -> Flow:
        return recipe_weights_flow(
            ref,
            check_format(fmt),
            self.base_url,
            self.context,
            progress=progress,
            spool_dir=spool_dir,
        )

    def recipe_list_flow(self) -> Flow:
        return recipe_list_flow(self.context)

    def recipe_versions_flow(self, name: str) -> Flow:
        return recipe_versions_flow(parse_ref(name, "name").name, self.context)

    def stored_recipe_flow(self, ref: str) -> Flow:
        return stored_recipe_flow(parse_ref(ref), self.context)

    def publish_flow(
        self,
        name: str,
        request: RequestLike,
        description: str,
        key: str | None,
        key_file: str | os.PathLike[str] | None,
    ) -> Flow:
        ref = parse_ref(name, "name")
        if ref.version is not None or "@" in name:
            raise SpecInvalid(
                [
                    Problem(
                        "name",
                        "invalid_value",
                        f"got {name!r}; publish takes a bare name: the service assigns the version",
                    )
                ]
            )
        secret = publishing_key(key, key_file)
        return publish_flow(
            ref.name, request_dict(request, self.limits), description, secret, self.context
        )

    def audit_flow(self, path: str | os.PathLike[str], request: RequestLike | None) -> Flow:
        data = None if request is None else request_dict(request, self.limits)
        return audit_flow(Path(path), data, self.context)

    def diagnose_flow(self, request: RequestLike, alternatives: Any, batch: int | None) -> Flow:
        body = diagnose_body(request_dict(request, self.limits), alternatives, batch)
        return diagnose_flow(body, self.context)

    def chart_flow(
        self, request: RequestLike, alternatives: Any, batch: int | None, kind: str
    ) -> Flow:
        body = diagnose_body(request_dict(request, self.limits), alternatives, batch)
        return chart_flow(body, kind, self.context)

    @staticmethod
    def weight_set(delivery: Delivery) -> WeightSet:
        arrays = _arrays_of(delivery)
        return WeightSet(arrays, delivery.manifest, delivery.etag, delivery.source)

    @staticmethod
    def recipe_set(got: RecipeDelivery) -> WeightSet:
        d = got.delivery
        return WeightSet(
            _arrays_of(d), d.manifest, d.etag, d.source, recipe=str(got.ref), note=got.note
        )

    def recipe_saved(self, got: RecipeDelivery, target: Path, fmt: WeightFormat) -> SavedWeights:
        saved = self.saved(got.delivery, target, fmt)
        return SavedWeights(
            saved.path,
            saved.format,
            saved.size,
            saved.manifest,
            saved.source,
            recipe=str(got.ref),
            note=got.note,
        )

    @staticmethod
    def local_set(plan: dict[str, Any], made: tuple[list[dict[str, Any]], list[Any]]) -> WeightSet:
        entries, tensors = made
        return WeightSet(
            {t.name: t.array for t in tensors},
            local_manifest(plan, entries),
            None,
            "local",
            platform_made=tuple(t.name for t in tensors if t.platform),
        )

    @staticmethod
    def one_tensor(delivery: Delivery, name: str) -> np.ndarray:
        arrays = _arrays_of(delivery)
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

    def weights(
        self,
        request: WeightsSource,
        format: str = DEFAULT_FORMAT,
        *,
        origin: str = "service",
        platform_tensors: str = "fetch",
    ) -> WeightSet:
        """Every tensor of `request`, verified against its manifest sha256.

        `request` may be a recipe reference, "name@3" or "name@latest" (see docs/client.md).
        `origin="local"` asks the service for the plan only and generates every tensor in this
        process, byte-identical to the service's; orthogonal tensors, whose bits depend on the
        platform's LAPACK, are fetched from the service unless `platform_tensors="generate"`.
        """
        if check_origin(origin) == "local":
            return self._local(request, None, None, check_platform(platform_tensors), format)
        if isinstance(request, str):
            got = drive_sync(
                self._setup.recipe_weights_flow(parse_ref(request), format), self._http
            )
            return self._setup.recipe_set(got)
        flow = self._setup.weights_flow(request, format, None, None)
        return self._setup.weight_set(drive_sync(flow, self._http))

    def tensor(
        self,
        request: WeightsSource,
        name: str,
        rows: object = None,
        format: str = DEFAULT_FORMAT,
        *,
        origin: str = "service",
        platform_tensors: str = "fetch",
    ) -> np.ndarray:
        """One tensor, or rows START:STOP of it (`slice`, pair or "START:STOP"), verified.

        The block equals the same slice of the full tensor, byte for byte. With
        `origin="local"` only the plan is fetched and the block is generated here.
        """
        request = self._request_of(request)
        if check_origin(origin) == "local":
            made = self._local(
                request, name, parse_rows(rows), check_platform(platform_tensors), format
            )
            return made[name]
        flow = self._setup.weights_flow(request, format, name, rows)
        return self._setup.one_tensor(drive_sync(flow, self._http), name)

    def _request_of(self, request: WeightsSource) -> RequestLike:
        """A recipe reference becomes its stored request (for tensor/rows selections)."""
        if isinstance(request, str):
            return self.recipe(request).request
        return request

    def _local(
        self,
        request: WeightsSource,
        only: str | None,
        rows: tuple[int, int] | None,
        platform: PlatformChoice,
        fmt: str,
    ) -> WeightSet:
        request = self._request_of(request)
        plan = self.plan(request)
        fetched = {
            name: self.tensor(request, name, rows, fmt)
            for name in platform_names(plan, only, platform)
        }
        made = make_tensors(
            plan, only=only, rows=rows, platform_tensors=platform, fetch=lambda n, _r: fetched[n]
        )
        return self._setup.local_set(plan, made)

    def expected_digests(
        self, against: WeightsSource, *, origin: str = "local"
    ) -> dict[str, tuple[str, bool]]:
        """What each tensor's sha256 should be: tensor -> (digest, made here although
        platform-dependent). A recipe reference answers with the fingerprints its registry
        stored at publish time; a request is planned by the service and, with the default
        `origin="local"`, its digests are computed here without holding any tensor
        (orthogonal tensors are asked of the service); `origin="service"` downloads them."""
        if isinstance(against, str):
            stored = self.recipe(against)
            return {n: (d, False) for n, d in stored.fingerprints.items()}
        if check_origin(origin) == "service":
            served = self.weights(against)
            return {e["tensor"]: (e["sha256"], False) for e in served.manifest["tensors"]}
        plan = self.plan(against)

        def service_digest(name: str) -> str:
            array = np.ascontiguousarray(self.tensor(against, name))
            return hashlib.sha256(array.reshape(-1).view(np.uint8).data).hexdigest()

        return expected_digests(plan, service_digest)

    # --- recipes ---------------------------------------------------------------------------

    def recipes(self) -> list[RecipeSummary]:
        """Every recipe name with its newest version (all pages)."""
        result: list[RecipeSummary] = drive_sync(self._setup.recipe_list_flow(), self._http)
        return result

    def recipe_versions(self, name: str) -> list[RecipeSummary]:
        """The versions of one recipe, oldest first."""
        result: list[RecipeSummary] = drive_sync(self._setup.recipe_versions_flow(name), self._http)
        return result

    def recipe(self, ref: str) -> StoredRecipe:
        """One stored version ("name@3", "name@latest" or "name"): request, plan, fingerprints."""
        result: StoredRecipe = drive_sync(self._setup.stored_recipe_flow(ref), self._http)
        return result

    def publish(
        self,
        name: str,
        request: RequestLike,
        description: str = "",
        *,
        key: str | None = None,
        key_file: str | os.PathLike[str] | None = None,
    ) -> PublishedRecipe:
        """Publish `request` under `name`. The key comes from `key`, `key_file`,
        SEEDBED_PUBLISH_KEY or the file SEEDBED_PUBLISH_KEY_FILE names. Publishing the request
        the newest version already stores returns that version (`created` False)."""
        flow = self._setup.publish_flow(name, request, description, key, key_file)
        result: PublishedRecipe = drive_sync(flow, self._http)
        return result

    # --- audit and diagnose ----------------------------------------------------------------

    def audit(
        self, path: str | os.PathLike[str], request: RequestLike | None = None
    ) -> AuditReport:
        """The service's audit of a weights file (NPZ or safetensors), compared with
        `request`'s plan when given. `report.passed` is False on any error-level finding."""
        result: AuditReport = drive_sync(self._setup.audit_flow(path, request), self._http)
        return result

    def diagnose(
        self, request: RequestLike, alternatives: Any = None, *, batch: int | None = None
    ) -> DiagnosisReport:
        """How signal and gradients travel through the network at the start, for the request
        and each alternative ({label: init override} or [{"label", "init"}]). Estimates."""
        flow = self._setup.diagnose_flow(request, alternatives, batch)
        result: DiagnosisReport = drive_sync(flow, self._http)
        return result

    def diagnosis_chart(
        self,
        request: RequestLike,
        alternatives: Any = None,
        *,
        batch: int | None = None,
        kind: str = "svg",
    ) -> str:
        """The diagnosis chart: an SVG image (kind "svg") or an HTML page ("html")."""
        flow = self._setup.chart_flow(request, alternatives, batch, kind)
        result: str = drive_sync(flow, self._http)
        return result

    def save(
        self,
        request: WeightsSource,
        path: str | os.PathLike[str],
        format: str | None = None,
        *,
        tensor: str | None = None,
        rows: object = None,
        progress: ProgressHook | None = None,
        origin: str = "service",
        platform_tensors: str = "fetch",
    ) -> SavedWeights:
        """Write the verified response to `path` (format from `format` or the file suffix).

        The file appears only once complete and verified (written beside it, then renamed).
        `origin="local"` writes an npz or safetensors file of tensors made here from the plan
        (one in memory at a time): the same tensors and digests, its own container.
        """
        target = Path(path)
        fmt = format_for_path(target, format)
        spool = self._setup.spool_dir_for(target)
        if check_origin(origin) == "local":
            if tensor is not None:
                raise SpecInvalid(
                    [
                        Problem(
                            "tensor",
                            "not_allowed",
                            "save with origin='local' writes every tensor; use "
                            "tensor(..., origin='local') for one",
                        )
                    ]
                )
            local_request = self._request_of(request)
            plan = self.plan(local_request)
            manifest, size = write_local(
                plan,
                target,
                fmt,
                check_platform(platform_tensors),
                lambda name: self.tensor(local_request, name),
            )
            return SavedWeights(target, fmt, size, manifest, "local")
        if isinstance(request, str) and tensor is None:
            got = drive_sync(
                self._setup.recipe_weights_flow(parse_ref(request), fmt, progress, spool),
                self._http,
            )
            return self._setup.recipe_saved(got, target, fmt)
        request = self._request_of(request)
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
        request: WeightsSource,
        format: str = DEFAULT_FORMAT,
        *,
        origin: str = "service",
        platform_tensors: str = "fetch",
    ) -> WeightSet:
        if check_origin(origin) == "local":
            return await self._local(request, None, None, check_platform(platform_tensors), format)
        if isinstance(request, str):
            flow = self._setup.recipe_weights_flow(parse_ref(request), format)
            got = await drive_async(flow, self._http)
            return await asyncio.to_thread(self._setup.recipe_set, got)
        flow = self._setup.weights_flow(request, format, None, None)
        delivery = await drive_async(flow, self._http)
        return await asyncio.to_thread(self._setup.weight_set, delivery)

    async def tensor(
        self,
        request: WeightsSource,
        name: str,
        rows: object = None,
        format: str = DEFAULT_FORMAT,
        *,
        origin: str = "service",
        platform_tensors: str = "fetch",
    ) -> np.ndarray:
        request = await self._request_of(request)
        if check_origin(origin) == "local":
            made = await self._local(
                request, name, parse_rows(rows), check_platform(platform_tensors), format
            )
            return made[name]
        flow = self._setup.weights_flow(request, format, name, rows)
        delivery = await drive_async(flow, self._http)
        return await asyncio.to_thread(self._setup.one_tensor, delivery, name)

    async def _request_of(self, request: WeightsSource) -> RequestLike:
        if isinstance(request, str):
            return (await self.recipe(request)).request
        return request

    async def _local(
        self,
        request: WeightsSource,
        only: str | None,
        rows: tuple[int, int] | None,
        platform: PlatformChoice,
        fmt: str,
    ) -> WeightSet:
        request = await self._request_of(request)
        plan = await self.plan(request)
        fetched = {
            name: await self.tensor(request, name, rows, fmt)
            for name in platform_names(plan, only, platform)
        }
        made = await asyncio.to_thread(
            make_tensors,
            plan,
            only=only,
            rows=rows,
            platform_tensors=platform,
            fetch=lambda n, _r: fetched[n],
        )
        return self._setup.local_set(plan, made)

    async def recipes(self) -> list[RecipeSummary]:
        result: list[RecipeSummary] = await drive_async(self._setup.recipe_list_flow(), self._http)
        return result

    async def recipe_versions(self, name: str) -> list[RecipeSummary]:
        result: list[RecipeSummary] = await drive_async(
            self._setup.recipe_versions_flow(name), self._http
        )
        return result

    async def recipe(self, ref: str) -> StoredRecipe:
        result: StoredRecipe = await drive_async(self._setup.stored_recipe_flow(ref), self._http)
        return result

    async def publish(
        self,
        name: str,
        request: RequestLike,
        description: str = "",
        *,
        key: str | None = None,
        key_file: str | os.PathLike[str] | None = None,
    ) -> PublishedRecipe:
        flow = self._setup.publish_flow(name, request, description, key, key_file)
        result: PublishedRecipe = await drive_async(flow, self._http)
        return result

    async def audit(
        self, path: str | os.PathLike[str], request: RequestLike | None = None
    ) -> AuditReport:
        flow = await asyncio.to_thread(self._setup.audit_flow, path, request)
        result: AuditReport = await drive_async(flow, self._http)
        return result

    async def diagnose(
        self, request: RequestLike, alternatives: Any = None, *, batch: int | None = None
    ) -> DiagnosisReport:
        flow = self._setup.diagnose_flow(request, alternatives, batch)
        result: DiagnosisReport = await drive_async(flow, self._http)
        return result

    async def diagnosis_chart(
        self,
        request: RequestLike,
        alternatives: Any = None,
        *,
        batch: int | None = None,
        kind: str = "svg",
    ) -> str:
        flow = self._setup.chart_flow(request, alternatives, batch, kind)
        result: str = await drive_async(flow, self._http)
        return result

    async def save(
        self,
        request: WeightsSource,
        path: str | os.PathLike[str],
        format: str | None = None,
        *,
        tensor: str | None = None,
        rows: object = None,
        progress: ProgressHook | None = None,
        origin: str = "service",
        platform_tensors: str = "fetch",
    ) -> SavedWeights:
        target = Path(path)
        fmt = format_for_path(target, format)
        spool = self._setup.spool_dir_for(target)
        if check_origin(origin) == "local":
            if tensor is not None:
                raise SpecInvalid(
                    [
                        Problem(
                            "tensor",
                            "not_allowed",
                            "save with origin='local' writes every tensor; use "
                            "tensor(..., origin='local') for one",
                        )
                    ]
                )
            platform = check_platform(platform_tensors)
            local_request = await self._request_of(request)
            plan = await self.plan(local_request)
            fetched = {
                name: await self.tensor(local_request, name)
                for name in platform_names(plan, None, platform)
            }
            manifest, size = await asyncio.to_thread(
                write_local, plan, target, fmt, platform, lambda name: fetched[name]
            )
            return SavedWeights(target, fmt, size, manifest, "local")
        if isinstance(request, str) and tensor is None:
            flow = self._setup.recipe_weights_flow(parse_ref(request), fmt, progress, spool)
            got = await drive_async(flow, self._http)
            return await asyncio.to_thread(self._setup.recipe_saved, got, target, fmt)
        request = await self._request_of(request)
        flow = self._setup.weights_flow(request, fmt, tensor, rows, progress, spool)
        delivery = await drive_async(flow, self._http)
        return await asyncio.to_thread(self._setup.saved, delivery, target, fmt)

    async def aclose(self) -> None:
        await self._http.aclose()

    async def __aenter__(self) -> AsyncClient:
        return self

    async def __aexit__(self, *exc: object) -> None:
        await self.aclose()
