"""Every environment variable is read in one module per package: seedbed/settings.py for the
service, seedbed_client/environment.py for the client (which installs and runs alone).

Walks both packages' source with ast and fails on any other module that touches os.environ,
os.getenv, os.putenv or imports environ/getenv from os.
"""

from __future__ import annotations

import ast
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]
# package source root -> the one module (relative to it) allowed to read the environment
READERS = {
    ROOT / "service" / "seedbed": "settings.py",
    ROOT / "client" / "seedbed_client": "environment.py",
}
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


def test_only_one_module_per_package_reads_the_environment() -> None:
    offenders: dict[str, list[int]] = {}
    for package, reader in READERS.items():
        files = sorted(package.rglob("*.py"))
        # The reader itself must be found reading, or the walk is looking in the wrong place.
        assert _reads_environment(ast.parse((package / reader).read_text(encoding="utf-8")))
        for f in files:
            if str(f.relative_to(package)) == reader:
                continue
            lines = _reads_environment(ast.parse(f.read_text(encoding="utf-8")))
            if lines:
                offenders[str(f.relative_to(ROOT))] = lines
    assert offenders == {}
