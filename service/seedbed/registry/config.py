"""Where the registry keeps its data, read from `SEEDBED_*` variables.

    SEEDBED_DATABASE_URL        postgresql://... for a shared PostgreSQL (psycopg 3), or
                                sqlite:///PATH for a given file; unset: the embedded SQLite file
    SEEDBED_DATABASE_URL_FILE   a file holding that URL (container secrets are mounted as files);
                                used only when SEEDBED_DATABASE_URL is unset
    SEEDBED_DATA_DIR            directory of the embedded SQLite file (default
                                $XDG_DATA_HOME/seedbed, else ~/.local/share/seedbed)
    SEEDBED_READ_REQUIRES_KEY   1: every registry read needs a key too (default 0: reads open)
    SEEDBED_SHARED_DATABASE     1: refuse to start on SQLite; set on replicated deployments so
                                a missing database URL cannot give every replica its own file

The variables are read from the environment by seedbed.settings (the one module that reads
it); this module interprets them, apart from the web layer, so the `keys` command, which never
starts a server, uses the same rules.
"""

from __future__ import annotations

import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from urllib.parse import urlsplit

from seedbed.settings import PREFIX, registry_environment

DATABASE_FILE_NAME = "seedbed.sqlite3"

_POSTGRES_SCHEMES = ("postgresql", "postgres", "postgresql+psycopg")
_SQLITE_SCHEMES = ("sqlite", "sqlite+pysqlite")


class RegistryConfigError(ValueError):
    """A registry variable holds a value the registry cannot work with (names the variable)."""


@dataclass(frozen=True)
class RegistryConfig:
    database_url: str  # SQLAlchemy URL with an explicit driver
    backend: str  # "sqlite" | "postgresql"
    read_requires_key: bool = False
    # The embedded file's directory when the default SQLite database is used, else None.
    data_dir: Path | None = None

    def describe(self) -> str:
        """The database for log lines and error messages, without any password."""
        return redact_url(self.database_url)


def _flag(var: str, text: str) -> bool:
    value = text.strip().lower()
    if value in ("1", "true", "yes", "on"):
        return True
    if value in ("0", "false", "no", "off", ""):
        return False
    raise RegistryConfigError(
        f"{var}={text!r} is not a switch; expected one of 1/0, true/false, on/off"
    )


def default_data_dir(env: Mapping[str, str]) -> Path:
    explicit = env.get(PREFIX + "DATA_DIR", "").strip()
    if explicit:
        return Path(explicit).expanduser()
    xdg = env.get("XDG_DATA_HOME", "").strip()
    # The XDG base directory spec says a relative XDG_DATA_HOME is invalid and must be ignored.
    if xdg and os.path.isabs(xdg):
        return Path(xdg) / "seedbed"
    return Path(env.get("HOME") or Path.home()) / ".local" / "share" / "seedbed"


def normalise_database_url(url: str, var: str = PREFIX + "DATABASE_URL") -> tuple[str, str]:
    """(SQLAlchemy URL with its driver spelled out, backend) for a URL an operator wrote.

    postgres:// and postgresql:// both mean PostgreSQL through psycopg 3 (SQLAlchemy's bare
    postgresql:// would pick psycopg2, which we do not ship).
    """
    text = url.strip()
    scheme, sep, rest = text.partition("://")
    if not sep:
        raise RegistryConfigError(
            f"{var}={redact_url(text)!r} is not a database URL; expected postgresql://USER@HOST/"
            "DB or sqlite:////absolute/path.sqlite3"
        )
    scheme = scheme.lower()
    if scheme in _POSTGRES_SCHEMES:
        if not urlsplit("postgresql://" + rest).hostname and "host=" not in rest:
            raise RegistryConfigError(
                f"{var}={redact_url(text)!r} names no host; expected postgresql://USER:PASSWORD"
                "@HOST:PORT/DATABASE"
            )
        return "postgresql+psycopg://" + rest, "postgresql"
    if scheme in _SQLITE_SCHEMES:
        path = rest[1:] if rest.startswith("/") else rest
        if not path or path == ":memory:" or path.startswith("file:"):
            # Each connection to :memory: is a new empty database: publishes would vanish.
            raise RegistryConfigError(
                f"{var}={text!r} is not a database file; expected sqlite:////absolute/path.sqlite3"
            )
        return "sqlite+pysqlite:///" + path, "sqlite"
    raise RegistryConfigError(
        f"{var} uses the scheme {scheme!r}; allowed: postgresql:// (or postgres://) and sqlite://"
    )


def redact_url(url: str) -> str:
    """The URL with any password replaced by ***."""
    scheme, sep, rest = url.partition("://")
    if not sep:
        return url
    creds, at, host = rest.rpartition("@")
    if not at or ":" not in creds:
        return url
    user = creds.split(":", 1)[0]
    return f"{scheme}://{user}:***@{host}"


def sqlite_url_for(directory: Path) -> str:
    return "sqlite+pysqlite:///" + str(directory / DATABASE_FILE_NAME)


def _database_url_text(env: Mapping[str, str]) -> tuple[str, str] | None:
    """(text, variable it came from), or None when neither variable is set."""
    var = PREFIX + "DATABASE_URL"
    text = env.get(var, "").strip()
    if text:
        return text, var
    file_var = PREFIX + "DATABASE_URL_FILE"
    path = env.get(file_var, "").strip()
    if not path:
        return None
    try:
        content = Path(path).read_text(encoding="utf-8").strip()
    except OSError as exc:
        raise RegistryConfigError(
            f"{file_var}={path!r} cannot be read: {exc.strerror}; expected a file holding the "
            "database URL"
        ) from None
    if not content:
        raise RegistryConfigError(f"{file_var}={path!r} is empty; expected the database URL")
    return content, f"{file_var} ({path})"


def config_from_env(environ: Mapping[str, str] | None = None) -> RegistryConfig:
    """The registry's configuration from its variables (`environ`: a mapping standing in for
    the process environment)."""
    env = registry_environment(environ)
    read_protected = _flag(PREFIX + "READ_REQUIRES_KEY", env.get(PREFIX + "READ_REQUIRES_KEY", "0"))
    shared = _flag(PREFIX + "SHARED_DATABASE", env.get(PREFIX + "SHARED_DATABASE", "0"))
    given = _database_url_text(env)
    if given is None:
        if shared:
            raise RegistryConfigError(
                "SEEDBED_SHARED_DATABASE=1 but neither SEEDBED_DATABASE_URL nor "
                "SEEDBED_DATABASE_URL_FILE is set; replicas must share one PostgreSQL database "
                "(postgresql://...), never a file each"
            )
        directory = default_data_dir(env)
        return RegistryConfig(sqlite_url_for(directory), "sqlite", read_protected, directory)
    text, var = given
    url, backend = normalise_database_url(text, var)
    if shared and backend != "postgresql":
        raise RegistryConfigError(
            f"SEEDBED_SHARED_DATABASE=1 but {var} is an SQLite file; replicas must share one "
            "PostgreSQL database (postgresql://...)"
        )
    return RegistryConfig(url, backend, read_protected, None)
