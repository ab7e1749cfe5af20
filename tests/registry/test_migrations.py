"""Schema upgrades of an existing database, on SQLite and PostgreSQL."""

from __future__ import annotations

import threading
from datetime import UTC, datetime

import pytest
from sqlalchemy import Column, Integer, MetaData, Table, func, inspect, select, text

from seedbed.registry import RegistryConfig, config_from_env, migrations, open_registry
from seedbed.registry.engine import open_engine
from seedbed.registry.keys import token_hash
from seedbed.registry.prepare import prepare_recipe
from seedbed.registry.store import every_version, get_version, integrity_problems, publish
from seedbed.registry.tables import metadata, recipe_heads, schema_steps

# Invented scenario: a beehive-sound classifier a team versioned under schema 1.
HIVE = {
    "seed": 5150,
    "layers": [
        {"name": "hum", "kind": "dense", "n_in": 16, "n_out": 8, "activation": "tanh"},
        {"name": "verdict", "kind": "dense", "n_in": 8, "n_out": 3, "role": "output"},
    ],
}
TOKEN = "sbk1_0123456789abcdef_" + "A" * 43


@pytest.fixture
def empty_config(empty_env: dict[str, str]) -> RegistryConfig:
    return config_from_env(empty_env)


def _insert_v1_rows(config: RegistryConfig) -> None:
    """Rows as schema-1 seedbed wrote them: no counter table, no digest column."""
    engine = open_engine(config)
    try:
        assert migrations.upgrade(engine, target=1) == [1]
        assert migrations.schema_version(engine) == 1
        assert not inspect(engine).has_table("recipe_heads")
        when = datetime(2026, 3, 1, 12, 0, tzinfo=UTC)
        with engine.begin() as conn:
            conn.execute(
                text(
                    "INSERT INTO publish_keys (name, lookup_id, token_sha256, created_at) "
                    "VALUES ('hive-team', '0123456789abcdef', :h, :t)"
                ),
                {"h": token_hash(TOKEN), "t": when},
            )
            for name, count in (("hive-sounds", 3), ("queen-piping", 1)):
                for version in range(1, count + 1):
                    body = {
                        "name": name,
                        "description": f"take {version}",
                        "request": {**HIVE, "seed": version},
                    }
                    p = prepare_recipe(body)
                    conn.execute(
                        text(
                            "INSERT INTO recipe_versions (name, version, description, request_json,"
                            " plan_json, fingerprints_json, algorithm, publisher, published_at) "
                            "VALUES (:n, :v, :d, :r, :p, :f, :a, 'hive-team', :t)"
                        ),
                        {
                            "n": name,
                            "v": version,
                            "d": p.description,
                            "r": p.request_json,
                            "p": p.plan_json,
                            "f": p.fingerprints_json,
                            "a": p.algorithm,
                            "t": when,
                        },
                    )
    finally:
        engine.dispose()


def test_upgrade_from_version_1_keeps_and_completes_the_data(
    empty_config: RegistryConfig,
) -> None:
    _insert_v1_rows(empty_config)
    registry = open_registry(empty_config)  # upgrades on open
    try:
        assert migrations.schema_version(registry.engine) == migrations.LATEST == 2
        with registry.engine.connect() as conn:
            heads = dict(
                conn.execute(select(recipe_heads.c.name, recipe_heads.c.latest_version)).all()
            )
        assert heads == {"hive-sounds": 3, "queen-piping": 1}
        stored = list(every_version(registry.engine))
        assert [(r.summary.name, r.summary.version) for r in stored] == [
            ("hive-sounds", 1),
            ("hive-sounds", 2),
            ("hive-sounds", 3),
            ("queen-piping", 1),
        ]
        for record in stored:  # the backfilled digest matches the untouched texts
            assert record.content_sha256 is not None
            assert integrity_problems(record) == []
        # Publishing after the upgrade continues the old numbering through the new counter.
        p = prepare_recipe({"name": "hive-sounds", "request": HIVE})
        assert publish(registry.engine, p, TOKEN).version == 4
        assert get_version(registry.engine, "hive-sounds", 2).summary.description == "take 2"
        assert migrations.upgrade(registry.engine) == []  # nothing left to do
    finally:
        registry.close()


def test_upgraded_schema_matches_the_table_definitions(empty_config: RegistryConfig) -> None:
    registry = open_registry(empty_config)
    try:
        found = inspect(registry.engine)
        for table in metadata.sorted_tables:
            columns = {c["name"]: c["nullable"] for c in found.get_columns(table.name)}
            declared = {c.name: c.nullable for c in table.columns}
            assert columns == declared, table.name
    finally:
        registry.close()


def test_a_database_from_a_newer_seedbed_is_refused(empty_config: RegistryConfig) -> None:
    registry = open_registry(empty_config)
    try:
        with registry.engine.begin() as conn:
            conn.execute(
                schema_steps.insert().values(
                    version=migrations.LATEST + 1,
                    description="from the future",
                    applied_at=datetime.now(UTC),
                )
            )
        with pytest.raises(migrations.SchemaTooNewError, match="at least as new"):
            migrations.upgrade(registry.engine)
        assert registry.ping() is not None and "schema version" in (registry.ping() or "")
    finally:
        registry.close()


def test_a_failing_step_leaves_no_trace(
    empty_config: RegistryConfig, monkeypatch: pytest.MonkeyPatch
) -> None:
    engine = open_engine(empty_config)
    try:
        migrations.upgrade(engine)

        def half_done(conn: object) -> None:
            md = MetaData()
            Table("scratch_table", md, Column("x", Integer))
            md.create_all(conn)  # type: ignore[arg-type]
            raise RuntimeError("step broke half-way")

        broken = migrations.Step(migrations.LATEST + 1, "broken", half_done)
        monkeypatch.setattr(migrations, "STEPS", (*migrations.STEPS, broken))
        monkeypatch.setattr(migrations, "LATEST", migrations.LATEST + 1)
        with pytest.raises(RuntimeError, match="half-way"):
            migrations.upgrade(engine)
        assert not inspect(engine).has_table("scratch_table")  # the DDL was rolled back
        assert migrations.schema_version(engine) == broken.version - 1
    finally:
        engine.dispose()


def test_replicas_starting_together_migrate_once(empty_config: RegistryConfig) -> None:
    errors: list[BaseException] = []
    start = threading.Barrier(4)

    def boot() -> None:
        try:
            start.wait()
            open_registry(empty_config).close()
        except BaseException as exc:
            errors.append(exc)

    threads = [threading.Thread(target=boot) for _ in range(4)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert errors == []
    engine = open_engine(empty_config)
    try:
        with engine.connect() as conn:
            versions = (
                conn.execute(select(schema_steps.c.version).order_by(schema_steps.c.version))
                .scalars()
                .all()
            )
            count = conn.execute(select(func.count()).select_from(recipe_heads)).scalar()
        assert versions == list(range(1, migrations.LATEST + 1))
        assert count == 0
    finally:
        engine.dispose()
