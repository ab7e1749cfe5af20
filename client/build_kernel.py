"""setuptools options for the optional compiled generator kernel (shared by both setup.py).

Compiler flags matter for the output bytes: contraction of a multiply and an add into one
fused operation (FMA) rounds once instead of twice, and fast-math reorders operations, so both
are switched off explicitly; the documented generator is defined by separately rounded IEEE
operations. On compilers without the GCC-style flags (MSVC) strict floating point gives the
same guarantee.
"""

from __future__ import annotations

from typing import Any

from setuptools import Extension
from setuptools.command.build_ext import build_ext

_GCC_FLAGS = [
    "-O3",
    "-ffp-contract=off",  # no fused multiply-add: each * and + rounds on its own
    "-fno-fast-math",
    "-fno-math-errno",  # lets sqrt be the IEEE instruction; never changes a value
    "-fno-strict-aliasing",
]
_MSVC_FLAGS = ["/O2", "/fp:strict"]


class _KernelBuild(build_ext):
    """Picks the flags by compiler family; a failed build is reported, not fatal."""

    def build_extensions(self) -> None:
        msvc = self.compiler.compiler_type == "msvc"
        for ext in self.extensions:
            ext.extra_compile_args = list(_MSVC_FLAGS if msvc else _GCC_FLAGS)
        super().build_extensions()


def kernel_build_options(package_dir: str) -> dict[str, Any]:
    """setup() keywords that build seedbed_client._generator_kernel from `package_dir`."""
    kernel = Extension(
        "seedbed_client.generator._kernel",
        sources=[f"{package_dir}/generator/_kernel.c"],
        optional=True,  # no compiler, no headers: install anyway, use the numpy generator
    )
    return {"ext_modules": [kernel], "cmdclass": {"build_ext": _KernelBuild}}
