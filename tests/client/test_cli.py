"""The command line (`python -m seedbed_client`) and the Node.js example, as separate processes
against a real service, with their documented exit codes."""

from __future__ import annotations

import argparse
import json
import os
import shutil
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import pytest

from seedbed_client import cli
from support.networks import greenhouse_controller, harbor_crane_monitor
from support.readback import check_digests, read_body
from support.server import RunningServer

from .conftest import ROOT, FaultyProxy, dead_url

NODE_EXAMPLE = ROOT / "client" / "examples" / "node" / "fetch_and_verify.mjs"


def run_cli(
    *args: str, env: dict[str, str] | None = None, cwd: Path | None = None
) -> subprocess.CompletedProcess[str]:
    environ = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    environ["PYTHONPATH"] = os.pathsep.join([str(ROOT / "client"), environ.get("PYTHONPATH", "")])
    environ.update(env or {})
    return subprocess.run(
        [sys.executable, "-m", "seedbed_client", *args],
        capture_output=True,
        text=True,
        env=environ,
        cwd=cwd,
        timeout=120,
    )


def run_main(capsys: pytest.CaptureFixture[str], *args: str) -> tuple[int, str, str]:
    """The same command line, in this process (cheaper than a new interpreter per call)."""
    code = cli.main(list(args))
    out, err = capsys.readouterr()
    return code, out, err


@pytest.fixture
def request_file(tmp_path: Path) -> Path:
    path = tmp_path / "crane.json"
    path.write_text(json.dumps(harbor_crane_monitor()), encoding="utf-8")
    return path


@pytest.mark.parametrize("fmt", ["json", "npz", "safetensors"])
def test_fetch_writes_a_file_the_format_library_reads(
    service: RunningServer, request_file: Path, tmp_path: Path, fmt: str
) -> None:
    out = tmp_path / "out" / f"crane.{fmt}"
    done = run_cli(
        "fetch",
        str(request_file),
        "-o",
        str(out),
        "--server",
        service.base_url,
        "--cache-dir",
        str(tmp_path / "cache"),
    )
    assert done.returncode == 0, done.stderr
    assert "verified" in done.stdout and "downloaded" in done.stdout
    payload = read_body(fmt, out.read_bytes(), tmp_path)
    check_digests(payload)  # the e2e suite's own check, with the format's library
    assert [p.name for p in out.parent.iterdir()] == [out.name]  # no temporary files left

    again = run_cli(
        "fetch",
        str(request_file),
        "-o",
        str(tmp_path / "again" / out.name),
        "--cache-dir",
        str(tmp_path / "cache"),
        "--server",
        dead_url(),
    )
    assert again.returncode == 0, again.stderr
    assert "service was not reachable" in again.stdout
    assert (tmp_path / "again" / out.name).read_bytes() == out.read_bytes()


def test_fetch_a_block_with_progress_bar(
    service: RunningServer, request_file: Path, tmp_path: Path
) -> None:
    out = tmp_path / "block.npz"
    done = run_cli(
        "fetch",
        str(request_file),
        "-o",
        str(out),
        "--tensor",
        "timeline.input_weight",
        "--rows",
        "8:40",
        "--no-cache",
        "--progress",
        "always",
        env={"SEEDBED_URL": service.base_url},
    )
    assert done.returncode == 0, done.stderr
    assert "100%" in done.stderr  # the bar was drawn on standard error and finished
    payload = read_body("npz", out.read_bytes(), tmp_path)
    assert payload.manifest["selection"] == {"tensor": "timeline.input_weight", "rows": [8, 40]}
    assert payload.shapes["timeline.input_weight"] == (32, 16)


def test_verify_reports_ok_and_mismatch(
    service: RunningServer,
    request_file: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    for fmt in ("safetensors", "npz", "json"):
        out = tmp_path / f"w.{fmt}"
        code, _, err = run_main(
            capsys,
            "fetch",
            str(request_file),
            "-o",
            str(out),
            "--server",
            service.base_url,
            "--no-cache",
        )
        assert code == 0, err
        code, stdout, err = run_main(capsys, "verify", str(out))
        assert code == 0, stdout + err
        count = len(read_body(fmt, out.read_bytes(), tmp_path).manifest["tensors"])
        assert f"all {count} tensors match" in stdout and stdout.count("ok ") == count

    damaged = tmp_path / "w.safetensors"
    data = bytearray(damaged.read_bytes())
    data[-2] ^= 0x40  # inside the last tensor's values
    damaged.write_bytes(bytes(data))
    code, stdout, _ = run_main(capsys, "verify", str(damaged))
    assert code == 1
    assert "BAD alarm.bias" in stdout and "do NOT match" in stdout

    truncated = tmp_path / "w.npz"
    truncated.write_bytes(truncated.read_bytes()[:-100])
    assert run_main(capsys, "verify", str(truncated))[0] == 1
    assert run_main(capsys, "verify", str(tmp_path / "missing.npz"))[0] == 2


def test_show_prints_a_table(service: RunningServer, tmp_path: Path) -> None:
    path = tmp_path / "greenhouse.json"
    path.write_text(json.dumps(greenhouse_controller()), encoding="utf-8")
    done = run_cli("show", str(path), "--server", service.base_url, "--width", "120")
    assert done.returncode == 0, done.stderr
    lines = done.stdout.splitlines()
    assert lines[1].split() == ["tensor", "shape", "method", "std/bound", "gain", "why"]
    row = next(line for line in lines if line.startswith("sensors.0.weight"))
    assert "40x24" in row and "he normal" in row
    assert all(len(line) <= 120 for line in lines[1:] if not line.startswith("warning"))


def test_exit_codes_for_usage_service_errors_and_unreachable(
    service: RunningServer,
    request_file: Path,
    tmp_path: Path,
    capsys: pytest.CaptureFixture[str],
) -> None:
    bad_json = tmp_path / "bad.json"
    bad_json.write_text("{not json", encoding="utf-8")
    invalid = tmp_path / "invalid.json"
    request = greenhouse_controller()
    request["layers"][0]["n_out"] = -3
    invalid.write_text(json.dumps(request), encoding="utf-8")
    out = str(tmp_path / "x.npz")
    server = ["--server", service.base_url, "--no-cache"]

    assert run_cli("fetch", str(bad_json), "-o", out, *server).returncode == 2
    assert (
        run_cli("fetch", str(request_file), "-o", str(tmp_path / "x.bin"), *server).returncode == 2
    )
    assert run_cli("fetch", str(request_file)).returncode == 2  # -o missing (argparse)
    refused = run_cli("fetch", str(invalid), "-o", out, *server)
    assert refused.returncode == 3 and "layers[0].n_out" in refused.stderr
    gone = run_cli(
        "fetch",
        str(request_file),
        "-o",
        out,
        "--server",
        dead_url(),
        "--no-cache",
        "--attempts",
        "2",
    )
    assert gone.returncode == 4 and "no usable answer after 2 attempts" in gone.stderr
    assert not Path(out).exists()


def test_fetch_through_a_tampering_proxy_exits_1(
    proxy: Callable[[list[str]], FaultyProxy], request_file: Path, tmp_path: Path
) -> None:
    flipper = proxy(["flip"])
    out = tmp_path / "never.safetensors"
    done = run_cli(
        "fetch", str(request_file), "-o", str(out), "--server", flipper.base_url, "--no-cache"
    )
    assert done.returncode == 1 and "alarm.bias" in done.stderr
    assert not out.exists() and list(tmp_path.glob("*.part")) == []


def test_register_adds_the_subcommands_to_another_parser() -> None:
    parser = argparse.ArgumentParser(prog="seedbed")
    commands = parser.add_subparsers(dest="command")
    commands.add_parser("serve")
    cli.register(commands)
    args = parser.parse_args(["verify", "some.npz"])
    assert args.command == "verify"
    assert cli.run(parser.parse_args(["serve"])) == cli.EXIT_USAGE  # not a client subcommand


def test_first_sentence_keeps_abbreviations_and_parentheses() -> None:
    text = (
        "Followed by relu: He normal; gain sqrt(2) = 1.414214 (E[relu(z)^2] = 1/2; He et al. "
        "2015, eq. 10). He: std = 0.7 (eq. 10). Third."
    )
    assert cli.first_sentence(text) == text[: text.index(" He: std")]
    assert cli.first_sentence("No full stop") == "No full stop"


# --- the Node.js example ---------------------------------------------------------------------


def _node() -> str:
    node = shutil.which("node")
    if node is None:
        if os.environ.get("SEEDBED_REQUIRE_ORACLES") == "1":
            pytest.fail("node is required in CI for the Node.js client example")
        pytest.skip("node is not installed")
    return node


def _run_node(base_url: str, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [_node(), str(NODE_EXAMPLE), *args],
        capture_output=True,
        text=True,
        env={**os.environ, "SEEDBED_URL": base_url},
        timeout=120,
    )


def test_node_example_fetches_and_verifies(
    service: RunningServer, request_file: Path, tmp_path: Path
) -> None:
    out = tmp_path / "node.safetensors"
    done = _run_node(service.base_url, str(request_file), str(out))
    assert done.returncode == 0, done.stdout + done.stderr
    payload = read_body("safetensors", out.read_bytes(), tmp_path)
    check_digests(payload)
    count = len(payload.manifest["tensors"])
    assert [line[:3] for line in done.stdout.splitlines()[:-1]] == ["ok "] * count
    assert f"all {count} tensors verified" in done.stdout


def test_node_example_exit_codes(
    service: RunningServer,
    proxy: Callable[[list[str]], FaultyProxy],
    request_file: Path,
    tmp_path: Path,
) -> None:
    flipped = _run_node(proxy(["flip"]).base_url, str(request_file))
    assert flipped.returncode == 1 and "BAD alarm.bias" in flipped.stdout
    cut = _run_node(proxy(["cut"]).base_url, str(request_file))
    assert cut.returncode == 1, cut.stdout + cut.stderr
    invalid = tmp_path / "invalid.json"
    invalid.write_text(json.dumps({"seed": 1, "layers": []}), encoding="utf-8")
    refused = _run_node(service.base_url, str(invalid))
    assert refused.returncode == 3 and "[layers]" in refused.stderr
    assert _run_node(dead_url(), str(request_file)).returncode == 4
    assert _run_node(service.base_url).returncode == 2


def test_python_example_runs(service: RunningServer, tmp_path: Path) -> None:
    environ = {k: v for k, v in os.environ.items() if not k.startswith("SEEDBED_")}
    environ["PYTHONPATH"] = str(ROOT / "client")
    environ["SEEDBED_CACHE_DIR"] = str(tmp_path / "cache")
    done = subprocess.run(
        [
            sys.executable,
            str(ROOT / "client" / "examples" / "frost_alarm.py"),
            "--server",
            service.base_url,
        ],
        capture_output=True,
        text=True,
        env=environ,
        timeout=120,
    )
    assert done.returncode == 0, done.stderr
    assert "weights from service" in done.stdout
    assert "sensors.0.weight" in done.stdout and "probability before training" in done.stdout
