"""`pip install ./client` into a fresh virtual environment brings exactly seedbed-client, its
declared dependencies (httpx, numpy) and theirs: nothing of the service, no torch, no extras.

The expected set is computed inside the new environment from the installed metadata (each
distribution's Requires-Dist, markers evaluated for that interpreter, extras not requested), so
the test follows whatever httpx and numpy need on the day, and fails only when something comes
along that no requirement asked for.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from .conftest import ROOT

# Runs inside the new environment: the requirement closure of seedbed-client vs what is there.
_CLOSURE_SCRIPT = r"""
import json, re, sys
from importlib import metadata
from pip._vendor.packaging.requirements import Requirement

def norm(name):
    return re.sub(r"[-_.]+", "-", name).lower()

baseline = {norm(n) for n in json.loads(sys.argv[1])}
installed = {norm(d.metadata["Name"]) for d in metadata.distributions()}
wanted, todo = set(), ["seedbed-client"]
while todo:
    name = todo.pop()
    if name in wanted:
        continue
    wanted.add(name)
    for text in metadata.distribution(name).requires or []:
        req = Requirement(text)
        if req.marker is None or req.marker.evaluate({"extra": ""}):
            todo.append(norm(req.name))
print(json.dumps({"installed": sorted(installed - baseline), "wanted": sorted(wanted)}))
"""


def _run(*args: str, cwd: Path, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    # Outside the checkout, so nothing in it (an egg-info, the packages) is importable.
    env = {k: v for k, v in os.environ.items() if k not in ("PYTHONPATH", "VIRTUAL_ENV")}
    return subprocess.run(args, capture_output=True, text=True, env=env, cwd=cwd, timeout=timeout)


def _names(python: Path, cwd: Path) -> list[str]:
    done = _run(str(python), "-m", "pip", "list", "--format=json", cwd=cwd)
    assert done.returncode == 0, done.stderr
    return [item["name"] for item in json.loads(done.stdout)]


@pytest.mark.slow
def test_client_installs_alone_with_only_its_dependencies(tmp_path: Path) -> None:
    venv = tmp_path / "venv"
    made = _run(sys.executable, "-m", "venv", str(venv), cwd=tmp_path)
    assert made.returncode == 0, made.stderr
    python = venv / ("Scripts/python.exe" if os.name == "nt" else "bin/python")
    baseline = _names(
        python, tmp_path
    )  # pip (and setuptools on older Pythons) come with every venv

    # Installed from a copy: pip builds in the source tree, and the checkout should stay clean.
    source = tmp_path / "client-source"
    shutil.copytree(
        ROOT / "client", source, ignore=shutil.ignore_patterns("build", "*.egg-info", "__pycache__")
    )
    install = _run(str(python), "-m", "pip", "install", "-q", str(source), cwd=tmp_path)
    assert install.returncode == 0, install.stdout + install.stderr

    closure = _run(str(python), "-c", _CLOSURE_SCRIPT, json.dumps(baseline), cwd=tmp_path)
    assert closure.returncode == 0, closure.stderr
    found = json.loads(closure.stdout)
    assert found["installed"] == found["wanted"]
    assert {"seedbed-client", "httpx", "numpy"} <= set(found["installed"])
    assert not {"seedbed", "torch", "ml-dtypes", "fastapi", "pydantic"} & set(found["installed"])

    helped = _run(str(python), "-m", "seedbed_client", "--help", cwd=tmp_path)
    assert helped.returncode == 0 and "verify" in helped.stdout, helped.stderr
    api = _run(
        str(python),
        "-c",
        "import seedbed_client as s, pathlib; "
        "assert all(hasattr(s, n) for n in s.__all__); "
        "from seedbed_client import Client, NetworkSpec, DenseSpec; "
        "r = NetworkSpec(seed=1).add(DenseSpec('a', 2, 3)).to_request(); "
        "assert Client('http://127.0.0.1:1', cache=False).base_url; "
        "assert (pathlib.Path(s.__file__).parent / 'py.typed').is_file(); "
        "print(s.__file__)",
        cwd=tmp_path,
    )
    assert api.returncode == 0, api.stderr
    assert str(venv) in api.stdout  # the installed copy, not the checkout
