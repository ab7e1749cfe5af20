"""Shared test helpers."""

from __future__ import annotations

import importlib
import os
import sys
import tempfile
from pathlib import Path
from types import ModuleType

import pytest

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "service"))

# In-process apps open the recipe registry at start-up: keep its SQLite file out of the
# user's data directory. Tests that need their own database set SEEDBED_DATA_DIR themselves.
os.environ.setdefault("SEEDBED_DATA_DIR", tempfile.mkdtemp(prefix="seedbed-test-data-"))


def require_oracle(module: str) -> ModuleType:
    """Import a reference library used as an oracle.

    By hand, a missing oracle skips the test. CI sets SEEDBED_REQUIRE_ORACLES=1, and there a
    missing oracle is a failure: a reference check must never silently not run.
    """
    try:
        return importlib.import_module(module)
    except ImportError:
        if os.environ.get("SEEDBED_REQUIRE_ORACLES") == "1":
            raise
        pytest.skip(f"oracle {module!r} is not installed (CI installs it)")
        raise  # unreachable; keeps type checkers happy
