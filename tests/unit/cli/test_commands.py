"""The one `seedbed` command offers the service's and the client's subcommands."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np

from seedbed.cli import main


def test_help_lists_service_and_client_commands() -> None:
    out = subprocess.run(
        [sys.executable, "-m", "seedbed.cli", "--help"], check=True, capture_output=True, text=True
    ).stdout
    for command in ("serve", "plan", "settings", "fetch", "verify", "show"):
        assert command in out


def test_verify_through_the_service_command(tmp_path: Path) -> None:
    # A hand-made NPZ whose manifest lies about one digest: verify must exit 1, and 0 once the
    # digest is right. The manifest member name is the one docs/formats.md documents.
    import hashlib
    import zipfile

    good = np.arange(6, dtype="<f4").reshape(2, 3)
    path = tmp_path / "w.npz"

    def write(digest: str) -> None:
        np.savez(path, **{"a.weight": good})
        manifest = {
            "algorithm": "x",
            "tensors": [
                {"tensor": "a.weight", "shape": [2, 3], "dtype": "float32", "sha256": digest}
            ],
        }
        with zipfile.ZipFile(path, "a") as z:
            z.writestr("seedbed-manifest.json", json.dumps(manifest))

    write("0" * 64)
    assert main(["verify", str(path)]) == 1
    write(hashlib.sha256(good.tobytes()).hexdigest())
    assert main(["verify", str(path)]) == 0
