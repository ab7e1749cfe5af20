"""The shell examples in docs/http.md, run as written against a live service.

Blocks preceded by `<!-- check: NAME -->` are joined in order into one bash script; the
verification loops must report every tensor ok, the revalidation must give 304, and the error
example must name its field.
"""

from __future__ import annotations

import os
import re
import shutil
import subprocess
from pathlib import Path

import pytest

from support.server import RunningServer

from .conftest import ROOT

DOC = ROOT / "docs" / "http.md"
TOOLS = ("bash", "curl", "jq", "unzip", "od", "sha256sum", "base64")


def checked_blocks(text: str) -> list[tuple[str, str]]:
    pattern = re.compile(r"<!-- check: ([\w-]+) -->\s*```sh\n(.*?)```", re.DOTALL)
    return pattern.findall(text)


def test_http_doc_examples_run(service: RunningServer, tmp_path: Path) -> None:
    missing = [t for t in TOOLS if shutil.which(t) is None]
    if missing:
        if os.environ.get("SEEDBED_REQUIRE_ORACLES") == "1":  # CI installs them
            pytest.fail(f"shell tools missing for the docs check: {missing}")
        pytest.skip(f"shell tools missing for the docs check: {missing}")
    blocks = checked_blocks(DOC.read_text(encoding="utf-8"))
    names = [name for name, _ in blocks]
    assert names == [
        "request",
        "plan",
        "formats",
        "block",
        "etag",
        "verify-json",
        "verify-safetensors",
        "verify-npz",
        "error",
    ]
    script = "set -euo pipefail\n" + "\n".join(
        f"echo '=== {name}'\n{body}" for name, body in blocks
    )
    done = subprocess.run(
        ["bash", "-c", script],
        cwd=tmp_path,
        capture_output=True,
        text=True,
        env={**os.environ, "SEEDBED_URL": service.base_url},
        timeout=120,
    )
    assert done.returncode == 0, done.stdout + done.stderr
    sections = dict(re.findall(r"=== ([\w-]+)\n(.*?)(?==== |\Z)", done.stdout, re.DOTALL))
    tensors = [
        "spectrum.0.weight",
        "spectrum.0.bias",
        "spectrum.1.weight",
        "spectrum.1.bias",
        "verdict.weight",
        "verdict.bias",
    ]
    for name in ("verify-json", "verify-safetensors", "verify-npz"):
        assert sections[name].split() == [w for t in tensors for w in ("ok", t)], name
    assert sections["etag"].strip().endswith("-> 304")
    assert '"selection":{"rows":[8,16],"tensor":"spectrum.0.weight"}' in sections["block"]
    assert '"shape":[8,64]' in sections["block"]
    assert sections["error"].strip() == '{"status":422,"code":"out_of_range","field":"rows"}'
    assert "spectrum.0.weight  [32,64]  he" in sections["plan"]
