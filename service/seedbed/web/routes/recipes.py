"""Team recipes: publish a request under a name, fetch any version and its weights by URL.

    POST /v1/recipes                              publish (Authorization: Bearer <key>) -> 201
                                                  (200: same request as the newest version)
    GET  /v1/recipes                              names with their latest version
    GET  /v1/recipes/{name}                       the versions of one name
    GET  /v1/recipes/{name}/{version}             stored request, plan, fingerprints, publisher
    GET  /v1/recipes/{name}/{version}/weights     the weights, cacheable for a year

`latest` goes wherever a version number does; it is resolved on each request and answered
with a weak ETag and a short freshness lifetime, naming the concrete version it resolved to.

Every GET also answers HEAD. A stored version never changes, so its documents carry strong
ETags and `immutable` caching; a version's weights are byte-identical to POST /v1/weights of its
request (same encoders, same ETag), and are checked against the fingerprints stored at publish
time while they stream: a replica that produced different bytes would cut the body short rather
than pass off other values under the recipe's name.

The registry is taken from `app.state.registry` when the app installed one at start-up; else
it is opened from the SEEDBED_* variables on first use. Every request reads the database, so a
revoked key is refused by every replica from the next request on.
"""

from __future__ import annotations

import json
import threading
from collections.abc import Callable
from typing import Any, Literal, TypeVar

from fastapi import APIRouter, FastAPI, Path, Query, Request, Response
from sqlalchemy.exc import SQLAlchemyError
from starlette.concurrency import run_in_threadpool

from seedbed.core.plan import build_plan
from seedbed.core.plan_types import Plan
from seedbed.registry import LazyRegistry, Registry, RegistryConfigError
from seedbed.registry.keys import AuthenticationError, authenticate, bearer_token
from seedbed.registry.migrations import SchemaTooNewError
from seedbed.registry.prepare import (
    MAX_DESCRIPTION_CHARS,
    NAME_PATTERN_TEXT,
    PreparedRecipe,
    name_problem,
    prepare_recipe,
)
from seedbed.registry.records import iso
from seedbed.registry.store import (
    MAX_PAGE,
    RecipeNotFoundError,
    RecipeVersion,
    VersionSummary,
    get_version,
    list_recipes,
    list_versions,
    publish_unless_same,
)
from seedbed.web.dependencies import settings_of
from seedbed.web.errors import ApiError
from seedbed.web.etag import body_etag, none_match
from seedbed.web.json_body import read_json_body
from seedbed.web.openapi_doc import REQUEST_SCHEMA_NAME, error_responses
from seedbed.web.response_models import (
    PublishedRecipe,
    RecipePage,
    RecipeVersionList,
    StoredRecipe,
    WeightsDocument,
)
from seedbed.web.routes.weights import DEFAULT_FORMAT
from seedbed.web.weights_response import WeightsOptions, weights_response

router = APIRouter(tags=["recipes"])

WeightsFormat = Literal["json", "npz", "safetensors"]
T = TypeVar("T")

IMMUTABLE = "max-age=31536000, immutable"
# Lists grow with every publish: a cache may keep them but must ask again each time.
MUTABLE = "no-cache"

_PUBLISH_BODY = {
    "requestBody": {
        "required": True,
        "description": "The name to publish under, the network request, and a description.",
        "content": {
            "application/json": {
                "schema": {
                    "type": "object",
                    "required": ["name", "request"],
                    "additionalProperties": False,
                    "properties": {
                        "name": {"type": "string", "pattern": f"^{NAME_PATTERN_TEXT}$"},
                        "description": {
                            "type": "string",
                            "maxLength": MAX_DESCRIPTION_CHARS,
                            "default": "",
                        },
                        "request": {"$ref": f"#/components/schemas/{REQUEST_SCHEMA_NAME}"},
                    },
                },
                "examples": {
                    "orchard-counter": {
                        "summary": "Pin the init of a small fruit-counting network",
                        "value": {
                            "name": "orchard-counter",
                            "description": "baseline for the spring survey runs",
                            "request": {
                                "seed": 424242,
                                "dtype": "float32",
                                "layers": [
                                    {
                                        "name": "trunk",
                                        "kind": "dense",
                                        "n_in": 64,
                                        "n_out": 32,
                                        "activation": "relu",
                                    },
                                    {
                                        "name": "count",
                                        "kind": "dense",
                                        "n_in": 32,
                                        "n_out": 1,
                                        "role": "output",
                                    },
                                ],
                            },
                        },
                    }
                },
            }
        },
    }
}
ResponsesDoc = dict[int | str, dict[str, Any]]
_AUTH_DOC: ResponsesDoc = error_responses(401)
_UNAVAILABLE_DOC: ResponsesDoc = error_responses(503)
_WEIGHTS_MEDIA = {
    "application/json": {"schema": {"$ref": "#/components/schemas/WeightsDocument"}},
    "application/zip": {"schema": {"type": "string", "format": "binary"}},
    "application/octet-stream": {"schema": {"type": "string", "format": "binary"}},
}


# --- plumbing ---------------------------------------------------------------------------------


def _unavailable(message: str) -> ApiError:
    return ApiError.one(503, "(registry)", "registry_unavailable", message, {"Retry-After": "5"})


_HOLDER_LOCK = threading.Lock()


def _on_demand(state: Any) -> LazyRegistry:
    with _HOLDER_LOCK:
        lazy: LazyRegistry | None = getattr(state, "registry_on_demand", None)
        if lazy is None:
            lazy = state.registry_on_demand = LazyRegistry()
        return lazy


async def registry_problem(app: FastAPI) -> str | None:
    """For /readyz: None when the registry's database answers, else the reason. Never raises;
    opens the registry (creating or upgrading its schema) if no request has yet."""
    installed = getattr(app.state, "registry", None)
    if isinstance(installed, Registry):
        return await run_in_threadpool(installed.ping)
    return await run_in_threadpool(_on_demand(app.state).problem)


def close_registry(app: FastAPI) -> None:
    """For the app's shutdown: release the database connections this app opened."""
    lazy: LazyRegistry | None = getattr(app.state, "registry_on_demand", None)
    if lazy is not None:
        lazy.close()


async def _registry(request: Request) -> Registry:
    state = request.app.state
    installed = getattr(state, "registry", None)
    if isinstance(installed, Registry):
        return installed
    lazy = _on_demand(state)
    try:
        # Opening may connect, create the file and migrate: never on the event loop.
        registry: Registry = await run_in_threadpool(lazy.get)
    except (RegistryConfigError, SchemaTooNewError) as exc:
        raise _unavailable(f"the registry is not configured correctly: {exc}") from None
    except SQLAlchemyError as exc:
        raise _unavailable(f"the registry database cannot be opened: {_db_reason(exc)}") from None
    except OSError as exc:
        raise _unavailable(f"the registry's data directory cannot be used: {exc}") from None
    return registry


def _db_reason(exc: SQLAlchemyError) -> str:
    inner = getattr(exc, "orig", None) or exc
    return f"{type(inner).__name__}: {str(inner).strip().splitlines()[0][:200]}"


async def _db(call: Callable[..., T], *args: Any) -> T:
    """Run a blocking registry call in the threadpool; database trouble becomes a 503."""
    try:
        return await run_in_threadpool(call, *args)
    except SQLAlchemyError as exc:
        raise _unavailable(f"the registry database did not answer: {_db_reason(exc)}") from None


def _refused(exc: AuthenticationError) -> ApiError:
    return ApiError.one(
        401,
        "authorization",
        "not_authenticated",
        str(exc),
        {"WWW-Authenticate": 'Bearer realm="seedbed"'},
    )


async def _check_reader(request: Request, registry: Registry) -> None:
    if not registry.config.read_requires_key:
        return
    try:
        token = bearer_token(request.headers.get("authorization"))
        await _db(authenticate, registry.engine, token)
    except AuthenticationError as exc:
        raise _refused(exc) from None


def _cache_control(registry: Registry, base: str) -> str:
    # With reads behind keys, a shared cache must not hand a stored copy to someone without one.
    if base == MUTABLE:
        return base
    return ("private, " if registry.config.read_requires_key else "public, ") + base


def _checked_name(name: str) -> str:
    problem = name_problem(name)
    if problem is not None:
        raise ApiError.one(422, "name", problem.code, problem.message)
    return name


def _json_bytes(doc: Any) -> bytes:
    return json.dumps(
        doc, sort_keys=True, separators=(",", ":"), ensure_ascii=False, allow_nan=False
    ).encode("utf-8")


def _json_response(
    request: Request, body: bytes, headers: dict[str, str], status: int = 200
) -> Response:
    if request.method == "HEAD":
        return Response(
            status_code=status,
            media_type="application/json",
            headers={**headers, "Content-Length": str(len(body))},
        )
    return Response(body, status_code=status, media_type="application/json", headers=headers)


def _links(name: str, version: int) -> dict[str, str]:
    base = f"/v1/recipes/{name}/{version}"
    return {"self": base, "weights": base + "/weights"}


def _summary_doc(s: VersionSummary) -> dict[str, Any]:
    return {
        "name": s.name,
        "version": s.version,
        "description": s.description,
        "publisher": s.publisher,
        "published_at": iso(s.published_at),
        "algorithm": s.algorithm,
        "links": _links(s.name, s.version),
    }


# --- publishing -------------------------------------------------------------------------------


@router.post(
    "/v1/recipes",
    operation_id="publishRecipe",
    summary="Publish a new version of a named recipe",
    description=(
        "Needs `Authorization: Bearer <key>`. Validates the request exactly as POST /v1/weights "
        "does, stores it in canonical form with its plan and each tensor's SHA-256, and answers "
        "201 with the version the server assigned (1, 2, 3 ... per name; never reused, never "
        "changed). Publishing a request identical (in canonical form, under the same "
        "algorithm) to the newest version's answers 200 with that version instead of minting "
        "a new one."
    ),
    status_code=201,
    responses={
        201: {
            "model": PublishedRecipe,
            "description": "Published; `Location` is the new version's URL.",
        },
        200: {
            "model": PublishedRecipe,
            "description": "The newest version already stores this request: that version, "
            "unchanged; `Location` is its URL.",
        },
        **_AUTH_DOC,
        **error_responses(400, 413, 415, 422),
        **_UNAVAILABLE_DOC,
    },
    openapi_extra=_PUBLISH_BODY,
)
async def publish_recipe(request: Request) -> Response:
    settings = settings_of(request)
    registry = await _registry(request)
    try:
        token = bearer_token(request.headers.get("authorization"))
        # Checked before the body is even read: strangers cost us no validation or hashing.
        await _db(authenticate, registry.engine, token)
    except AuthenticationError as exc:
        raise _refused(exc) from None
    body = await read_json_body(request, settings.max_body_bytes)
    prepared: PreparedRecipe = await run_in_threadpool(
        prepare_recipe, body, settings.limits, settings.threads_per_request()
    )
    try:
        summary, created = await _db(publish_unless_same, registry.engine, prepared, token)
    except AuthenticationError as exc:  # revoked while we were hashing
        raise _refused(exc) from None
    doc = {**_summary_doc(summary), "fingerprints": prepared.fingerprints}
    location = _links(summary.name, summary.version)["self"]
    return Response(
        _json_bytes(doc),
        status_code=201 if created else 200,
        media_type="application/json",
        headers={"Location": location, "Cache-Control": "no-store"},
    )


# --- reading ----------------------------------------------------------------------------------

# Checked by hand (_checked_name) for an error that states the rule; the schema shows it too.
_NAME = Path(
    description=f"The recipe's name: {NAME_PATTERN_TEXT}.",
    json_schema_extra={"pattern": f"^{NAME_PATTERN_TEXT}$"},
)


@router.get(
    "/v1/recipes",
    operation_id="listRecipes",
    summary="Recipe names with their latest version",
    description="In name order, `limit` at a time; pass the previous page's `next_after` as "
    "`after` for the next page (null on the last page).",
    responses={
        200: {"model": RecipePage, "description": "One page of names."},
        **_AUTH_DOC,
        **_UNAVAILABLE_DOC,
        **error_responses(422),
    },
)
@router.head(
    "/v1/recipes",
    operation_id="listRecipesHead",
    summary="List headers only.",
    responses=error_responses(422),
)
async def list_recipe_names(
    request: Request,
    after: str | None = Query(None, description="Continue after this name.", max_length=100),
    limit: int = Query(100, ge=1, le=MAX_PAGE, description="Names per page."),
) -> Response:
    registry = await _registry(request)
    await _check_reader(request, registry)
    rows = await _db(list_recipes, registry.engine, after, limit)
    doc = {
        "recipes": [
            {
                **_summary_doc(r.latest),
                "latest_version": r.latest_version,
                "first_published_at": iso(r.first_published_at),
            }
            for r in rows
        ],
        "next_after": rows[-1].name if len(rows) == limit else None,
    }
    return _json_response(request, _json_bytes(doc), {"Cache-Control": MUTABLE})


@router.get(
    "/v1/recipes/{name}",
    operation_id="listRecipeVersions",
    summary="The versions of one recipe",
    responses={
        200: {"model": RecipeVersionList, "description": "Every version, oldest first."},
        **_AUTH_DOC,
        **error_responses(404, s404="No recipe has this name."),
        **_UNAVAILABLE_DOC,
        **error_responses(422),
    },
)
@router.head(
    "/v1/recipes/{name}",
    operation_id="listRecipeVersionsHead",
    summary="Version list headers only.",
    responses=error_responses(422),
)
async def recipe_versions(request: Request, name: str = _NAME) -> Response:
    registry = await _registry(request)
    _checked_name(name)
    await _check_reader(request, registry)
    try:
        versions = await _db(list_versions, registry.engine, name)
    except RecipeNotFoundError as exc:
        raise ApiError.one(404, "name", "recipe_not_found", str(exc)) from None
    doc = {"name": name, "versions": [_summary_doc(v) for v in versions]}
    return _json_response(request, _json_bytes(doc), {"Cache-Control": MUTABLE})


async def _stored(
    request: Request, registry: Registry, name: str, version: int | None
) -> RecipeVersion:
    _checked_name(name)
    await _check_reader(request, registry)
    try:
        return await _db(get_version, registry.engine, name, version)
    except RecipeNotFoundError as exc:
        field = "version" if "has no version" in str(exc) else "name"
        raise ApiError.one(404, field, "recipe_not_found", str(exc)) from None


LATEST = "latest"
# `latest` moves with every publish: caches may keep it briefly, then must ask again.
LATEST_MAX_AGE = "max-age=30"
_MAX_VERSION = 2**31 - 1
_VERSION_RULE = f"a version number 1..{_MAX_VERSION}, or {LATEST!r} for the newest version"
# Checked by hand (_version_of) for an error that states the rule; the schema shows it too.
_VERSION = Path(
    description=f"The version: {_VERSION_RULE}.",
    json_schema_extra={"pattern": "^(latest|[1-9][0-9]{0,9})$"},
)


def _version_of(text: str) -> int | None:
    """The version a path names: a number, or None for `latest`."""
    if text == LATEST:
        return None
    if text.isascii() and text.isdigit() and not text.startswith("0") and len(text) <= 10:
        number = int(text)
        if number <= _MAX_VERSION:
            return number
    raise ApiError.one(
        422, "version", "invalid_value", f"got {text[:40]!r}; allowed: {_VERSION_RULE}"
    )


def _resolved_headers(
    registry: Registry, record: RecipeVersion, asked: int | None, etag: str | None, link: str
) -> dict[str, str]:
    """Caching headers for a version named by number (immutable, strong tag) or by `latest`
    (short, weak tag), and where the concrete version lives. Without `etag` the caller sets
    the ETag (the weights response computes its own)."""
    s = record.summary
    headers = {"X-Seedbed-Recipe": f"{s.name}/{s.version}"}
    if asked is None:
        headers["Cache-Control"] = _cache_control(registry, LATEST_MAX_AGE)
        headers["Content-Location"] = link
    else:
        headers["Cache-Control"] = _cache_control(registry, IMMUTABLE)
    if etag is not None:
        headers["ETag"] = etag if asked is not None or etag.startswith("W/") else "W/" + etag
    return headers


@router.get(
    "/v1/recipes/{name}/{version}",
    operation_id="describeRecipeVersion",
    summary="One stored version: request, plan, fingerprints, publisher and time",
    description="A numbered version never changes once published: strong ETag, cacheable for "
    "a year. `latest` names the newest version: the body is that version's (its `version` "
    "field says which), with a weak ETag, `Cache-Control: max-age=30`, `Content-Location` and "
    "`X-Seedbed-Recipe` naming the concrete version.",
    responses={
        200: {"model": StoredRecipe, "description": "The stored version."},
        304: {"description": "Unchanged."},
        **_AUTH_DOC,
        **error_responses(404, s404="No such name or version."),
        **_UNAVAILABLE_DOC,
        **error_responses(422),
    },
)
@router.head(
    "/v1/recipes/{name}/{version}",
    operation_id="describeRecipeVersionHead",
    summary="Stored version headers only.",
    responses=error_responses(422),
)
async def recipe_version(request: Request, name: str = _NAME, version: str = _VERSION) -> Response:
    registry = await _registry(request)
    asked = _version_of(version)
    record = await _stored(request, registry, name, asked)
    doc = {
        **_summary_doc(record.summary),
        "request": record.request,
        "plan": record.plan,
        "fingerprints": record.fingerprints,
        "content_sha256": record.content_sha256,
    }
    body = _json_bytes(doc)
    headers = _resolved_headers(
        registry, record, asked, body_etag(body), _links(name, record.summary.version)["self"]
    )
    if none_match(request.headers.get("if-none-match"), headers["ETag"]):
        return Response(status_code=304, headers=headers)
    return _json_response(request, body, headers)


def _replanned(record: RecipeVersion, settings_limits: Any) -> Plan:
    plan = build_plan(record.request, settings_limits)
    s = record.summary
    if plan.algorithm != s.algorithm:
        raise ApiError.one(
            409,
            "version",
            "algorithm_changed",
            f"{s.name} v{s.version} was published under the generator {s.algorithm!r}; this "
            f"server runs {plan.algorithm!r}, whose bytes differ, so it cannot serve this "
            "version's weights; ask a server that runs the recipe's algorithm",
        )
    missing = sorted({t.tensor for t in plan.tensors} ^ set(record.fingerprints))
    if missing:
        raise ApiError.one(
            500,
            "version",
            "recipe_inconsistent",
            f"{s.name} v{s.version}: the stored fingerprints do not match the stored request's "
            f"tensors ({', '.join(missing[:5])}); the stored version is damaged",
        )
    return plan


@router.get(
    "/v1/recipes/{name}/{version}/weights",
    operation_id="fetchRecipeWeights",
    summary="The weights of one stored version",
    description=(
        "Byte-identical to POST /v1/weights of the stored request, with the same ETag. "
        "`Cache-Control: public, max-age=31536000, immutable` (private when reads need a key). "
        "If-None-Match with the ETag answers 304 without generating anything. Each tensor is "
        "checked against the fingerprint stored at publish time while it streams; a mismatch "
        "ends the body early, so a short body means do not use it. `latest` as the version "
        "serves the newest version's weights with a weak ETag, `Cache-Control: max-age=30` "
        "(not immutable), and `X-Seedbed-Recipe` / `Content-Location` naming the version used."
    ),
    response_class=Response,
    responses={
        200: {"model": WeightsDocument, "description": "The weights.", "content": _WEIGHTS_MEDIA},
        304: {"description": "Unchanged: the caller's ETag matches."},
        **_AUTH_DOC,
        **error_responses(404, s404="No such name or version."),
        **error_responses(409),
        **error_responses(413, 422),
        **_UNAVAILABLE_DOC,
    },
)
@router.head(
    "/v1/recipes/{name}/{version}/weights",
    operation_id="fetchRecipeWeightsHead",
    summary="Weights headers only.",
    response_class=Response,
    responses=error_responses(422),
)
async def recipe_weights(
    request: Request,
    name: str = _NAME,
    version: str = _VERSION,
    format: WeightsFormat = Query(  # noqa: B008 - FastAPI's parameter declaration style
        DEFAULT_FORMAT,
        description="Container: npz (default), safetensors or json (as for POST /v1/weights).",
    ),
) -> Response:
    settings = settings_of(request)
    registry = await _registry(request)
    asked = _version_of(version)
    record = await _stored(request, registry, name, asked)
    concrete = record.summary.version
    plan = await run_in_threadpool(_replanned, record, settings.limits)
    link = f"{_links(name, concrete)['weights']}?format={format}"
    headers = _resolved_headers(registry, record, asked, None, link)
    options = WeightsOptions(
        format,
        digests=record.fingerprints,
        headers=headers,
        filename=f"{name}-v{concrete}",
        weak=asked is None,
    )
    return await weights_response(request, plan, options)
