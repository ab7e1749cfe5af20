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
from dataclasses import dataclass
from pathlib import Path

import pytest

from support.server import RunningServer

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


@dataclass(frozen=True)
class ClientOnly:
    """A virtual environment holding seedbed-client and what it requires, nothing else."""

    python: Path
    venv: Path
    home: Path  # a working directory outside the checkout
    baseline: list[str]  # what the bare environment held before the install


@pytest.fixture(scope="module")
def client_only(tmp_path_factory: pytest.TempPathFactory) -> ClientOnly:
    tmp_path = tmp_path_factory.mktemp("client-only")
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
    return ClientOnly(python, venv, tmp_path, baseline)


@pytest.mark.slow
def test_client_installs_alone_with_only_its_dependencies(client_only: ClientOnly) -> None:
    python, venv, tmp_path, baseline = (
        client_only.python,
        client_only.venv,
        client_only.home,
        client_only.baseline,
    )

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


# --- local generation in the client-only environment -------------------------------------------

# Runs inside the client-only environment against a real service: for every request of the
# table, the tensors made locally from the plan must have the service's bytes (every tensor,
# and row blocks), and the golden cases must match the committed SHA-256 values.
_LOCAL_SCRIPT = r"""
import hashlib, importlib.util, json, sys
import numpy as np
from seedbed_client import Client

for absent in ("fastapi", "pydantic", "sqlalchemy", "seedbed"):
    assert importlib.util.find_spec(absent) is None, absent + " is installed"

table = json.load(open(sys.argv[2]))
def sha(a):
    return hashlib.sha256(np.ascontiguousarray(a).reshape(-1).view(np.uint8).data).hexdigest()

checked = {"tensors": 0, "blocks": 0, "golden": 0, "platform": 0}
with Client(sys.argv[1], cache=False, limits=None) as client:
    for case in table["cases"]:
        request = case["request"]
        served = client.weights(request, format="safetensors")
        local = client.weights(request, origin="local")
        assert local.source == "local" and set(local) == set(served), case["name"]
        for name in served:
            assert local[name].dtype == served[name].dtype, (case["name"], name)
            assert sha(local[name]) == sha(served[name]), (case["name"], name)
            checked["tensors"] += 1
            golden = table["golden"].get(case["name"] + "/" + name)
            if golden is not None:
                assert sha(local[name]) == golden, (case["name"], name, "golden")
                checked["golden"] += 1
        made = client.weights(request, origin="local", platform_tensors="generate")
        checked["platform"] += len(made.platform_made)
        for name, start, stop in case["blocks"]:
            block = client.tensor(request, name, rows=(start, stop), origin="local")
            assert sha(block) == sha(client.tensor(request, name, rows=(start, stop))), name
            assert sha(block) == sha(served[name][start:stop]), name
            checked["blocks"] += 1
print(json.dumps(checked))
"""


def _policy_requests() -> list[tuple[str, dict[str, object]]]:
    """Invented networks under each depth policy that rewrites scales or adds tensors."""
    blocks = {
        "seed": "tidal-turbine/v3",
        "layers": [
            {
                "name": "stem",
                "kind": "conv",
                "channels_in": 3,
                "channels_out": 12,
                "kernel": [3, 3],
                "activation": "relu",
            },
            {
                "name": "res",
                "kind": "residual_conv_block",
                "channels": 12,
                "kernel": [3, 3],
                "repeat": 3,
            },
            {"name": "head", "kind": "dense", "n_in": 12, "n_out": 4, "role": "output"},
        ],
    }
    stack = {
        "seed": 60211,
        "dtype": "float16",
        "layout": "in_out",
        "layers": [
            {"name": "tokens", "kind": "embedding", "vocab": 50, "dim": 16},
            {
                "name": "enc",
                "kind": "transformer_block",
                "dim": 16,
                "heads": 2,
                "mlp_dim": 32,
                "norm": "pre",
                "repeat": 3,
            },
            {"name": "out", "kind": "dense", "n_in": 16, "n_out": 50, "role": "output"},
        ],
    }
    return [
        ("fixup", {**blocks, "depth_policy": {"name": "fixup"}}),
        ("skip_gate", {**blocks, "dtype": "bfloat16", "depth_policy": {"name": "skip_gate"}}),
        ("scaled_residual", {**stack, "depth_policy": {"name": "scaled_residual"}}),
        (
            "deepnorm",
            {
                **stack,
                "layout": "out_in",
                "depth_policy": {"name": "deepnorm", "architecture": "encoder"},
            },
        ),
    ]


@pytest.mark.slow
def test_local_generation_equals_the_service_without_the_service_installed(
    client_only: ClientOnly, service: RunningServer
) -> None:
    from support.golden_cases import CASES

    golden = json.loads((ROOT / "tests" / "golden" / "core_digests.json").read_text())
    cases = [{"name": name, "request": request} for name, request in CASES.items()]
    cases += [{"name": name, "request": request} for name, request in _policy_requests()]
    # Row blocks on every kind of served axis: generation order (out_in), transposed conv
    # kernels and dense matrices (in_out), embeddings, recurrent gate stacks.
    block_choice = {
        "float32-out_in": [
            ("patch.weight", 3, 11),
            ("memory.recurrent_weight", 5, 30),
            ("tokens.weight", 90, 97),
        ],
        "float64-in_out": [("patch.weight", 1, 3), ("body.weight", 7, 19), ("lift.weight", 0, 1)],
        "bfloat16-in_out": [("memory.input_weight", 2, 9), ("mixer.query.weight", 0, 5)],
        "scaled_residual": [("enc.1.mlp_in.weight", 3, 12)],
    }
    for case in cases:
        case["blocks"] = block_choice.get(case["name"], [])
    # bfloat16 rounding needs ml_dtypes, which the client's `bfloat16` extra brings; still no
    # web framework, pydantic or database layer. Installed after the closure test has looked.
    extra = _run(
        str(client_only.python), "-m", "pip", "install", "-q", "ml_dtypes", cwd=client_only.home
    )
    assert extra.returncode == 0, extra.stderr
    table = client_only.home / "table.json"
    table.write_text(json.dumps({"cases": cases, "golden": golden}), encoding="utf-8")
    done = _run(
        str(client_only.python),
        "-c",
        _LOCAL_SCRIPT,
        service.base_url,
        str(table),
        cwd=client_only.home,
        timeout=600,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    checked = json.loads(done.stdout.strip().splitlines()[-1])
    # Every golden case's non-orthogonal tensors were compared with the committed digests.
    assert checked["golden"] >= 4 * 20 and checked["blocks"] == 9
    assert checked["platform"] > 0  # orthogonal tensors exist and were marked when generated
