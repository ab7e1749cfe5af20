"""The command line behaves like other command-line tools against a real service.

Facts of the trade (common practice): a program whose output pipe closes is ended by SIGPIPE
quietly (`yes | head -1` prints no error); a program that creates a file gives it mode 0666
less the process umask (POSIX open(2) with O_CREAT).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from support.server import RunningServer

pytestmark = pytest.mark.skipif(sys.platform == "win32", reason="POSIX pipes and modes")

SEEDBED = str(Path(sys.executable).with_name("seedbed"))

# An invented network: a tide-gauge smoother, deep enough for a long table.
TIDES = {
    "seed": "tide-gauge/2",
    "layers": [
        {"name": f"smooth.{i}", "kind": "dense", "n_in": 16, "n_out": 16, "activation": "tanh"}
        for i in range(40)
    ],
}


def write_request(tmp_path: Path) -> Path:
    path = tmp_path / "tides.json"
    path.write_text(json.dumps(TIDES), encoding="utf-8")
    return path


def test_show_into_a_closed_pipe_ends_quietly(service: RunningServer, tmp_path: Path) -> None:
    request = write_request(tmp_path)
    proc = subprocess.Popen(
        [SEEDBED, "show", str(request), "--server", service.base_url],
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
    )
    assert proc.stdout is not None and proc.stderr is not None
    proc.stdout.close()  # the reader went away, as `| head -0` would
    stderr = proc.stderr.read().decode()
    proc.stderr.close()
    code = proc.wait(timeout=60)
    assert "Traceback" not in stderr and "BrokenPipe" not in stderr, stderr
    assert code == -signal.SIGPIPE, (code, stderr)


def test_fetched_files_follow_the_umask(service: RunningServer, tmp_path: Path) -> None:
    request = write_request(tmp_path)
    for umask, mode in ((0o022, 0o644), (0o002, 0o664)):
        out = tmp_path / f"w-{umask:o}.npz"
        done = subprocess.run(
            [
                "sh",
                "-c",
                f'umask {umask:o} && exec "$0" "$@"',
                SEEDBED,
                "fetch",
                str(request),
                "-o",
                str(out),
                "--server",
                service.base_url,
                "--no-cache",
            ],
            capture_output=True,
            text=True,
            timeout=120,
        )
        assert done.returncode == 0, done.stderr
        assert out.stat().st_mode & 0o777 == mode


def test_settings_say_where_each_value_comes_from() -> None:
    env = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    env["SEEDBED_URL"] = "http://tides.invalid:8600"
    done = subprocess.run(
        [SEEDBED, "settings"], capture_output=True, text=True, env=env, timeout=60
    )
    assert done.returncode == 0, done.stderr
    assert "(default; default" not in done.stdout
    assert "SEEDBED_MAX_LAYERS=4096  (default)" in done.stdout
    assert "SEEDBED_URL=http://tides.invalid:8600  (environment; default" in done.stdout
    assert "SEEDBED_CACHE_DIR=" in done.stdout and "SEEDBED_CACHE_MAX_BYTES=" in done.stdout
