"""The optional compiled kernel of this generator, and whether it is in use.

`seedbed_client.generator._kernel` is a C extension built at install time when a compiler is
available (client/seedbed_client/generator/_kernel.c). It computes the same float64 operations
as the numpy reference in the same order, so it produces the same bytes; the byte-equality
tests (tests/unit/client/test_generator_kernel.py) hold it to that. Without it, or when switched
off, every function here reports so and the callers use the numpy reference: same bytes,
slower.

The kernel takes the logarithm's series and the truncation constants from the reference
modules, so both implementations share one definition of every constant computed in Python.
"""

from __future__ import annotations

import importlib
from dataclasses import dataclass
from types import ModuleType

from ..environment import numpy_disabled_cpu_features
from .logarithm import LN2_HI, LN2_LO, SERIES
from .truncation import TRUNCATION_BOUND, TRUNCATION_MASS

DIST_CODES = {"uniform": 0, "normal": 1, "truncated_normal": 2}


@dataclass(frozen=True)
class KernelStatus:
    """What generates values in this process: 'compiled' or 'reference', and why."""

    implementation: str
    detail: str

    @property
    def compiled(self) -> bool:
        return self.implementation == "compiled"

    def describe(self) -> str:
        return f"{self.implementation} ({self.detail})"


def _wide_loops_allowed() -> bool:
    # numpy's switch for its own SIMD dispatch (numpy 1.x names AVX2, numpy 2.4 names the
    # level X86_V3); honouring it runs the kernel's baseline loops in the same test run that
    # takes numpy's AVX2 code away.
    return not {"AVX", "AVX2", "X86_V3"} & numpy_disabled_cpu_features()


def _load() -> tuple[ModuleType | None, KernelStatus]:
    try:
        # By name: the extension is not a source module, and an import statement of it would
        # read as an import of this package's __init__ (which imports this module).
        module = importlib.import_module(__name__.rsplit(".", 1)[0] + "._kernel")
    except ImportError as exc:
        reason = f"compiled kernel unavailable: {exc}; using the numpy reference (same bytes)"
        return None, KernelStatus("reference", reason)
    loops = module.init(
        list(SERIES), LN2_HI, LN2_LO, TRUNCATION_MASS, TRUNCATION_BOUND, _wide_loops_allowed()
    )
    return module, KernelStatus("compiled", f"C kernel, {loops} loops")


_MODULE, _LOADED = _load()
_enabled = True


def status() -> KernelStatus:
    """The implementation in use now."""
    if _MODULE is None:
        return _LOADED
    if not _enabled:
        return KernelStatus("reference", "compiled kernel switched off; numpy reference in use")
    return _LOADED


def set_enabled(enabled: bool) -> KernelStatus:
    """Switch the compiled kernel on or off for this process (off: numpy reference)."""
    global _enabled
    _enabled = bool(enabled)
    return status()


def active() -> ModuleType | None:
    """The kernel module when it is loaded and switched on, else None."""
    return _MODULE if _enabled else None


def loaded() -> ModuleType | None:
    """The kernel module when it could be loaded, on or off (tests compare it directly)."""
    return _MODULE
