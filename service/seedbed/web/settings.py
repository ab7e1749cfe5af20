"""Service settings, read once from `SEEDBED_*` environment variables.

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
from seedbed.core.limits import Limits

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
    # Threads the core may use to fill one tensor (per request).
    generation_threads: int = 1
    # Size of the pieces a response is generated and sent in: the memory a stream holds at once.
    chunk_bytes: int = 4 << 20
    # Largest weights file POST /v1/audit accepts (read in a spool, never all in memory).
    max_audit_bytes: int = 256 << 20
    # Audits one worker runs at once: each holds its upload's largest tensor in memory, so the
    # cap bounds memory; more answer 503 with Retry-After instead of queueing.
    max_concurrent_audits: int = 4
    limits: Limits = field(default_factory=Limits)
    # POST /v1/diagnose budgets, read as SEEDBED_DIAGNOSE_<FIELD> (e.g. SEEDBED_DIAGNOSE_MAX_BATCH).
    diagnostics: DiagnosticLimits = field(default_factory=DiagnosticLimits)

    @classmethod
    def from_env(cls, environ: Mapping[str, str] | None = None) -> Settings:
        env = os.environ if environ is None else environ
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


_PARSERS: dict[str, Callable[[str, str], Any]] = {
    "host": _host,
    "port": _int_in(1, 65535),
    "workers": _int_in(1, 256),
    "log_level": _log_level,
    "access_log": _flag,
    "max_body_bytes": _int_in(1024, _GIB),
    "max_json_response_bytes": _int_in(1024, 16 * _GIB),
    "generation_threads": _int_in(1, 256),
    "chunk_bytes": _int_in(4096, _GIB),
    "max_audit_bytes": _int_in(1024, 64 * _GIB),
    "max_concurrent_audits": _int_in(1, 1024),
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
        (DIAGNOSE_PREFIX + f.name.upper(), shown(getattr(defaults.diagnostics, f.name)),
         f"diagnostics.{f.name}")
        for f in dataclasses.fields(DiagnosticLimits)
    ]
    return rows
