"""Fixtures: registries on both backends, a real PostgreSQL server, keys.

PostgreSQL comes from SEEDBED_TEST_POSTGRES_URL (a server where that user may CREATE DATABASE)
or else from a throwaway cluster this session starts with the Debian binaries. Without either,
PostgreSQL tests skip when run by hand, and fail when SEEDBED_REQUIRE_ORACLES=1 (CI): the
shared-database behaviour must never go untested there silently.
"""

from __future__ import annotations

import os
from collections.abc import Callable, Iterator
from pathlib import Path

import pytest
from sqlalchemy import text

from seedbed.registry import Registry, RegistryConfig, config_from_env, open_registry
from seedbed.registry.keys import create_key

from .pgcluster import Cluster, ClusterUnavailable, fresh_database, start_cluster

BACKENDS = ("sqlite", "postgresql")
DATA_TABLES = ("recipe_versions", "recipe_heads", "publish_keys")


@pytest.fixture(scope="session")
def pg_admin_url() -> Iterator[str]:
    given = os.environ.get("SEEDBED_TEST_POSTGRES_URL", "").strip()
    if given:
        yield given
        return
    cluster: Cluster | None = None
    try:
        cluster = start_cluster()
    except (ClusterUnavailable, OSError) as exc:
        if os.environ.get("SEEDBED_REQUIRE_ORACLES") == "1":
            pytest.fail(f"PostgreSQL is required here but could not be started: {exc}")
        pytest.skip(
            f"PostgreSQL unavailable (set SEEDBED_TEST_POSTGRES_URL or install postgresql): {exc}"
        )
    try:
        yield cluster.admin_url
    finally:
        cluster.stop()


@pytest.fixture
def pg_url(pg_admin_url: str) -> Iterator[str]:
    """A fresh, empty PostgreSQL database for one test (dropped afterwards)."""
    with fresh_database(pg_admin_url) as url:
        yield url


@pytest.fixture(scope="session")
def pg_shared_url(pg_admin_url: str) -> Iterator[str]:
    """One database for most tests; the `registry` fixture empties its tables before each."""
    with fresh_database(pg_admin_url) as url:
        yield url


@pytest.fixture(params=BACKENDS)
def backend(request: pytest.FixtureRequest) -> str:
    return str(request.param)


@pytest.fixture
def registry_env(backend: str, tmp_path: Path, request: pytest.FixtureRequest) -> dict[str, str]:
    """SEEDBED_* variables naming the test's database (a server process can use them too)."""
    if backend == "sqlite":
        return {"SEEDBED_DATA_DIR": str(tmp_path / "data")}
    return {"SEEDBED_DATABASE_URL": request.getfixturevalue("pg_shared_url")}


@pytest.fixture
def empty_env(backend: str, tmp_path: Path, request: pytest.FixtureRequest) -> dict[str, str]:
    """Like registry_env, but a database nobody has touched (not even migrated)."""
    if backend == "sqlite":
        return {"SEEDBED_DATA_DIR": str(tmp_path / "empty")}
    return {"SEEDBED_DATABASE_URL": request.getfixturevalue("pg_url")}


@pytest.fixture
def registry_config(registry_env: dict[str, str]) -> RegistryConfig:
    return config_from_env(registry_env)


@pytest.fixture
def registry(registry_config: RegistryConfig) -> Iterator[Registry]:
    opened = open_registry(registry_config)
    if registry_config.backend == "postgresql":
        with opened.engine.begin() as conn:
            conn.execute(text(f"TRUNCATE {', '.join(DATA_TABLES)}"))
    yield opened
    opened.close()


@pytest.fixture
def make_token(registry: Registry) -> Callable[[str], str]:
    def make(name: str) -> str:
        return create_key(registry.engine, name).token

    return make
