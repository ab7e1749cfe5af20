"""docs/audit.md lists every finding code and refusal code the audit can produce, and the
default upload limit it states is the code's."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from seedbed.core.audit import AuditLimits, Finding
from seedbed.core.audit.findings import FINDING_CODES
from seedbed.core.audit.refusals import REFUSAL_CODES
from seedbed.settings import SettingsError
from seedbed.web.routes.audit import MAX_AUDIT_ENV, audit_limits_from_env

DOC = (Path(__file__).resolve().parents[1] / "docs" / "audit.md").read_text(encoding="utf-8")


def test_every_code_is_documented() -> None:
    documented = set(re.findall(r"\| `([a-z_]+)` \|", DOC))
    assert documented >= FINDING_CODES
    assert set(re.findall(r"`([a-z_]+)`", DOC)) >= REFUSAL_CODES


def test_stated_default_limit_is_the_codes() -> None:
    assert f"default {AuditLimits().max_upload_bytes} (256 MiB)" in DOC
    assert MAX_AUDIT_ENV in DOC


def test_the_environment_variable_is_parsed_with_clear_errors() -> None:
    assert audit_limits_from_env({}).max_upload_bytes == AuditLimits().max_upload_bytes
    assert audit_limits_from_env({MAX_AUDIT_ENV: "1_048_576"}).max_upload_bytes == 1 << 20
    with pytest.raises(SettingsError, match="SEEDBED_MAX_AUDIT_BYTES='lots' is not an integer"):
        audit_limits_from_env({MAX_AUDIT_ENV: "lots"})
    with pytest.raises(SettingsError, match="out of range"):
        audit_limits_from_env({MAX_AUDIT_ENV: "10"})


def test_unknown_finding_codes_are_a_programming_error() -> None:
    with pytest.raises(ValueError, match="unknown finding code"):
        Finding("w", "error", "looks_odd", "x")
