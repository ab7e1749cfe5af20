"""Publishing and reading recipe versions.

Versions are handed out by one atomic statement on the name's counter row (`recipe_heads`):
INSERT ... ON CONFLICT (name) DO UPDATE SET latest_version = latest_version + 1 RETURNING it.
PostgreSQL row-locks the counter until the publishing transaction ends, so concurrent
publishers of one name queue on it and each gets the next number; SQLite serialises writers
with BEGIN IMMEDIATE. The (name, version) primary key backs this up: no two rows can ever share
a version. Counter, version row and the key check commit together or not at all, so a crash
leaves either a complete version or nothing.
"""

from __future__ import annotations

import json
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import Connection, Engine, func, select
from sqlalchemy.dialects import postgresql, sqlite

from seedbed.core.plan import build_plan, plan_document
from seedbed.registry.engine import is_postgres, reading, writing
from seedbed.registry.keys import identify
from seedbed.registry.prepare import PreparedRecipe
from seedbed.registry.records import canonical_text, content_digest, now_utc, utc
from seedbed.registry.tables import recipe_heads, recipe_versions

MAX_PAGE = 1000


class RecipeNotFoundError(LookupError):
    """No such recipe name or version (the message says which)."""


@dataclass(frozen=True)
class VersionSummary:
    name: str
    version: int
    description: str
    publisher: str
    published_at: datetime
    algorithm: str


@dataclass(frozen=True)
class RecipeSummary:
    name: str
    latest_version: int
    first_published_at: datetime
    latest: VersionSummary


@dataclass(frozen=True)
class RecipeVersion:
    """One stored version, exactly as written."""

    summary: VersionSummary
    request_json: str
    plan_json: str
    fingerprints_json: str
    content_sha256: str | None

    @property
    def request(self) -> dict[str, Any]:
        value: dict[str, Any] = json.loads(self.request_json)
        return value

    @property
    def plan(self) -> dict[str, Any]:
        value: dict[str, Any] = json.loads(self.plan_json)
        return value

    @property
    def fingerprints(self) -> dict[str, str]:
        value: dict[str, str] = json.loads(self.fingerprints_json)
        return value


def _next_version(conn: Connection, name: str, published: datetime) -> int:
    # Version 1's publication time is the name's first publication time: one clock reading, so
    # first_published_at can never precede (or differ from) version 1's published_at.
    dialect: Any = postgresql if is_postgres(conn) else sqlite
    stmt = dialect.insert(recipe_heads).values(
        name=name, latest_version=1, first_published_at=published
    )
    stmt = stmt.on_conflict_do_update(
        index_elements=[recipe_heads.c.name],
        set_={"latest_version": recipe_heads.c.latest_version + 1},
    ).returning(recipe_heads.c.latest_version)
    return int(conn.execute(stmt).scalar_one())


class _SameAsNewest(Exception):  # noqa: N818 - control flow inside publish_unless_same
    def __init__(self, summary: VersionSummary) -> None:
        self.summary = summary


def publish(engine: Engine, prepared: PreparedRecipe, token: str) -> VersionSummary:
    """Store a new version of `prepared.name`, published with `token`'s key, even when its
    request equals the newest version's (POST /v1/recipes uses `publish_unless_same`).

    The key is checked again inside the writing transaction (and its row locked on PostgreSQL),
    so a key revoked a moment earlier cannot publish; raises keys.AuthenticationError then.
    """
    return _publish(engine, prepared, token, reuse=False)[0]


def publish_unless_same(
    engine: Engine, prepared: PreparedRecipe, token: str
) -> tuple[VersionSummary, bool]:
    """(version, created): a new version, or the newest one unchanged when it stores the same
    canonical request under the same algorithm (the description is not compared: a version
    never changes, and a second version with the same bytes would only blur which to pin).

    Race-free: the comparison happens after the name's counter row is taken (row-locked on
    PostgreSQL, BEGIN IMMEDIATE on SQLite), so of two identical concurrent publishes the second
    sees the first's version and the counter increment is rolled back with its transaction.
    """
    return _publish(engine, prepared, token, reuse=True)


def _newest_if_same(
    conn: Connection, prepared: PreparedRecipe, version: int
) -> VersionSummary | None:
    if version <= 1:
        return None
    row = conn.execute(
        select(*_SUMMARY_COLUMNS, recipe_versions.c.request_json).where(
            recipe_versions.c.name == prepared.name, recipe_versions.c.version == version - 1
        )
    ).first()
    if row is None or row.request_json != prepared.request_json:
        return None
    if row.algorithm != prepared.algorithm:
        return None
    return _summary(row)


def _publish(
    engine: Engine, prepared: PreparedRecipe, token: str, *, reuse: bool
) -> tuple[VersionSummary, bool]:
    try:
        return _publish_in_transaction(engine, prepared, token, reuse), True
    except _SameAsNewest as same:  # raised inside the transaction, so it was rolled back
        return same.summary, False


def _publish_in_transaction(
    engine: Engine, prepared: PreparedRecipe, token: str, reuse: bool
) -> VersionSummary:
    with writing(engine) as conn:
        publisher = identify(conn, token, lock=True)
        published = now_utc()
        version = _next_version(conn, prepared.name, published)
        if reuse:
            existing = _newest_if_same(conn, prepared, version)
            if existing is not None:
                raise _SameAsNewest(existing)
        digest = content_digest(
            name=prepared.name,
            version=version,
            description=prepared.description,
            algorithm=prepared.algorithm,
            publisher=publisher,
            request_json=prepared.request_json,
            plan_json=prepared.plan_json,
            fingerprints_json=prepared.fingerprints_json,
        )
        conn.execute(
            recipe_versions.insert().values(
                name=prepared.name,
                version=version,
                description=prepared.description,
                request_json=prepared.request_json,
                plan_json=prepared.plan_json,
                fingerprints_json=prepared.fingerprints_json,
                algorithm=prepared.algorithm,
                publisher=publisher,
                published_at=published,
                content_sha256=digest,
            )
        )
    return VersionSummary(
        prepared.name, version, prepared.description, publisher, published, prepared.algorithm
    )


_SUMMARY_COLUMNS = (
    recipe_versions.c.name,
    recipe_versions.c.version,
    recipe_versions.c.description,
    recipe_versions.c.publisher,
    recipe_versions.c.published_at,
    recipe_versions.c.algorithm,
)


def _summary(row: Any) -> VersionSummary:
    return VersionSummary(
        row.name,
        int(row.version),
        row.description,
        row.publisher,
        utc(row.published_at),
        row.algorithm,
    )


def list_recipes(engine: Engine, after: str | None = None, limit: int = 100) -> list[RecipeSummary]:
    """Names in order with their latest version; `after` continues from a previous page."""
    limit = max(1, min(limit, MAX_PAGE))
    query = (
        select(*_SUMMARY_COLUMNS, recipe_heads.c.first_published_at)
        .join(
            recipe_heads,
            (recipe_heads.c.name == recipe_versions.c.name)
            & (recipe_heads.c.latest_version == recipe_versions.c.version),
        )
        .order_by(recipe_versions.c.name)
        .limit(limit)
    )
    if after is not None:
        query = query.where(recipe_versions.c.name > after)
    with reading(engine) as conn:
        rows = conn.execute(query).all()
    return [
        RecipeSummary(r.name, int(r.version), utc(r.first_published_at), _summary(r)) for r in rows
    ]


def list_versions(engine: Engine, name: str) -> list[VersionSummary]:
    with reading(engine) as conn:
        rows = conn.execute(
            select(*_SUMMARY_COLUMNS)
            .where(recipe_versions.c.name == name)
            .order_by(recipe_versions.c.version)
        ).all()
    if not rows:
        raise RecipeNotFoundError(f"no recipe named {name!r}; GET /v1/recipes lists the names")
    return [_summary(r) for r in rows]


def _full(row: Any) -> RecipeVersion:
    return RecipeVersion(
        _summary(row), row.request_json, row.plan_json, row.fingerprints_json, row.content_sha256
    )


_FULL_COLUMNS = (
    *_SUMMARY_COLUMNS,
    recipe_versions.c.request_json,
    recipe_versions.c.plan_json,
    recipe_versions.c.fingerprints_json,
    recipe_versions.c.content_sha256,
)


def get_version(engine: Engine, name: str, version: int | None) -> RecipeVersion:
    """One stored version; `version=None` is the newest (what the `latest` alias resolves to)."""
    with reading(engine) as conn:
        if version is None:
            newest = conn.execute(
                select(func.max(recipe_versions.c.version)).where(recipe_versions.c.name == name)
            ).scalar()
            if newest is None:
                raise RecipeNotFoundError(
                    f"no recipe named {name!r}; GET /v1/recipes lists the names"
                )
            version = int(newest)
        row = conn.execute(
            select(*_FULL_COLUMNS).where(
                recipe_versions.c.name == name, recipe_versions.c.version == version
            )
        ).first()
        if row is None:
            latest = conn.execute(
                select(func.max(recipe_versions.c.version)).where(recipe_versions.c.name == name)
            ).scalar()
    if row is None:
        if latest is None:
            raise RecipeNotFoundError(f"no recipe named {name!r}; GET /v1/recipes lists the names")
        raise RecipeNotFoundError(
            f"recipe {name!r} has no version {version}; its versions are 1 to {latest}"
        )
    return _full(row)


def every_version(engine: Engine) -> Iterator[RecipeVersion]:
    """All stored versions, in (name, version) order: for audits and integrity checks."""
    with reading(engine) as conn:
        for row in conn.execute(
            select(*_FULL_COLUMNS).order_by(recipe_versions.c.name, recipe_versions.c.version)
        ):
            yield _full(row)


def integrity_problems(record: RecipeVersion, *, replan: bool = True) -> list[str]:
    """What is wrong with a stored version (empty: nothing). Checks the digest over the stored
    texts, that the fingerprints cover exactly the plan's tensors, and with `replan` that the
    stored request still plans to the stored plan (only meaningful under the same algorithm)."""
    s = record.summary
    where = f"{s.name} v{s.version}"
    problems: list[str] = []
    expected = content_digest(
        name=s.name,
        version=s.version,
        description=s.description,
        algorithm=s.algorithm,
        publisher=s.publisher,
        request_json=record.request_json,
        plan_json=record.plan_json,
        fingerprints_json=record.fingerprints_json,
    )
    if record.content_sha256 != expected:
        problems.append(
            f"{where}: content digest {record.content_sha256} does not match the "
            f"stored texts ({expected})"
        )
    try:
        plan_doc, prints = record.plan, record.fingerprints
    except ValueError as exc:
        return [*problems, f"{where}: a stored document is not JSON: {exc}"]
    planned = [t.get("tensor") for t in plan_doc.get("tensors", [])]
    if not planned:
        problems.append(f"{where}: the stored plan has no tensors")
    if sorted(planned) != sorted(prints):
        problems.append(
            f"{where}: fingerprints cover {sorted(prints)} but the plan has {sorted(planned)}"
        )
    bad_hex = [
        k
        for k, v in prints.items()
        if not (isinstance(v, str) and len(v) == 64 and v.strip("0123456789abcdef") == "")
    ]
    if bad_hex:
        problems.append(f"{where}: fingerprints of {bad_hex} are not SHA-256 hex digests")
    if replan:
        plan = build_plan(record.request)
        same_algorithm = plan.algorithm == s.algorithm
        if same_algorithm and canonical_text(plan_document(plan)) != record.plan_json:
            problems.append(f"{where}: the stored request no longer plans to the stored plan")
    return problems
