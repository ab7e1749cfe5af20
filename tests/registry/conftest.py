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

from seedbed.registry import Registry, RegistryConfig, config_from_env, open_registry
from seedbed.registry.keys import create_key

from .pgcluster import Cluster, ClusterUnavailable, fresh_database, start_cluster

BACKENDS = ("sqlite", "postgresql")


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
        pytest.skip(f"PostgreSQL unavailable (set SEEDBED_TEST_POSTGRES_URL or install "
                    f"postgresql): {exc}")
    try:
        yield cluster.admin_url
    finally:
        cluster.stop()


@pytest.fixture
def pg_url(pg_admin_url: str) -> Iterator[str]:
    """A fresh, empty PostgreSQL database for one test (dropped afterwards)."""
    with fresh_database(pg_admin_url) as url:
        yield url


def env_for(backend: str, tmp_path: Path, request: pytest.FixtureRequest) -> dict[str, str]:
    """SEEDBED_* variables that point a registry (or a server process) at a fresh database."""
    if backend == "sqlite":
        return {"SEEDBED_DATA_DIR": str(tmp_path / "data")}
    url: str = request.getfixturevalue("pg_url")
    return {"SEEDBED_DATABASE_URL": url}


@pytest.fixture(params=BACKENDS)
def backend(request: pytest.FixtureRequest) -> str:
    return str(request.param)


@pytest.fixture
def registry_env(backend: str, tmp_path: Path, request: pytest.FixtureRequest) -> dict[str, str]:
    return env_for(backend, tmp_path, request)


@pytest.fixture
def registry_config(registry_env: dict[str, str]) -> RegistryConfig:
    return config_from_env(registry_env)


@pytest.fixture
def registry(registry_config: RegistryConfig) -> Iterator[Registry]:
    opened = open_registry(registry_config)
    yield opened
    opened.close()


@pytest.fixture
def make_token(registry: Registry) -> Callable[[str], str]:
    def make(name: str) -> str:
        return create_key(registry.engine, name).token

    return make
