// Take-away view: download the current request's weights in a chosen format, and copy a
// Python-client or curl snippet that fetches exactly the same bytes.
"use strict";

(() => {
  const { el, api, problemList } = Bench;
  const status = document.getElementById("download-status");
  const origin = window.location.origin;

  function format() { return document.querySelector("input[name=format]:checked").value; }

  function pythonSnippet(req, fmt) {
    return [
      "import json",
      "",
      "from seedbed_client import Client",
      "",
      `request = json.loads(r"""${JSON.stringify(req, null, 4)}""")`,
      "",
      `with Client("${origin}") as client:`,
      `    # dict of tensor name -> numpy array, each checked against the manifest's SHA-256`,
      `    weights = client.weights(request, format="${fmt}")`,
    ].join("\n");
  }

  function shellQuote(text) { return "'" + text.replace(/'/g, "'\\''") + "'"; }

  function curlSnippet(req, fmt) {
    const lines = [
      `curl -sS -X POST '${origin}/v1/weights?format=${fmt}' \\`,
      "  -H 'Content-Type: application/json' \\",
      `  -d ${shellQuote(JSON.stringify(req))} \\`,
      `  -o weights.${fmt}`,
    ];
    const recipe = Bench.recipeSource();
    if (recipe) {
      lines.push("", `# the same bytes, as the published recipe ${recipe.name} v${recipe.version} (cacheable GET):`,
        `curl -sS -o ${recipe.name}-v${recipe.version}.${fmt} '${origin}/v1/recipes/${recipe.name}/${recipe.version}/weights?format=${fmt}'`);
    }
    return lines.join("\n");
  }

  function refresh() {
    const req = Bench.request();
    if (!req) return;
    const fmt = format();
    document.getElementById("python-snippet").textContent = pythonSnippet(req, fmt);
    document.getElementById("curl-snippet").textContent = curlSnippet(req, fmt);
    const recipe = Bench.recipeSource();
    document.getElementById("takeaway-source").textContent = recipe
      ? `The weights of recipe ${recipe.name} version ${recipe.version}, and the code that fetches exactly the same bytes.`
      : "The weights of the current request, and the code that fetches exactly the same bytes.";
  }

  async function download(event) {
    event.preventDefault();
    if (!Bench.needRequest(status)) return;
    const fmt = format();
    const button = document.querySelector("#download-form button");
    Bench.busy(button, true);
    status.textContent = `Generating ${fmt}…`;
    const response = await fetch(`/v1/weights?format=${fmt}`, {
      method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify(Bench.request()) });
    Bench.busy(button, false);
    if (!response.ok) {
      const reply = await response.json().catch(() => null);
      status.replaceChildren(problemList(reply && reply.error ? reply.error.problems : [{ field: "(response)", message: String(response.status) }]));
      return;
    }
    const blob = await response.blob();
    const url = URL.createObjectURL(blob);
    const link = el("a", { href: url, download: `weights.${fmt}` });
    document.body.append(link);
    link.click();
    link.remove();
    setTimeout(() => URL.revokeObjectURL(url), 60000);
    status.textContent = `Downloaded weights.${fmt} (${blob.size.toLocaleString("en")} bytes; ETag ${response.headers.get("etag")}).`;
  }

  async function copy(event) {
    const target = document.getElementById(event.currentTarget.dataset.copy);
    const out = document.getElementById("copy-status");
    try {
      await navigator.clipboard.writeText(target.textContent);
      out.textContent = "Copied.";
    } catch (e) {
      // Without clipboard permission, select the text so the keyboard's copy works.
      const range = document.createRange();
      range.selectNodeContents(target);
      const selection = window.getSelection();
      selection.removeAllRanges();
      selection.addRange(range);
      out.textContent = "Selected: press Ctrl+C (or ⌘C) to copy.";
    }
  }

  document.querySelectorAll("input[name=format]").forEach((r) => r.addEventListener("change", refresh));
  document.querySelectorAll("button.copy").forEach((b) => b.addEventListener("click", copy));
  document.getElementById("download-form").addEventListener("submit", download);
  if (Bench.needRequest(status)) refresh();
})();
