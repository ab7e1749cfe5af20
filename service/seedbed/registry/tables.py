"""The registry's tables at the newest schema version (what queries are written against).

Migrations (seedbed.registry.migrations) create and upgrade these; a test reflects an upgraded
database and checks it has exactly these columns, so the two cannot drift apart.

JSON documents are stored as text in canonical form (sorted keys, no spaces) rather than in a
JSON column type: PostgreSQL's jsonb would reorder keys and drop duplicate whitespace, and the
integrity digest is over the exact text.
"""

from __future__ import annotations

from sqlalchemy import (
    Column,
    DateTime,
    ForeignKey,
    Integer,
    MetaData,
    PrimaryKeyConstraint,
    String,
    Table,
    Text,
)

NAME_LENGTH = 100
KEY_NAME_LENGTH = 64

metadata = MetaData()

schema_steps = Table(
    "seedbed_schema",
    metadata,
    Column("version", Integer, primary_key=True, autoincrement=False),
    Column("description", Text, nullable=False),
    Column("applied_at", DateTime(timezone=True), nullable=False),
)

publish_keys = Table(
    "publish_keys",
    metadata,
    Column("name", String(KEY_NAME_LENGTH), primary_key=True),
    # Public part of the token: finds the row without comparing secrets in an index lookup.
    Column("lookup_id", String(32), nullable=False, unique=True),
    Column("token_sha256", String(64), nullable=False),
    Column("created_at", DateTime(timezone=True), nullable=False),
    Column("revoked_at", DateTime(timezone=True), nullable=True),
)

recipe_versions = Table(
    "recipe_versions",
    metadata,
    Column("name", String(NAME_LENGTH), nullable=False),
    Column("version", Integer, nullable=False, autoincrement=False),
    Column("description", Text, nullable=False),
    Column("request_json", Text, nullable=False),
    Column("plan_json", Text, nullable=False),
    Column("fingerprints_json", Text, nullable=False),
    Column("algorithm", String(100), nullable=False),
    Column("publisher", String(KEY_NAME_LENGTH), ForeignKey("publish_keys.name"), nullable=False),
    Column("published_at", DateTime(timezone=True), nullable=False),
    # Added by schema step 2; every row has one after the upgrade's backfill.
    Column("content_sha256", String(64), nullable=True),
    PrimaryKeyConstraint("name", "version"),
)

# Added by schema step 2: the per-name counter that hands out versions atomically.
recipe_heads = Table(
    "recipe_heads",
    metadata,
    Column("name", String(NAME_LENGTH), primary_key=True),
    Column("latest_version", Integer, nullable=False),
    Column("first_published_at", DateTime(timezone=True), nullable=False),
)
