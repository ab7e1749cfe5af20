"""Numbered schema steps and the runner that brings a database up to date.

Each step runs once, in order, inside the same transaction as the row that records it in
`seedbed_schema`: a step either completes and is recorded, or leaves no trace. PostgreSQL and
SQLite both roll back DDL with the transaction.

Several replicas may start at once against one PostgreSQL database; a transaction-scoped
advisory lock lets exactly one of them migrate while the others wait and then find nothing to
do. On SQLite the BEGIN IMMEDIATE of a writing transaction does the same.

Steps are written against their own frozen table definitions, never against tables.py, because
tables.py describes the newest schema and a step must keep meaning what it meant when a
database at an older version meets it.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

from sqlalchemy import (
    Column,
    Connection,
    DateTime,
    Engine,
    ForeignKey,
    Integer,
    MetaData,
    PrimaryKeyConstraint,
    String,
    Table,
    Text,
    func,
    inspect,
    select,
    text,
)

from seedbed.registry.engine import is_postgres, writing
from seedbed.registry.records import content_digest, now_utc
from seedbed.registry.tables import schema_steps

# Any constant works; it only has to be the same in every replica (and unlikely elsewhere).
_ADVISORY_LOCK_KEY = 0x5EEDBED


class SchemaTooNewError(RuntimeError):
    """The database was upgraded by a newer seedbed than this one."""


@dataclass(frozen=True)
class Step:
    version: int
    description: str
    apply: Callable[[Connection], None]


def _step1_initial(conn: Connection) -> None:
    md = MetaData()
    Table(
        "publish_keys",
        md,
        Column("name", String(64), primary_key=True),
        Column("lookup_id", String(32), nullable=False, unique=True),
        Column("token_sha256", String(64), nullable=False),
        Column("created_at", DateTime(timezone=True), nullable=False),
        Column("revoked_at", DateTime(timezone=True), nullable=True),
    )
    Table(
        "recipe_versions",
        md,
        Column("name", String(100), nullable=False),
        Column("version", Integer, nullable=False, autoincrement=False),
        Column("description", Text, nullable=False),
        Column("request_json", Text, nullable=False),
        Column("plan_json", Text, nullable=False),
        Column("fingerprints_json", Text, nullable=False),
        Column("algorithm", String(100), nullable=False),
        Column("publisher", String(64), ForeignKey("publish_keys.name"), nullable=False),
        Column("published_at", DateTime(timezone=True), nullable=False),
        PrimaryKeyConstraint("name", "version"),
    )
    md.create_all(conn)


def _step2_heads_and_digests(conn: Connection) -> None:
    """Version 1 numbered versions with MAX(version)+1 and relied on the primary key to refuse a
    duplicate; a per-name counter row hands them out in one atomic statement instead. Every
    existing row also gets its integrity digest."""
    md = MetaData()
    heads = Table(
        "recipe_heads",
        md,
        Column("name", String(100), primary_key=True),
        Column("latest_version", Integer, nullable=False),
        Column("first_published_at", DateTime(timezone=True), nullable=False),
    )
    md.create_all(conn)
    conn.execute(text("ALTER TABLE recipe_versions ADD COLUMN content_sha256 VARCHAR(64)"))
    versions = Table("recipe_versions", MetaData(), autoload_with=conn)
    conn.execute(
        heads.insert().from_select(
            ["name", "latest_version", "first_published_at"],
            select(
                versions.c.name, func.max(versions.c.version), func.min(versions.c.published_at)
            ).group_by(versions.c.name),
        )
    )
    rows = (
        conn.execute(
            select(
                versions.c.name,
                versions.c.version,
                versions.c.description,
                versions.c.algorithm,
                versions.c.publisher,
                versions.c.request_json,
                versions.c.plan_json,
                versions.c.fingerprints_json,
            )
        )
        .mappings()
        .all()
    )
    for row in rows:
        digest = content_digest(**row)
        conn.execute(
            versions.update()
            .where(versions.c.name == row["name"], versions.c.version == row["version"])
            .values(content_sha256=digest)
        )


STEPS: tuple[Step, ...] = (
    Step(1, "publishing keys and recipe versions", _step1_initial),
    Step(
        2, "per-name version counter; integrity digest of every version", _step2_heads_and_digests
    ),
)
LATEST = STEPS[-1].version


def _current(conn: Connection) -> int:
    if not inspect(conn).has_table(schema_steps.name):
        return 0
    value = conn.execute(select(func.max(schema_steps.c.version))).scalar()
    return int(value or 0)


def schema_version(engine: Engine) -> int:
    """The version the database is at (0: empty)."""
    with engine.connect() as conn:
        return _current(conn)


def upgrade(engine: Engine, target: int | None = None) -> list[int]:
    """Apply the missing steps up to `target` (default: all); returns the versions applied."""
    goal = LATEST if target is None else target
    if not 0 <= goal <= LATEST:
        raise ValueError(f"target schema version {goal} is unknown; this seedbed knows 0..{LATEST}")
    applied: list[int] = []
    with writing(engine) as conn:
        if is_postgres(conn):
            conn.execute(select(func.pg_advisory_xact_lock(_ADVISORY_LOCK_KEY)))
        schema_steps.create(conn, checkfirst=True)
        current = _current(conn)
        if current > LATEST:
            raise SchemaTooNewError(
                f"the database is at schema version {current}, but this seedbed knows versions "
                f"up to {LATEST}; run a seedbed at least as new as the one that upgraded it"
            )
        for step in STEPS[current:goal]:
            step.apply(conn)
            conn.execute(
                schema_steps.insert().values(
                    version=step.version, description=step.description, applied_at=now_utc()
                )
            )
            applied.append(step.version)
    return applied
