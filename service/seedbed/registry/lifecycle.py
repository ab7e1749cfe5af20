"""The registry as one object a process holds: configuration, engine, schema brought up to date."""

from __future__ import annotations

import threading
from dataclasses import dataclass

from sqlalchemy import Engine, text
from sqlalchemy.exc import SQLAlchemyError

from seedbed.registry import migrations
from seedbed.registry.config import RegistryConfig, RegistryConfigError, config_from_env
from seedbed.registry.engine import open_engine


@dataclass
class Registry:
    config: RegistryConfig
    engine: Engine

    def ping(self) -> str | None:
        """None when the database answers and is at our schema version, else the reason."""
        try:
            with self.engine.connect() as conn:
                conn.execute(text("SELECT 1"))
            version = migrations.schema_version(self.engine)
        except SQLAlchemyError as exc:
            inner = getattr(exc, "orig", None) or exc
            return (
                f"the registry database ({self.config.describe()}) is unreachable: "
                f"{type(inner).__name__}: {str(inner).strip()[:300]}"
            )
        if version != migrations.LATEST:
            return (
                f"the registry database is at schema version {version}, this service needs "
                f"{migrations.LATEST}"
            )
        return None

    def close(self) -> None:
        self.engine.dispose()


def open_registry(config: RegistryConfig | None = None, *, upgrade: bool = True) -> Registry:
    """Connect (creating the SQLite file on first start) and bring the schema up to date."""
    config = config_from_env() if config is None else config
    engine = open_engine(config)
    try:
        if upgrade:
            migrations.upgrade(engine)
    except BaseException:
        engine.dispose()
        raise
    return Registry(config, engine)


class LazyRegistry:
    """Opens the registry on first use (from SEEDBED_* variables) and keeps it for the process.

    Used by the recipes router when the app did not install a registry at start-up; a failure
    to connect is not remembered, so the next request tries again once the database is back.
    """

    def __init__(self, config: RegistryConfig | None = None) -> None:
        self._config = config
        self._registry: Registry | None = None
        self._lock = threading.Lock()

    def get(self) -> Registry:
        with self._lock:
            if self._registry is None:
                self._registry = open_registry(self._config)
            return self._registry

    def problem(self) -> str | None:
        """For readiness probes: None when the registry can be opened and its database answers,
        else the reason. Never raises."""
        try:
            registry = self.get()
        except (RegistryConfigError, migrations.SchemaTooNewError) as exc:
            return f"the registry is not configured correctly: {exc}"
        except SQLAlchemyError as exc:
            inner = getattr(exc, "orig", None) or exc
            return (
                f"the registry database cannot be opened: {type(inner).__name__}: "
                f"{str(inner).strip()[:300]}"
            )
        except OSError as exc:  # the data directory cannot be created or written
            return f"the registry's data directory cannot be used: {exc}"
        return registry.ping()

    def close(self) -> None:
        with self._lock:
            if self._registry is not None:
                self._registry.close()
                self._registry = None
