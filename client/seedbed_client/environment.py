"""The client's environment: the one module of seedbed_client that reads os.environ.

The client installs and runs without the service, so it cannot use the service's settings
module; it keeps the same rule on its own side (tests/unit/test_environment_reads.py walks both
packages). Every variable the client honours is named here, so `seedbed settings` and the docs
have one list to agree with.
"""

from __future__ import annotations

import os
from collections.abc import Mapping

__all__ = [
    "ENV_CACHE_DIR",
    "ENV_CACHE_MAX_BYTES",
    "ENV_KEY",
    "ENV_KEY_FILE",
    "ENV_URL",
    "environment",
    "numpy_disabled_cpu_features",
]

ENV_URL = "SEEDBED_URL"
ENV_CACHE_DIR = "SEEDBED_CACHE_DIR"
ENV_CACHE_MAX_BYTES = "SEEDBED_CACHE_MAX_BYTES"
ENV_KEY = "SEEDBED_PUBLISH_KEY"
ENV_KEY_FILE = "SEEDBED_PUBLISH_KEY_FILE"
# numpy's own switch for its SIMD dispatch; the compiled generator honours it too, so one test
# run can take the wide loops away from both.
ENV_NUMPY_CPU_FEATURES = "NPY_DISABLE_CPU_FEATURES"


def environment(environ: Mapping[str, str] | None = None) -> Mapping[str, str]:
    """The process environment, unless the caller (a test, a tool) passes its own mapping."""
    return os.environ if environ is None else environ


def numpy_disabled_cpu_features(environ: Mapping[str, str] | None = None) -> frozenset[str]:
    """The CPU features numpy was told not to use, upper-cased (commas or spaces separate)."""
    text = environment(environ).get(ENV_NUMPY_CPU_FEATURES, "")
    return frozenset(text.replace(",", " ").upper().split())
