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


TESTS = Path(__file__).resolve().parent
# Markers by top-level folder: e2e and client tests start real servers, registry tests real
# databases. The fast loop deselects them: pytest -n 2 -m "not e2e and not registry and not slow".
FOLDER_MARKERS: dict[str, tuple[str, ...]] = {
    "e2e": ("e2e",),
    "client": ("e2e",),
    "registry": ("registry",),
    "unit": ("unit",),
}


# In-process tests that still take seconds each (fresh interpreters, an API fuzzer, jax
# tracing, long simulations): `slow`, so the fast loop skips them; CI runs them all.
SLOW_TESTS: tuple[str, ...] = (
    "unit/web/test_fuzz.py",
    "unit/core/diagnostics/test_verdicts.py",
    "unit/client/test_flax_adapter.py",
    "unit/client/test_generator_portability.py",
    "unit/client/test_generator_kernel.py::test_without_the_kernel",
    "unit/cli/test_commands.py::test_help_lists_service_and_client_commands",
    "unit/core/test_golden.py::test_same_digests_with_simd_dispatch_disabled",
    "unit/core/test_activations.py::test_gain_bitwise_identical_in_fresh_process",
    "unit/web/test_generator_status.py::test_settings_command_says_which_generator_runs",
    "unit/test_bench_scripts.py::test_benchmark_script_starts",
)


def pytest_collection_modifyitems(config: pytest.Config, items: list[pytest.Item]) -> None:
    for item in items:
        try:
            where = Path(str(item.path)).resolve().relative_to(TESTS)
        except ValueError:
            continue
        for mark in FOLDER_MARKERS.get(where.parts[0], ()):
            item.add_marker(mark)
        node = where.as_posix() + "::" + item.name
        if any(node.startswith(prefix) for prefix in SLOW_TESTS):
            item.add_marker("slow")


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
