"""Build wiring for the optional compiled generator kernel (everything else is in pyproject).

The kernel is an optional extension: without a C compiler or Python headers the install still
succeeds and the package falls back to the numpy reference generator (same bytes, slower).
"""

import sys
from pathlib import Path

from setuptools import setup

# PEP 517 builds do not put the project on the import path; the helper sits in client/.
sys.path.insert(0, str(Path(__file__).resolve().parent / "client"))
from build_kernel import kernel_build_options

setup(**kernel_build_options("client/seedbed_client"))
