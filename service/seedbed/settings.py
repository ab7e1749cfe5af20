"""Service settings: the one module of the service that reads the environment.

Every `SEEDBED_*` variable is read here and nowhere else (a test walks the source and fails on
any other module touching os.environ): the web layer's `Settings` (including the audit and
diagnose budgets) and the raw variables the registry interprets (`registry_environment`).
Every knob has an embedded default so `seedbed serve` works with no configuration. A bad value
stops start-up with a message naming the variable and what it accepts, rather than surfacing
later as a confusing failure under load.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Callable, Mapping
from dataclasses import dataclass, field
from typing import Any, TypeVar

from seedbed.core.diagnostics import DiagnosticLimits
from seedbed.core.request.limits import Limits

PREFIX = "SEEDBED_"
DIAGNOSE_PREFIX = PREFIX + "DIAGNOSE_"
LOG_LEVELS = ("critical", "error", "warning", "info", "debug")

T = TypeVar("T")


class SettingsError(ValueError):
    """A `SEEDBED_*` variable holds a value the service cannot start with."""


def _int_in(low: int, high: int) -> Callable[[str, str], int]:
    def parse(var: str, text: str) -> int:
        try:
            value = int(text.strip().replace("_", ""), 10)
        except ValueError:
            raise SettingsError(
                f"{var}={text!r} is not an integer; expected a whole number in [{low}, {high}]"
            ) from None
        if not low <= value <= high:
            raise SettingsError(f"{var}={value} is out of range; expected [{low}, {high}]")
        return value

    return parse


def _log_level(var: str, text: str) -> str:
    value = text.strip().lower()
    if value not in LOG_LEVELS:
        raise SettingsError(f"{var}={text!r} is not a log level; expected one of {LOG_LEVELS}")
    return value


def _host(var: str, text: str) -> str:
    value = text.strip()
    if not value or any(c.isspace() for c in value):
        raise SettingsError(f"{var}={text!r} is not a host; expected an address like 0.0.0.0")
    return value


def _flag(var: str, text: str) -> bool:
    value = text.strip().lower()
    if value in ("1", "true", "yes", "on"):
        return True
    if value in ("0", "false", "no", "off"):
        return False
    raise SettingsError(f"{var}={text!r} is not a switch; expected one of 1/0, true/false, on/off")


_GIB = 1 << 30
_MAX_INT = (1 << 63) - 1


@dataclass(frozen=True)
class Settings:
    """Everything the web layer can be told; `from_env` documents the variable for each field."""

    host: str = "127.0.0.1"
    port: int = 8600
    workers: int = 1
    log_level: str = "info"
    # JSON access log lines (one per request); off leaves only errors and start-up messages.
    access_log: bool = True
    # Request bodies are layer lists: 1 MiB holds thousands of layers.
    max_body_bytes: int = 1 << 20
    # base64 inside JSON costs 4/3 of the raw bytes and the client must hold it all to parse it;
    # above this size we point callers to npz or safetensors.
    max_json_response_bytes: int = 64 << 20
    # Threads the core may use to fill one tensor (per request); 0: the machine's cores divided
    # by the workers, so that workers x threads never exceeds the cores.
    generation_threads: int = 0
    # Validated plans kept for repeated requests (least recently used out; 0 turns it off),
    # within a budget of about 16 bytes per byte of canonical request JSON.
    plan_cache_entries: int = 256
    plan_cache_bytes: int = 64 << 20
    # The compiled generator kernel (same bytes as the numpy reference); off forces numpy.
    generator_kernel: bool = True
    # Size of the pieces a response is generated and sent in: the memory a stream holds at once.
    chunk_bytes: int = 4 << 20
    # Largest weights file POST /v1/audit accepts (read in a spool, never all in memory).
    max_audit_bytes: int = 256 << 20
    # Audits one worker runs at once: each holds its upload's largest tensor in memory, so the
    # cap bounds memory; more answer 503 with Retry-After instead of queueing.
    max_concurrent_audits: int = 4
    # Largest ONNX model the /v1/onnx/* routes read; it is parsed whole, so this bounds memory.
    # Models whose weights live in external data files are small: only shapes are needed.
    max_onnx_bytes: int = 128 << 20
    limits: Limits = field(default_factory=Limits)
    # POST /v1/diagnose budgets, read as SEEDBED_DIAGNOSE_<FIELD> (e.g. SEEDBED_DIAGNOSE_MAX_BATCH).
    diagnostics: DiagnosticLimits = field(default_factory=DiagnosticLimits)

    def threads_per_request(self) -> int:
        """generation_threads, with 0 resolved to the cores left per worker (at least 1)."""
        if self.generation_threads:
            return self.generation_threads
        return max(1, (os.cpu_count() or 1) // self.workers)

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None) -> Settings:
        env = _environment(environ)
        values: dict[str, Any] = {}
        for name, parse in _PARSERS.items():
            var = PREFIX + name.upper()
            if var in env:
                values[name] = parse(var, env[var])
        limit_values: dict[str, int] = {}
        for f in dataclasses.fields(Limits):
            var = PREFIX + f.name.upper()
            if var in env:
                limit_values[f.name] = _int_in(1, _MAX_INT)(var, env[var])
        if limit_values:
            values["limits"] = Limits(**limit_values)
        budget_values: dict[str, int] = {}
        for f in dataclasses.fields(DiagnosticLimits):
            var = DIAGNOSE_PREFIX + f.name.upper()
            if var in env:
                budget_values[f.name] = _int_in(1, _MAX_INT)(var, env[var])
        if budget_values:
            values["diagnostics"] = DiagnosticLimits(**budget_values)
        return cls(**values)


def _environment(environ: Mapping[str, str] | None) -> Mapping[str, str]:
    """The process environment, unless the caller (a test, a tool) passes its own mapping."""
    return os.environ if environ is None else environ


# What the registry is told (seedbed.registry.config interprets them): the database URL, a file
# holding it, the SQLite directory, read protection and the replicated-deployment switch; and
# the two standard variables that locate the default data directory.
REGISTRY_VARIABLES: tuple[str, ...] = (
    PREFIX + "DATABASE_URL",
    PREFIX + "DATABASE_URL_FILE",
    PREFIX + "DATA_DIR",
    PREFIX + "READ_REQUIRES_KEY",
    PREFIX + "SHARED_DATABASE",
    "XDG_DATA_HOME",
    "HOME",
)


def registry_environment(environ: Mapping[str, str] | None = None) -> dict[str, str]:
    """The registry's variables that are set, as a plain mapping."""
    env = _environment(environ)
    return {var: env[var] for var in REGISTRY_VARIABLES if var in env}


def is_set(var: str, environ: Mapping[str, str] | None = None) -> bool:
    """Whether the environment sets `var` (the `settings` command says where a value came
    from)."""
    return var in _environment(environ)


def client_environment(var: str, environ: Mapping[str, str] | None = None) -> str | None:
    """A variable the client package reads for itself (SEEDBED_URL ...), for the `settings`
    command to show beside the service's own."""
    return _environment(environ).get(var)


def pass_to_workers(values: Mapping[str, object]) -> None:
    """Put command-line overrides into the environment as SEEDBED_<NAME> variables: worker
    processes build their own app from the environment, so that is how the values reach them."""
    for name, value in values.items():
        os.environ[PREFIX + name.upper()] = str(value)


_PARSERS: dict[str, Callable[[str, str], Any]] = {
    "host": _host,
    "port": _int_in(1, 65535),
    "workers": _int_in(1, 256),
    "log_level": _log_level,
    "access_log": _flag,
    "max_body_bytes": _int_in(1024, _GIB),
    "max_json_response_bytes": _int_in(1024, 16 * _GIB),
    "generation_threads": _int_in(0, 256),
    "generator_kernel": _flag,
    "plan_cache_entries": _int_in(0, 1 << 20),
    "plan_cache_bytes": _int_in(0, 16 * _GIB),
    "chunk_bytes": _int_in(4096, _GIB),
    "max_audit_bytes": _int_in(1024, 64 * _GIB),
    "max_concurrent_audits": _int_in(1, 1024),
    # protobuf cannot parse a message of 2 GiB or more
    "max_onnx_bytes": _int_in(1024, 2 * _GIB - 1),
}


def shown(value: object) -> str:
    """A setting's value as the environment would spell it."""
    if isinstance(value, bool):
        return "on" if value else "off"
    return str(value)


def settings_table() -> list[tuple[str, str, str]]:
    """(variable, default, field) rows: what docs/service.md's table is checked against."""
    defaults = Settings()
    rows = [(PREFIX + n.upper(), shown(getattr(defaults, n)), n) for n in _PARSERS]
    rows += [
        (PREFIX + f.name.upper(), shown(getattr(defaults.limits, f.name)), f"limits.{f.name}")
        for f in dataclasses.fields(Limits)
    ]
    rows += [
        (
            DIAGNOSE_PREFIX + f.name.upper(),
            shown(getattr(defaults.diagnostics, f.name)),
            f"diagnostics.{f.name}",
        )
        for f in dataclasses.fields(DiagnosticLimits)
    ]
    return rows
