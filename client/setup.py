"""Build wiring for the client alone: the optional compiled generator kernel."""

import sys
from pathlib import Path

from setuptools import setup

# PEP 517 builds do not put the project on the import path; the helper sits beside this file.
sys.path.insert(0, str(Path(__file__).resolve().parent))
from build_kernel import kernel_build_options

setup(**kernel_build_options("seedbed_client"))
