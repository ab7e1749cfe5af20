"""Every variable of the service's environment is read in one module, seedbed/settings.py.

Walks the service's source with ast and fails on any other module that touches os.environ,
os.getenv, os.putenv or imports environ/getenv from os. (The client package installs and runs
alone and keeps its own small reader in seedbed_client.)
"""

from __future__ import annotations

import ast
from pathlib import Path

SERVICE = Path(__file__).resolve().parents[2] / "service" / "seedbed"
ALLOWED = {"settings.py"}
ENV_NAMES = {"environ", "environb", "getenv", "getenvb", "putenv", "unsetenv"}


def _reads_environment(tree: ast.AST) -> list[int]:
    lines: list[int] = []
    for node in ast.walk(tree):
        if (
            isinstance(node, ast.Attribute)
            and node.attr in ENV_NAMES
            and isinstance(node.value, ast.Name)
            and node.value.id == "os"
        ) or (
            isinstance(node, ast.ImportFrom)
            and node.module == "os"
            and any(alias.name in ENV_NAMES for alias in node.names)
        ):
            lines.append(node.lineno)
    return lines


def test_the_walker_sees_an_environment_read() -> None:
    assert _reads_environment(ast.parse("import os\nx = os.environ.get('A')\n")) == [2]
    assert _reads_environment(ast.parse("from os import getenv\n")) == [1]
    assert _reads_environment(ast.parse("import os\nos.path.join('a')\n")) == []


def test_only_the_settings_module_reads_the_environment() -> None:
    files = sorted(SERVICE.rglob("*.py"))
    assert any(f.name == "settings.py" for f in files)
    offenders = {
        str(f.relative_to(SERVICE)): lines
        for f in files
        if str(f.relative_to(SERVICE)) not in ALLOWED
        and (lines := _reads_environment(ast.parse(f.read_text(encoding="utf-8"))))
    }
    assert offenders == {}
