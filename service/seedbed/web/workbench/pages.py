"""The workbench's pages, rendered on the server: headings, labelled forms and empty tables that
a small plain script per view (static/*.js) fills from the service's own JSON API.

The request being worked on lives in the tab's sessionStorage, so it follows the user from view
to view; a key is never stored: the recipes view keeps it in a variable of the open page and
sends it only to the service, with the requests that need it. Every page carries a
Content-Security-Policy that lets it talk to its own origin only: nothing it loads or sends can
leave the service.
"""

from __future__ import annotations

import json
from html import escape
from typing import Any

from fastapi import APIRouter
from fastapi.responses import HTMLResponse, RedirectResponse

from seedbed import __version__
from seedbed.core.version import ALGORITHM
from seedbed.web.workbench.assets import asset_url
from seedbed.web.workbench.examples import workbench_examples

router = APIRouter(include_in_schema=False)

BASE = "/workbench"
# (path segment, label in the navigation, page title)
VIEWS: tuple[tuple[str, str, str], ...] = (
    ("compose", "Compose", "Compose or load a request"),
    ("plan", "Plan", "Plan: every tensor and why"),
    ("signal", "Signal", "Signal through depth"),
    ("recipes", "Recipes", "Team recipes"),
    ("audit", "Audit", "Audit a weights file"),
    ("takeaway", "Take away", "Take the weights away"),
)

POLICY = (
    "default-src 'self'; img-src 'self' data: blob:; style-src 'self' 'unsafe-inline'; "
    "script-src 'self'; connect-src 'self'; object-src 'none'; base-uri 'none'; "
    "form-action 'self'; frame-ancestors 'none'"
)

# Alternatives the signal view offers to compare with the plan (each a /v1/diagnose `init`).
ALTERNATIVES: tuple[tuple[str, str, dict[str, Any]], ...] = (
    (
        "tiny uniform",
        "Uniform in [-0.01, 0.01] everywhere",
        {"method": "symmetric_uniform", "bound": 0.01},
    ),
    (
        "unit normal",
        "Normal with std 1 everywhere (no fan scaling)",
        {"method": "lecun", "distribution": "normal", "std": 1.0},
    ),
    (
        "glorot everywhere",
        "Glorot uniform, gain 1, whatever the activation",
        {"method": "glorot", "distribution": "uniform", "gain": 1.0},
    ),
    (
        "he everywhere",
        "He normal on fan-in, whatever the activation",
        {"method": "he", "distribution": "normal", "fan": "in"},
    ),
    ("all constant", "Every weight 0.05 (units stay twins)", {"method": "constant", "value": 0.05}),
)


def _json_block(element_id: str, value: Any) -> str:
    # A data block is never executed; "</" is escaped so the text cannot close the element.
    text = json.dumps(value, separators=(",", ":")).replace("</", "<\\/")
    return f'<script type="application/json" id="{element_id}">{text}</script>'


def _layout(view: str, body: str, data: str = "") -> HTMLResponse:
    label = next(title for key, _, title in VIEWS if key == view)
    links = []
    for number, (key, name, _) in enumerate(VIEWS, start=1):
        current = ' aria-current="page"' if key == view else ""
        links.append(
            f'<li><a href="{BASE}/{key}"{current}><span class="step" aria-hidden='
            f'"true">{number}</span> {escape(name)}</a></li>'
        )
    page = f"""<!doctype html>
<html lang="en">
<head>
<meta charset="utf-8">
<meta name="viewport" content="width=device-width, initial-scale=1">
<title>{escape(label)} · seedbed workbench</title>
<link rel="icon" href="{asset_url("mark.svg")}" type="image/svg+xml">
<link rel="stylesheet" href="{asset_url("workbench.css")}">
</head>
<body data-view="{view}">
<a class="skip" href="#main">Skip to the content</a>
<header class="band">
  <p class="brand"><img src="{asset_url("mark.svg")}" alt="" width="28" height="28">
    <span>seedbed <em>workbench</em></span></p>
  <nav aria-label="Workbench views"><ol class="views">{"".join(links)}</ol></nav>
  <p class="loaded" id="loaded" aria-live="polite">No request loaded yet.</p>
</header>
<main id="main" tabindex="-1">
<h1>{escape(label)}</h1>
{body}
</main>
<footer class="foot">
  <p>seedbed {escape(__version__)} · generator <code>{escape(ALGORITHM)}</code> ·
  <a href="/docs">API reference</a> · everything on this page comes from this service.</p>
</footer>
{data}
<script src="{asset_url("common.js")}"></script>
<script src="{asset_url(view + ".js")}"></script>
</body>
</html>
"""
    return HTMLResponse(
        page,
        headers={
            "Content-Security-Policy": POLICY,
            "Cache-Control": "no-cache",
            "X-Content-Type-Options": "nosniff",
        },
    )


def _compose() -> HTMLResponse:
    examples = workbench_examples()
    items = "".join(
        f'<li><button type="button" class="example" data-example="{escape(key)}">'
        f"<strong>{escape(key)}</strong> <span>{escape(summary)}</span></button></li>"
        for key, summary, _ in examples
    )
    body = f"""
<p class="lede">Describe the network's layers as JSON, or start from something that exists:
an invented example or a recipe your team published. Check it with the service, then read the
plan.</p>
<div class="columns">
<section aria-labelledby="examples-h" class="panel">
  <h2 id="examples-h">Start from an example network</h2>
  <ul class="examples">{items}</ul>
</section>
<section aria-labelledby="open-h" class="panel">
  <h2 id="open-h">Open a published recipe</h2>
  <form id="recipe-open" class="inline">
    <div class="pair"><label for="open-name">Recipe name</label>
    <input id="open-name" name="name" autocomplete="off" required
           pattern="[a-z0-9][a-z0-9._\\-]{{0,99}}" aria-describedby="open-error"></div>
    <div class="pair"><label for="open-version">Version</label>
    <input id="open-version" name="version" inputmode="numeric" placeholder="latest"
           aria-describedby="open-error"></div>
    <button type="submit">Open</button>
    <p class="error" id="open-error" role="status"></p>
  </form>
</section>
</div>
<section aria-labelledby="request-h" class="panel">
  <h2 id="request-h">The request</h2>
  <form id="compose-form">
    <label for="request-text">Request JSON</label>
    <textarea id="request-text" rows="16" spellcheck="false"
              aria-describedby="request-help request-error"></textarea>
    <p class="help" id="request-help">Fields: <code>seed</code>, <code>dtype</code>,
    <code>layout</code>, <code>layers</code> (each with <code>name</code>, <code>kind</code>
    and its sizes), optionally <code>depth_policy</code>. See the
    <a href="/docs">API reference</a>.</p>
    <p class="error" id="request-error" role="status"></p>
    <div class="actions">
      <label for="request-file" class="file-label">Upload a JSON file</label>
      <input type="file" id="request-file" accept="application/json,.json">
      <button type="submit" class="primary">Check with the service</button>
    </div>
  </form>
  <div id="check-result" aria-live="polite"></div>
</section>
<section aria-labelledby="fields-h" class="panel">
  <h2 id="fields-h">Fields as the service reads them</h2>
  <p class="help">Each field of the request. A problem the service reports is shown beside the
  field it names, in the service's words.</p>
  <div id="outline"></div>
</section>
"""
    return _layout(
        "compose",
        body,
        _json_block("examples-data", {key: request for key, _, request in examples}),
    )


def _plan() -> HTMLResponse:
    body = """
<div id="plan-status" aria-live="polite"></div>
<section aria-labelledby="tensors-h">
  <h2 id="tensors-h">Tensors</h2>
  <div class="table-wrap">
  <table id="plan-table">
    <caption>One row per tensor, in network order. Open <q>Why</q> for the rationale and its
    references.</caption>
    <thead><tr><th scope="col">Tensor</th><th scope="col">Shape</th><th scope="col">Method</th>
    <th scope="col">Distribution</th><th scope="col">Fan in</th><th scope="col">Fan out</th>
    <th scope="col">Gain</th><th scope="col">Std</th><th scope="col">Bound</th>
    <th scope="col">Warnings</th></tr></thead>
    <tbody></tbody>
  </table>
  </div>
</section>
<div class="columns">
<section aria-labelledby="depth-h" class="panel">
  <h2 id="depth-h">Std of each weight across depth</h2>
  <figure id="std-chart" class="chart"><figcaption>The std the plan gives each layer's main
  weight, in network order (log scale).</figcaption></figure>
</section>
<section aria-labelledby="hist-h" class="panel">
  <h2 id="hist-h">Served values against the intended density</h2>
  <form id="sample-form" class="inline">
    <div class="pair"><label for="sample-tensor">Tensor</label>
    <select id="sample-tensor"></select></div>
    <div class="pair"><label for="sample-count">Values</label>
    <input id="sample-count" type="number" min="1" max="65536" value="4096"></div>
    <button type="submit">Draw</button>
  </form>
  <figure id="histogram" class="chart"><figcaption>Bars: a bounded sample of the values the
  service serves for this tensor. Line: the density the plan intends.</figcaption></figure>
  <div id="sample-stats"></div>
</section>
</div>
"""
    return _layout("plan", body)


def _signal() -> HTMLResponse:
    boxes = "".join(
        f'<li><input type="checkbox" id="alt-{i}" value="{i}"{" checked" if i < 2 else ""}>'
        f'<label for="alt-{i}"><strong>{escape(label)}</strong> — {escape(text)}</label></li>'
        for i, (label, text, _) in enumerate(ALTERNATIVES)
    )
    body = f"""
<p class="caution" id="signal-notice" role="note"><strong>An estimate, not a promise.</strong>
The service pushes one seeded synthetic batch through the planned weights at initialisation;
what it shows says nothing certain about how training will go.</p>
<form id="signal-form" class="panel">
  <fieldset>
    <legend>Alternatives to compare with the plan</legend>
    <ul class="checks">{boxes}</ul>
  </fieldset>
  <fieldset>
    <legend>Your own alternative (optional)</legend>
    <div class="pair"><label for="own-label">Label</label>
    <input id="own-label" maxlength="64" autocomplete="off" placeholder="e.g. narrow normal">
    </div>
    <div class="pair"><label for="own-init">Initialisation (JSON, as a layer's init)</label>
    <input id="own-init" class="mono wide" autocomplete="off" spellcheck="false"
           placeholder='{{"method": "lecun", "distribution": "normal", "std": 0.02}}'
           aria-describedby="own-help"></div>
    <p class="help" id="own-help">Applies to every dense, conv, attention and embedding
    layer. The service's refusal, if any, is shown below in its own words.</p>
  </fieldset>
  <label for="signal-batch">Synthetic batch size</label>
  <input id="signal-batch" type="number" min="1" max="4096" value="64">
  <button type="submit" class="primary">Run the diagnosis</button>
  <p class="error" id="signal-error" role="status"></p>
</form>
<div class="side-by-side">
  <section aria-labelledby="chart-h" class="panel">
    <h2 id="chart-h">Std through depth</h2>
    <figure id="signal-chart" class="chart"></figure>
  </section>
  <section aria-labelledby="verdict-h" class="panel">
    <h2 id="verdict-h">Verdicts</h2>
    <div id="verdicts"></div>
  </section>
</div>
"""
    return _layout(
        "signal",
        body,
        _json_block(
            "alternatives-data", [{"label": label, "init": init} for label, _, init in ALTERNATIVES]
        ),
    )


def _recipes() -> HTMLResponse:
    body = """
<div class="columns">
<section aria-labelledby="list-h" class="panel">
  <h2 id="list-h">Published recipes</h2>
  <div id="recipe-list" aria-live="polite"></div>
</section>
<section aria-labelledby="versions-h" class="panel">
  <h2 id="versions-h">Versions</h2>
  <div id="version-list" aria-live="polite"><p class="help">Choose a recipe to see its
  versions.</p></div>
</section>
</div>
<section aria-labelledby="compare-h" class="panel">
  <h2 id="compare-h">Compare two versions</h2>
  <form id="compare-form" class="inline">
    <div class="pair"><label for="cmp-name">Recipe name</label>
    <input id="cmp-name" autocomplete="off" required></div>
    <div class="pair"><label for="cmp-a">Older version</label>
    <input id="cmp-a" type="number" min="1" required></div>
    <div class="pair"><label for="cmp-b">Newer version</label>
    <input id="cmp-b" type="number" min="1" required></div>
    <button type="submit" class="primary">Compare</button>
  </form>
  <div id="compare-result" aria-live="polite"></div>
</section>
<section aria-labelledby="publish-h" class="panel">
  <h2 id="publish-h">Publish the current request</h2>
  <form id="publish-form">
    <label for="pub-name">Name</label>
    <input id="pub-name" autocomplete="off" required>
    <label for="pub-description">Description</label>
    <input id="pub-description" autocomplete="off">
    <label for="pub-key">Publishing key</label>
    <input id="pub-key" type="password" autocomplete="off" required
           aria-describedby="pub-key-help">
    <p class="help" id="pub-key-help">The key stays in this page's memory, is sent only with
    the publish request, and is forgotten when you leave the page. Make one with
    <code>seedbed keys create NAME</code>.</p>
    <button type="submit" class="primary">Publish</button>
  </form>
  <div id="publish-result" aria-live="polite"></div>
</section>
"""
    return _layout("recipes", body)


def _audit() -> HTMLResponse:
    body = """
<p class="lede">Check an existing weights file: scale, twin units, constant or non-finite values,
rank; with the request, each tensor's scale against the plan. A check of a starting point, not
of a trained model.</p>
<form id="audit-form" class="panel">
  <div class="dropzone" id="dropzone">
    <label for="audit-file">Weights file (NPZ or safetensors)</label>
    <input type="file" id="audit-file"
           accept=".npz,.safetensors,application/zip,application/octet-stream">
    <p class="help">or drop the file on this box.</p>
  </div>
  <p><input type="checkbox" id="audit-with-request">
  <label for="audit-with-request">Compare with the current request</label></p>
  <button type="submit" class="primary">Audit the file</button>
  <p class="error" id="audit-error" role="status"></p>
</form>
<div id="audit-result" aria-live="polite"></div>
"""
    return _layout("audit", body)


def _takeaway() -> HTMLResponse:
    body = """
<p class="lede" id="takeaway-source">The weights of the current request, and the code that
fetches exactly the same bytes.</p>
<section aria-labelledby="download-h" class="panel">
  <h2 id="download-h">Download the weights</h2>
  <form id="download-form">
    <fieldset>
      <legend>Format</legend>
      <p class="choices">
      <input type="radio" name="format" id="fmt-safetensors" value="safetensors" checked>
      <label for="fmt-safetensors">safetensors</label>
      <input type="radio" name="format" id="fmt-npz" value="npz">
      <label for="fmt-npz">NPZ</label>
      <input type="radio" name="format" id="fmt-json" value="json">
      <label for="fmt-json">JSON</label></p>
    </fieldset>
    <button type="submit" class="primary">Download</button>
  </form>
  <p id="download-status" aria-live="polite"></p>
</section>
<div class="columns">
<section aria-labelledby="python-h" class="panel">
  <h2 id="python-h">Python client</h2>
  <pre><code id="python-snippet"></code></pre>
  <button type="button" class="copy" data-copy="python-snippet">Copy the Python snippet</button>
</section>
<section aria-labelledby="curl-h" class="panel">
  <h2 id="curl-h">curl</h2>
  <pre><code id="curl-snippet"></code></pre>
  <button type="button" class="copy" data-copy="curl-snippet">Copy the curl snippet</button>
</section>
</div>
<p id="copy-status" aria-live="polite"></p>
"""
    return _layout("takeaway", body)


_BUILDERS = {
    "compose": _compose,
    "plan": _plan,
    "signal": _signal,
    "recipes": _recipes,
    "audit": _audit,
    "takeaway": _takeaway,
}


@router.api_route("/", methods=["GET", "HEAD"])
async def root() -> RedirectResponse:
    return RedirectResponse(f"{BASE}/compose", status_code=307)


@router.api_route(BASE, methods=["GET", "HEAD"])
async def workbench_home() -> RedirectResponse:
    return RedirectResponse(f"{BASE}/compose", status_code=307)


def _page_route(view: str) -> None:
    async def page() -> HTMLResponse:
        return _BUILDERS[view]()

    page.__name__ = f"workbench_{view}"
    router.add_api_route(
        f"{BASE}/{view}", page, methods=["GET", "HEAD"], response_class=HTMLResponse
    )


for _view in _BUILDERS:
    _page_route(_view)
