"""The core must stay importable without any web framework (docs/architecture.md: dependencies
point one way, from the web layer to the core)."""

import ast
from pathlib import Path

CORE = Path(__file__).resolve().parents[1] / "service" / "seedbed" / "core"
WEB_MODULES = {"fastapi", "starlette", "uvicorn", "httpx", "prometheus_client", "seedbed.web"}


def _imported_modules(path: Path) -> set[str]:
    tree = ast.parse(path.read_text(encoding="utf-8"))
    names: set[str] = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            names.update(alias.name for alias in node.names)
        elif isinstance(node, ast.ImportFrom) and node.module and node.level == 0:
            names.add(node.module)
    return names


def test_core_has_no_web_imports() -> None:
    files = sorted(CORE.rglob("*.py"))
    assert files, "the core package must exist"
    offenders = {
        str(f.relative_to(CORE)): sorted(
            m
            for m in _imported_modules(f)
            if m.split(".")[0] in WEB_MODULES or m.startswith("seedbed.web")
        )
        for f in files
    }
    offenders = {k: v for k, v in offenders.items() if v}
    assert offenders == {}
