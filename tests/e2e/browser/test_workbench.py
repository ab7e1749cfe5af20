"""The workbench in a real headless Chromium against a real service: every view loads without a
console error or a request leaving the service's origin, and what the pages show is what the
service computes, checked against published formulas and against the served bytes."""

from __future__ import annotations

import base64
import hashlib
import io
import json
import math
import os
import shutil
import struct
import subprocess
import sys
import zipfile
from collections.abc import Callable
from pathlib import Path
from typing import Any

import httpx
import numpy as np
import pytest

from support.server import RunningServer

from .conftest import Watched

# A real browser against a real server: minutes, not seconds (CI runs them all the same).
pytestmark = pytest.mark.slow

VIEWS = ("compose", "plan", "signal", "recipes", "audit", "takeaway")
TIMEOUT_MS = 60_000


def load_example(w: Watched, key: str) -> None:
    w.goto("/workbench/compose")
    w.page.click(f"button[data-example='{key}']")
    w.page.wait_for_selector("#check-result .ok", timeout=TIMEOUT_MS)


def plan_rows(w: Watched) -> dict[str, dict[str, str]]:
    w.goto("/workbench/plan")
    w.page.wait_for_selector("#plan-table tbody tr[data-tensor]", timeout=TIMEOUT_MS)
    rows = w.page.eval_on_selector_all(
        "#plan-table tbody tr[data-tensor]",
        """rows => rows.map(r => ({tensor: r.dataset.tensor,
                                   cells: [...r.children].map(c => c.textContent.trim()),
                                   std: r.querySelector('[data-std]').dataset.std}))""",
    )
    return {r["tensor"]: {"cells": r["cells"], "std": r["std"]} for r in rows}


def test_every_view_and_the_docs_load_clean(watched: Watched) -> None:
    load_example(watched, "moisture-alarm")
    for view in VIEWS:
        watched.goto(f"/workbench/{view}")
        assert watched.page.locator("h1").count() == 1
        assert (
            watched.page.locator("nav a[aria-current='page']").get_attribute("href")
            == f"/workbench/{view}"
        )
        # Every form control has a label a screen reader can announce.
        unlabeled = watched.page.eval_on_selector_all(
            "input:not([type=hidden]), select, textarea",
            "els => els.filter(e => !e.labels || e.labels.length === 0).map(e => e.id)",
        )
        assert unlabeled == [], f"{view}: controls without a label: {unlabeled}"
    watched.goto("/")
    assert watched.page.url.endswith("/workbench/compose")
    # The keyboard's first stop skips the navigation straight to the content.
    watched.page.keyboard.press("Tab")
    assert watched.page.evaluate("document.activeElement.textContent") == "Skip to the content"
    watched.page.keyboard.press("Enter")
    assert watched.page.evaluate("document.activeElement.id") == "main"
    watched.goto("/docs")
    watched.page.wait_for_selector(".swagger-ui .opblock", timeout=TIMEOUT_MS)
    assert "seedbed" in watched.page.title()
    watched.shot("docs", full_page=False)
    watched.assert_clean()


def test_tour_plan_shows_the_documented_std(watched: Watched) -> None:
    from scipy import integrate

    load_example(watched, "moisture-alarm")
    rows = plan_rows(watched)
    # He et al. 2015, eq. 10: std = sqrt(2 / fan_in) for a ReLU layer, fan_in 64.
    assert float(rows["sense.weight"]["std"]) == pytest.approx(math.sqrt(2 / 64), rel=1e-12)
    assert rows["sense.weight"]["cells"][2:4] == ["he", "normal"]
    assert rows["sense.weight"]["cells"][7] == "0.1768"
    # Glorot & Bengio 2010, eq. 12 times tanh's variance-preserving gain 1/sqrt(E[tanh(z)^2]),
    # z ~ N(0, 1), integrated here with scipy as the oracle.
    second_moment, _ = integrate.quad(
        lambda z: math.tanh(z) ** 2 * math.exp(-z * z / 2) / math.sqrt(2 * math.pi), -40, 40
    )
    tanh_gain = 1 / math.sqrt(second_moment)
    assert float(rows["mix.weight"]["std"]) == pytest.approx(
        tanh_gain * math.sqrt(2 / (128 + 128)), rel=1e-6
    )
    assert rows["mix.weight"]["cells"][2:4] == ["glorot", "uniform"]
    # The output layer: Glorot with gain 1, fans 128 and 1.
    assert float(rows["alarm.weight"]["std"]) == pytest.approx(math.sqrt(2 / 129), rel=1e-12)
    # Lin et al. 2017, sec. 4.1: the prior bias -log((1 - pi) / pi), pi = 0.02.
    watched.page.click("tr[data-tensor='alarm.bias'] + tr.why summary")
    why = watched.page.inner_text("tr[data-tensor='alarm.bias'] + tr.why details")
    assert "Every value: " + f"{math.log(0.02 / 0.98):.6g}"[:5] in why
    # The rationale opens, and cites its source.
    watched.page.click("tr[data-tensor='sense.weight'] + tr.why summary")
    opened = watched.page.inner_text("tr[data-tensor='sense.weight'] + tr.why details")
    assert "He et al. 2015" in opened
    # The std-per-layer chart has one point per weight tensor.
    assert watched.page.locator("#std-chart svg circle").count() == 3
    watched.page.wait_for_selector("#sample-summary", timeout=TIMEOUT_MS)
    watched.shot("plan")
    watched.assert_clean()


def _served_tensor(base_url: str, request: dict[str, Any], name: str) -> np.ndarray:
    with httpx.Client(base_url=base_url, timeout=60) as http:
        r = http.post("/v1/weights", params={"format": "npz", "tensor": name}, json=request)
    assert r.status_code == 200, r.text
    with np.load(io.BytesIO(r.content)) as npz:
        key = next(k for k in npz.files if k.startswith(name))
        return np.asarray(npz[key])


def test_histogram_sample_matches_the_served_tensor(
    watched: Watched, bench_server: RunningServer
) -> None:
    load_example(watched, "moisture-alarm")
    request = json.loads(
        watched.page.evaluate("sessionStorage.getItem('seedbed.workbench.request')")
    )
    plan_rows(watched)
    watched.page.select_option("#sample-tensor", "mix.weight")
    watched.page.fill("#sample-count", "4096")
    with watched.page.expect_response("**/v1/sample?*") as reply:
        watched.page.click("#sample-form button")
    sample = reply.value.json()
    watched.page.wait_for_selector("#sample-summary[data-count='4096']", timeout=TIMEOUT_MS)
    shown = watched.page.eval_on_selector("#sample-summary", "e => ({...e.dataset})")

    full = _served_tensor(bench_server.base_url, request, "mix.weight").astype(np.float64)
    # The sample is the served values themselves, at the rows it says it read.
    per_row = sample["values_per_row"]
    expected = np.concatenate([full[a:b, :per_row].reshape(-1) for a, b in sample["blocks"]])
    assert np.array_equal(np.asarray(sample["values"]), expected)
    assert float(shown["mean"]) == pytest.approx(expected.mean(), abs=1e-15)
    assert float(shown["std"]) == pytest.approx(expected.std(), rel=1e-12)
    # ... and its statistics agree with the whole tensor's within 5 standard errors: for a
    # uniform law the std of the sample std is sigma * sqrt((kurtosis - 1) / (4 n)) with
    # kurtosis 9/5 (standard result), and the mean's is sigma / sqrt(n).
    n, sigma = len(expected), full.std()
    assert abs(float(shown["std"]) - sigma) < 5 * sigma * math.sqrt(0.8 / (4 * n))
    assert abs(float(shown["mean"]) - full.mean()) < 5 * sigma / math.sqrt(n)
    # The bars hold every sampled value and the intended density is drawn over them.
    assert sum(sample["histogram"]["counts"]) == n
    assert watched.page.locator("#histogram svg rect").count() == len(sample["histogram"]["counts"])
    assert watched.page.locator("#histogram svg polyline.intended").count() == 1
    assert sample["intended"]["law"] == "uniform"
    watched.shot("histogram")
    watched.assert_clean()


def test_histogram_of_a_constant_shows_its_point_mass(watched: Watched) -> None:
    load_example(watched, "moisture-alarm")
    plan_rows(watched)
    watched.page.select_option("#sample-tensor", "alarm.bias")
    watched.page.click("#sample-form button")
    watched.page.wait_for_selector("#sample-summary[data-count='1']", timeout=TIMEOUT_MS)
    shown = watched.page.eval_on_selector("#sample-summary", "e => ({...e.dataset})")
    # Lin et al. 2017, sec. 4.1: b = -log((1 - pi) / pi) with pi = 0.02, served as float32.
    assert float(shown["mean"]) == float(np.float32(math.log(0.02 / 0.98)))
    assert watched.page.locator("#histogram svg line.intended").count() == 1
    watched.assert_clean()


def test_diagnose_renders_its_chart_beside_the_verdicts(
    watched: Watched, bench_server: RunningServer
) -> None:
    load_example(watched, "beehive-acoustics")
    watched.goto("/workbench/signal")
    watched.page.click("#signal-form button[type=submit]")
    watched.page.wait_for_selector("#verdict-table tbody tr", timeout=TIMEOUT_MS)
    assert watched.page.locator("#signal-chart svg polyline, #signal-chart svg path").count() > 0
    verdicts = dict(
        watched.page.eval_on_selector_all(
            "#verdict-table tbody tr",
            "rows => rows.map(r => [r.dataset.run, r.querySelector('.badge').textContent])",
        )
    )
    # The He-scaled ReLU stack keeps its scale (He et al. 2015, eq. 10); a +-0.01 uniform start
    # shrinks the signal by sqrt(160 * 0.01^2 / 3 / 2) ~ 0.07 per layer: it vanishes.
    assert verdicts["recommended"] == "stable"
    assert verdicts["tiny uniform"] == "vanishing"
    caution = watched.page.locator("#signal-notice")
    assert caution.is_visible()
    assert "not" in caution.inner_text() and "synthetic batch" in caution.inner_text()
    watched.shot("signal")
    watched.assert_clean()


def test_signal_runs_an_alternative_of_ones_own(watched: Watched) -> None:
    load_example(watched, "beehive-acoustics")
    watched.goto("/workbench/signal")
    for box in watched.page.locator("#signal-form input[type=checkbox]").all():
        box.uncheck()
    # Refused by the service (a bound with a normal distribution): its words, its field.
    watched.page.fill("#own-label", "narrow")
    watched.page.fill("#own-init", '{"method": "he", "distribution": "normal", "bound": 0.1}')
    with watched.page.expect_response("**/v1/diagnose") as reply:
        watched.page.click("#signal-form button[type=submit]")
    problem = reply.value.json()["error"]["problems"][0]
    watched.page.wait_for_selector("#verdicts ul.error", timeout=TIMEOUT_MS)
    assert problem["message"] in watched.page.inner_text("#verdicts")
    assert problem["field"] in watched.page.inner_text("#verdicts")
    # Accepted: a std of 0.02 everywhere, far below He's sqrt(2/160) = 0.11 (He et al. 2015,
    # eq. 10), shrinks a ReLU signal by about 0.02 * sqrt(160 / 2) ~ 0.18 per layer.
    watched.page.fill("#own-init", '{"method": "lecun", "distribution": "normal", "std": 0.02}')
    watched.page.click("#signal-form button[type=submit]")
    watched.page.wait_for_selector("#verdict-table tr[data-run='narrow']", timeout=TIMEOUT_MS)
    verdict = watched.page.inner_text("#verdict-table tr[data-run='narrow'] .badge")
    assert verdict == "vanishing"
    watched.assert_clean(refused=422)


def test_depth_policy_and_its_scales_show_in_the_plan(watched: Watched) -> None:
    load_example(watched, "harbour-radio")
    rows = plan_rows(watched)
    assert "scaled_residual" in watched.page.inner_text("#depth-policy")
    # Radford et al. 2019, sec. 2.3: residual output maps at 0.02 / sqrt(N), N = 12 residual
    # layers (two per block, six blocks); other weights at the common-practice 0.02.
    residual = [t for t in rows if t.endswith(("attn.output.weight", "mlp_out.weight"))]
    assert len(residual) == 12
    for name in residual:
        assert float(rows[name]["std"]) == pytest.approx(0.02 / math.sqrt(12), rel=1e-12)
    # One point per weight tensor in the chart, whatever the depth.
    weights = [t for t in rows if t.endswith("weight")]
    assert watched.page.locator("#std-chart svg circle").count() == len(weights)
    watched.assert_clean()


def _key(server: RunningServer) -> str:
    done = subprocess.run(
        [sys.executable, "-m", "seedbed.cli", "keys", "create", "browser-tests"],
        env=server.environment,
        cwd=Path(server.environment["SEEDBED_DATA_DIR"]),
        capture_output=True,
        text=True,
        timeout=60,
        check=False,
    )
    assert done.returncode == 0, done.stderr
    return done.stdout.strip().splitlines()[-1].strip()


def test_recipe_comparison_shows_the_changed_field_and_tensor(
    watched: Watched, bench_server: RunningServer
) -> None:
    key = _key(bench_server)
    load_example(watched, "moisture-alarm")
    first = json.loads(watched.page.evaluate("sessionStorage.getItem('seedbed.workbench.request')"))
    with httpx.Client(base_url=bench_server.base_url, timeout=60) as http:
        r = http.post(
            "/v1/recipes",
            json={"name": "moisture-alarm", "request": first},
            headers={"Authorization": f"Bearer {key}"},
        )
        assert r.status_code == 201, r.text
    # Version 2 through the page: the mixing layer becomes ReLU, published with the key typed
    # into the form.
    second = json.loads(json.dumps(first))
    second["layers"][1]["activation"] = "relu"
    watched.goto("/workbench/compose")
    watched.page.fill("#request-text", json.dumps(second, indent=2))
    watched.page.click("#compose-form button[type=submit]")
    watched.page.wait_for_selector("#check-result .ok", timeout=TIMEOUT_MS)
    watched.goto("/workbench/recipes")
    watched.page.fill("#pub-name", "moisture-alarm")
    watched.page.fill("#pub-description", "mixing layer on ReLU")
    watched.page.fill("#pub-key", key)
    watched.page.click("#publish-form button")
    watched.page.wait_for_selector("#publish-result .ok", timeout=TIMEOUT_MS)
    storage = watched.page.evaluate("JSON.stringify({...sessionStorage, ...localStorage})")
    assert key not in storage, "the publishing key was written to browser storage"
    assert watched.page.input_value("#pub-key") == ""

    watched.page.click("#compare-form button")
    watched.page.wait_for_selector("#tensor-changes tbody tr", timeout=TIMEOUT_MS)
    fields = watched.page.eval_on_selector_all(
        "#field-changes tbody tr", "rows => rows.map(r => r.dataset.field)"
    )
    assert fields == ["layers[1].activation"]
    states = dict(
        watched.page.eval_on_selector_all(
            "#tensor-changes tbody tr", "rows => rows.map(r => [r.dataset.tensor, r.dataset.state])"
        )
    )
    # The stored fingerprints are the oracle: exactly the tensors whose SHA-256 differ changed.
    with httpx.Client(base_url=bench_server.base_url, timeout=60) as http:
        v1 = http.get("/v1/recipes/moisture-alarm/1").json()["fingerprints"]
        stored = http.get("/v1/recipes/moisture-alarm/2").json()
    v2, v2_request = stored["fingerprints"], stored["request"]
    assert states == {t: ("same bytes" if v1[t] == v2[t] else "bytes changed") for t in v1}
    # A tensor's values depend only on its own spec: only the mixing weight changes.
    assert states["mix.weight"] == "bytes changed"
    assert states["sense.weight"] == "same bytes"
    watched.shot("recipes")

    # Open version 2 by name from the compose view; the take-away view then offers the
    # recipe's own cacheable URL too.
    watched.goto("/workbench/compose")
    watched.page.fill("#open-name", "moisture-alarm")
    watched.page.fill("#open-version", "2")
    watched.page.click("#recipe-open button")
    watched.page.wait_for_selector("#check-result .ok", timeout=TIMEOUT_MS)
    assert json.loads(watched.page.input_value("#request-text")) == v2_request
    assert "recipe moisture-alarm v2" in watched.page.inner_text("#loaded")
    watched.goto("/workbench/takeaway")
    assert "/v1/recipes/moisture-alarm/2/weights?format=safetensors" in (
        watched.page.inner_text("#curl-snippet")
    )
    watched.assert_clean()


def test_audit_upload_shows_its_findings(
    watched: Watched, bench_server: RunningServer, tmp_path: Path
) -> None:
    # An invented broken checkpoint: every weight equal, so all units compute the same thing
    # (constant weights keep units symmetric: common practice), beside a healthy bias.
    path = tmp_path / "stuck.npz"
    np.savez(
        path,
        **{
            "sense.weight": np.full((128, 64), 0.05, dtype=np.float32),
            "sense.bias": np.zeros(128, dtype=np.float32),
        },
    )
    with httpx.Client(base_url=bench_server.base_url, timeout=60) as http:
        direct = http.post(
            "/v1/audit", content=path.read_bytes(), headers={"Content-Type": "application/zip"}
        ).json()
    watched.goto("/workbench/audit")
    watched.page.set_input_files("#audit-file", str(path))
    watched.page.click("#audit-form button")
    watched.page.wait_for_selector("#audit-verdict", timeout=TIMEOUT_MS)
    codes = watched.page.eval_on_selector_all(
        "#findings tbody tr", "rows => rows.map(r => r.dataset.code)"
    )
    assert codes == [f["code"] for f in direct["findings"]]
    assert "all_constant" in codes
    assert watched.page.inner_text("#audit-verdict") == direct["summary"]["verdict"]
    watched.shot("audit")
    watched.assert_clean()


def test_audit_against_the_current_request(
    watched: Watched, bench_server: RunningServer, tmp_path: Path
) -> None:
    load_example(watched, "moisture-alarm")
    request = json.loads(
        watched.page.evaluate("sessionStorage.getItem('seedbed.workbench.request')")
    )
    with httpx.Client(base_url=bench_server.base_url, timeout=60) as http:
        served = http.post("/v1/weights", params={"format": "npz"}, json=request)
    with np.load(io.BytesIO(served.content)) as npz:
        arrays = {
            name: np.array(npz[name]) for name in npz.files if name.endswith(("weight", "bias"))
        }
    # Someone scaled the first layer by ten after fetching it: ten times the He std.
    arrays["sense.weight"] = arrays["sense.weight"] * 10
    path = tmp_path / "rescaled.npz"
    np.savez(path, **arrays)
    watched.goto("/workbench/audit")
    # Dropped on the box this time, as a file dragged from a desktop would be.
    transfer = watched.page.evaluate_handle(
        """([name, b64]) => {
            const bytes = Uint8Array.from(atob(b64), (c) => c.charCodeAt(0));
            const dt = new DataTransfer();
            dt.items.add(new File([bytes], name));
            return dt;
        }""",
        ["rescaled.npz", base64.b64encode(path.read_bytes()).decode("ascii")],
    )
    watched.page.dispatch_event("#dropzone", "drop", {"dataTransfer": transfer})
    assert "rescaled.npz" in watched.page.inner_text("#dropzone")
    watched.page.check("#audit-with-request")
    watched.page.click("#audit-form button")
    watched.page.wait_for_selector("#audit-verdict", timeout=TIMEOUT_MS)
    flagged = watched.page.eval_on_selector_all(
        "#findings tbody tr", "rows => rows.map(r => [r.dataset.code, r.cells[1].textContent])"
    )
    assert ["scale_too_large", "sense.weight"] in flagged
    assert "compared with the request" in watched.page.inner_text("#audit-result")
    watched.assert_clean()


def _safetensors_manifest(data: bytes) -> tuple[dict[str, Any], dict[str, bytes]]:
    (length,) = struct.unpack("<Q", data[:8])
    header = json.loads(data[8 : 8 + length])
    manifest = json.loads(header["__metadata__"]["seedbed.manifest"])
    raw = {
        name: data[8 + length + entry["data_offsets"][0] : 8 + length + entry["data_offsets"][1]]
        for name, entry in header.items()
        if name != "__metadata__"
    }
    return manifest, raw


@pytest.mark.parametrize("fmt", ["safetensors", "npz", "json"])
def test_downloaded_file_verifies_against_its_manifest(
    watched: Watched, fmt: str, tmp_path: Path
) -> None:
    load_example(watched, "moisture-alarm")
    watched.goto("/workbench/takeaway")
    watched.page.check(f"#fmt-{fmt}")
    snippet = watched.page.inner_text("#curl-snippet")
    assert f"/v1/weights?format={fmt}" in snippet
    assert f'format="{fmt}"' in watched.page.inner_text("#python-snippet")
    with watched.page.expect_download(timeout=TIMEOUT_MS) as pending:
        watched.page.click("#download-form button")
    data = Path(pending.value.path()).read_bytes()
    if fmt == "safetensors":
        from safetensors.numpy import load

        manifest, raw = _safetensors_manifest(data)
        arrays = load(data)  # the format's own reader accepts the file
        assert set(arrays) == set(raw)
    elif fmt == "json":
        manifest = json.loads(data)
        raw = {e["tensor"]: base64.b64decode(e["data"], validate=True) for e in manifest["tensors"]}
    else:
        with zipfile.ZipFile(io.BytesIO(data)) as zf:
            manifest = json.loads(zf.read("seedbed-manifest.json"))
        with np.load(io.BytesIO(data)) as npz:
            arrays = {e["tensor"]: npz[e["tensor"]] for e in manifest["tensors"]}
        raw = {
            name: np.ascontiguousarray(a).astype(a.dtype.newbyteorder("<")).tobytes()
            for name, a in arrays.items()
        }
    assert {e["tensor"] for e in manifest["tensors"]} == set(raw)
    for entry in manifest["tensors"]:
        assert hashlib.sha256(raw[entry["tensor"]]).hexdigest() == entry["sha256"]
    watched.shot(f"takeaway-{fmt}")
    watched.assert_clean()

    # The command line's own check accepts the file (exit code 0: every tensor matches).
    saved = tmp_path / f"downloaded.{fmt}"
    saved.write_bytes(data)
    verified = subprocess.run(
        [sys.executable, "-m", "seedbed.cli", "verify", str(saved)],
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert verified.returncode == 0, verified.stdout + verified.stderr

    # The copy buttons put exactly the snippets on the clipboard.
    for which in ("python", "curl"):
        watched.page.evaluate("document.getElementById('copy-status').textContent = ''")
        watched.page.click(f"button[data-copy='{which}-snippet']")
        watched.page.wait_for_selector("#copy-status:has-text('Copied')", timeout=TIMEOUT_MS)
        copied = watched.page.evaluate("navigator.clipboard.readText()")
        assert copied == watched.page.eval_on_selector(f"#{which}-snippet", "e => e.textContent")

    # The snippets on screen fetch exactly these bytes: run them as a user would paste them.
    digests = {e["tensor"]: e["sha256"] for e in manifest["tensors"]}
    python = watched.page.inner_text("#python-snippet") + (
        "\nimport hashlib as _h, json as _j\n"
        "print(_j.dumps({k: _h.sha256(v.tobytes()).hexdigest() for k, v in weights.items()}))\n"
    )
    # The client's cache goes to the test's folder, not the user's.
    env = {**os.environ, "SEEDBED_CACHE_DIR": str(tmp_path / "cache")}
    ran = subprocess.run(
        [sys.executable, "-c", python],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=tmp_path,
        env=env,
        check=False,
    )
    assert ran.returncode == 0, ran.stderr
    assert json.loads(ran.stdout.strip().splitlines()[-1]) == digests
    if shutil.which("curl") is not None:
        shell = subprocess.run(
            ["bash", "-c", snippet],
            capture_output=True,
            text=True,
            timeout=120,
            cwd=tmp_path,
            check=False,
        )
        assert shell.returncode == 0, shell.stderr
        assert (tmp_path / f"weights.{fmt}").read_bytes() == data


def test_compose_reads_an_uploaded_file(watched: Watched, tmp_path: Path) -> None:
    from support import networks

    path = tmp_path / "controller.json"
    path.write_text(json.dumps(networks.greenhouse_controller()))
    watched.goto("/workbench/compose")
    watched.page.set_input_files("#request-file", str(path))
    watched.page.wait_for_selector("#check-result .ok", timeout=TIMEOUT_MS)
    assert json.loads(watched.page.input_value("#request-text")) == (
        networks.greenhouse_controller()
    )
    assert "file controller.json" in watched.page.inner_text("#loaded")
    watched.assert_clean()


def test_compose_shows_each_problem_beside_its_field(watched: Watched) -> None:
    watched.goto("/workbench/compose")
    bad = {
        "seed": 7,
        "dtpe": "float32",
        "layers": [
            {"name": "sense", "kind": "dense", "n_in": -64, "n_out": 128, "activation": "relux"}
        ],
    }
    watched.page.fill("#request-text", json.dumps(bad, indent=2))
    with watched.page.expect_response("**/v1/plan") as reply:
        watched.page.click("#compose-form button[type=submit]")
    problems = reply.value.json()["error"]["problems"]
    watched.page.wait_for_selector("#outline .field-row.has-problem", timeout=TIMEOUT_MS)
    for p in problems:
        row = watched.page.locator(f"#outline .field-row[data-field='{p['field']}']")
        assert row.count() == 1, f"no row for {p['field']}"
        assert p["message"] in row.inner_text()
    watched.shot("compose")
    watched.assert_clean(refused=422)


def test_recipes_behind_a_read_key_ask_for_it(
    browser_context: Any, server_factory: Callable[..., RunningServer]
) -> None:
    guarded = server_factory({"SEEDBED_READ_REQUIRES_KEY": "1"})
    key = _key(guarded)
    with httpx.Client(base_url=guarded.base_url, timeout=60) as http:
        r = http.post(
            "/v1/recipes",
            json={
                "name": "quiet-orchard",
                "request": {
                    "seed": 3,
                    "layers": [
                        {"name": "count", "kind": "dense", "n_in": 4, "n_out": 1, "role": "output"}
                    ],
                },
            },
            headers={"Authorization": f"Bearer {key}"},
        )
        assert r.status_code == 201, r.text
    page = browser_context.new_page()
    try:
        page.goto(guarded.base_url + "/workbench/recipes", wait_until="networkidle")
        page.fill("#read-key", key)
        page.click("#recipe-list button[type=submit]")
        page.wait_for_selector("#recipe-list tr[data-recipe='quiet-orchard']", timeout=TIMEOUT_MS)
        stored = page.evaluate("JSON.stringify({...sessionStorage, ...localStorage})")
        assert key not in stored
    finally:
        page.close()
