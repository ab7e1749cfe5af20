"""Where the registry's data lives and how operators spell database URLs."""

from __future__ import annotations

from pathlib import Path

import pytest
from sqlalchemy import text

from seedbed.registry import RegistryConfigError, config_from_env, open_registry
from seedbed.registry.config import default_data_dir, normalise_database_url, redact_url


def test_data_dir_precedence(tmp_path: Path) -> None:
    # XDG Base Directory Specification: $XDG_DATA_HOME, default $HOME/.local/share; a relative
    # value is invalid and ignored (common practice, from the spec's text [from memory]).
    home = str(tmp_path / "home")
    assert default_data_dir({"HOME": home}) == Path(home) / ".local/share/seedbed"
    assert default_data_dir({"HOME": home, "XDG_DATA_HOME": "/srv/xdg"}) == Path("/srv/xdg/seedbed")
    assert (
        default_data_dir({"HOME": home, "XDG_DATA_HOME": "rel/dir"})
        == Path(home) / ".local/share/seedbed"
    )
    assert default_data_dir(
        {"HOME": home, "XDG_DATA_HOME": "/srv/xdg", "SEEDBED_DATA_DIR": "/var/lib/seedbed"}
    ) == Path("/var/lib/seedbed")


def test_default_is_an_sqlite_file_in_the_data_dir(tmp_path: Path) -> None:
    config = config_from_env({"SEEDBED_DATA_DIR": str(tmp_path / "d")})
    assert config.backend == "sqlite"
    assert config.database_url == f"sqlite+pysqlite:///{tmp_path}/d/seedbed.sqlite3"
    assert not config.read_requires_key


@pytest.mark.parametrize(
    ("given", "expected"),
    [
        ("postgresql://u:p@db:5432/seedbed", "postgresql+psycopg://u:p@db:5432/seedbed"),
        ("postgres://u@db/seedbed", "postgresql+psycopg://u@db/seedbed"),
        (
            "postgresql+psycopg://u@db/s?sslmode=require",
            "postgresql+psycopg://u@db/s?sslmode=require",
        ),
        ("sqlite:////var/lib/seedbed/x.sqlite3", "sqlite+pysqlite:////var/lib/seedbed/x.sqlite3"),
    ],
)
def test_urls_are_normalised_to_our_drivers(given: str, expected: str) -> None:
    assert normalise_database_url(given)[0] == expected


@pytest.mark.parametrize(
    ("given", "words"),
    [
        ("mysql://u@db/x", "allowed: postgresql://"),
        ("sqlite:///:memory:", "not a database file"),
        ("postgresql:///nohost", "names no host"),
        ("just-a-word", "not a database URL"),
    ],
)
def test_bad_urls_name_the_variable(given: str, words: str) -> None:
    with pytest.raises(RegistryConfigError) as caught:
        config_from_env({"SEEDBED_DATABASE_URL": given})
    assert "SEEDBED_DATABASE_URL" in str(caught.value)
    assert words in str(caught.value)


def test_passwords_never_appear_in_messages() -> None:
    assert redact_url("postgresql://ann:s3cret@db/x") == "postgresql://ann:***@db/x"
    with pytest.raises(RegistryConfigError) as caught:
        config_from_env({"SEEDBED_DATABASE_URL": "pgsql://ann:s3cret@db/x"})
    assert "s3cret" not in str(caught.value)


def test_url_from_a_secret_file(tmp_path: Path) -> None:
    secret = tmp_path / "database_url"
    secret.write_text("postgres://svc:pw@primary:5432/recipes\n")
    config = config_from_env({"SEEDBED_DATABASE_URL_FILE": str(secret)})
    assert config.backend == "postgresql"
    assert config.database_url == "postgresql+psycopg://svc:pw@primary:5432/recipes"
    assert "pw" not in config.describe()
    with pytest.raises(RegistryConfigError, match=r"SEEDBED_DATABASE_URL_FILE.*cannot be read"):
        config_from_env({"SEEDBED_DATABASE_URL_FILE": str(tmp_path / "absent")})
    (tmp_path / "empty").write_text("  \n")
    with pytest.raises(RegistryConfigError, match="is empty"):
        config_from_env({"SEEDBED_DATABASE_URL_FILE": str(tmp_path / "empty")})


def test_shared_database_refuses_sqlite(tmp_path: Path) -> None:
    with pytest.raises(RegistryConfigError, match="SEEDBED_SHARED_DATABASE=1 but neither"):
        config_from_env({"SEEDBED_SHARED_DATABASE": "1", "SEEDBED_DATA_DIR": str(tmp_path)})
    with pytest.raises(RegistryConfigError, match="is an SQLite file"):
        config_from_env(
            {
                "SEEDBED_SHARED_DATABASE": "on",
                "SEEDBED_DATABASE_URL": f"sqlite:///{tmp_path}/x.sqlite3",
            }
        )
    ok = config_from_env(
        {"SEEDBED_SHARED_DATABASE": "1", "SEEDBED_DATABASE_URL": "postgresql://u@db/x"}
    )
    assert ok.backend == "postgresql"


def test_read_protection_switch() -> None:
    assert config_from_env(
        {"SEEDBED_READ_REQUIRES_KEY": "1", "SEEDBED_DATA_DIR": "/tmp/x"}
    ).read_requires_key
    with pytest.raises(RegistryConfigError, match="SEEDBED_READ_REQUIRES_KEY='maybe'"):
        config_from_env({"SEEDBED_READ_REQUIRES_KEY": "maybe"})


def test_first_start_creates_the_file_in_wal_mode(tmp_path: Path) -> None:
    data = tmp_path / "nested" / "dir"
    registry = open_registry(config_from_env({"SEEDBED_DATA_DIR": str(data)}))
    try:
        assert (data / "seedbed.sqlite3").is_file()
        assert data.stat().st_mode & 0o777 == 0o700
        with registry.engine.connect() as conn:
            assert conn.execute(text("PRAGMA journal_mode")).scalar() == "wal"
            # 2 = FULL (SQLite documentation, PRAGMA synchronous): a commit is on disk first.
            assert conn.execute(text("PRAGMA synchronous")).scalar() == 2
        assert registry.ping() is None
    finally:
        registry.close()
