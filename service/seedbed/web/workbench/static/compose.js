// Compose view: write, paste, upload or load a request; check it with the service and show
// each problem beside the field it names.
"use strict";

(() => {
  const { el, api, problemList } = Bench;
  const text = document.getElementById("request-text");
  const error = document.getElementById("request-error");
  const result = document.getElementById("check-result");
  const outline = document.getElementById("outline");
  const examples = JSON.parse(document.getElementById("examples-data").textContent);

  function show(value) {
    if (typeof value === "string") return value;
    return JSON.stringify(value);
  }

  // A row path matches a problem's field when the field is the path or lies below it.
  function below(field, path) {
    return field === path || field.startsWith(path + ".") || field.startsWith(path + "[");
  }

  function card(title, prefix, object, problems, taken) {
    const rows = [];
    let cardProblems = 0;
    for (const [key, value] of Object.entries(object)) {
      if (prefix === "" && key === "layers" && Array.isArray(value)) continue;
      const path = prefix ? `${prefix}.${key}` : key;
      const mine = problems.filter((p) => !taken.has(p) && below(p.field, path));
      mine.forEach((p) => taken.add(p));
      cardProblems += mine.length;
      rows.push(el("div", { class: "field-row" + (mine.length ? " has-problem" : ""), "data-field": path },
        el("span", { class: "key", text: key }),
        el("span", { class: "mono", text: show(value) }),
        mine.map((p) => el("span", { class: "problem", role: "note" },
          p.field === path ? "" : el("code", { text: p.field + " " }), p.message))));
    }
    // Problems about a field this object lacks (a missing n_in ...) belong to the object.
    const missing = problems.filter((p) => !taken.has(p) && prefix && below(p.field, prefix));
    missing.forEach((p) => taken.add(p));
    for (const p of missing) {
      rows.push(el("div", { class: "field-row has-problem", "data-field": p.field },
        el("span", { class: "key", text: p.field.slice(prefix.length + 1) || "(this layer)" }),
        el("span", { class: "mono", text: "(not given)" }),
        el("span", { class: "problem", role: "note" }, p.message)));
    }
    cardProblems += missing.length;
    return el("section", { class: "card" + (cardProblems ? " has-problem" : ""), "aria-label": title },
      el("h3", { text: title }), rows);
  }

  function renderOutline(problems) {
    const req = Bench.request();
    outline.replaceChildren();
    if (!req || typeof req !== "object" || Array.isArray(req)) {
      outline.append(el("p", { class: "help", text: "Nothing to show until the text above is a JSON object." }));
      return;
    }
    const taken = new Set();
    const layerCards = (Array.isArray(req.layers) ? req.layers : []).map((layer, i) =>
      card(`layers[${i}] ${layer && layer.name ? "· " + layer.name : ""}`, `layers[${i}]`,
           layer && typeof layer === "object" ? layer : { "(value)": layer }, problems, taken));
    const top = card("Request", "", req, problems, taken);
    const rest = problems.filter((p) => !taken.has(p));
    outline.append(el("div", { class: "outline" },
      rest.length ? problemList(rest) : null, top, layerCards));
  }

  function load(value, from) {
    text.value = typeof value === "string" ? value : JSON.stringify(value, null, 2);
    Bench.setRequest(text.value, from);
    error.textContent = "";
    result.replaceChildren();
    renderOutline([]);
  }

  async function check() {
    error.textContent = "";
    result.replaceChildren();
    let parsed;
    try { parsed = JSON.parse(text.value); } catch (e) {
      error.textContent = "This is not JSON yet: " + e.message;
      renderOutline([]);
      return;
    }
    Bench.setRequest(text.value, Bench.source() || "edited by hand");
    result.append(el("p", { text: "Checking…" }));
    const reply = await api("/v1/plan", { method: "POST", json: parsed });
    result.replaceChildren();
    if (reply.ok) {
      const tensors = reply.data.tensors || [];
      const values = tensors.reduce((n, t) => n + t.shape.reduce((a, b) => a * b, 1), 0);
      result.append(el("p", { class: "ok" },
        `The service accepts this request: ${tensors.length} tensors, ${values.toLocaleString("en")} values. `,
        el("a", { href: "/workbench/plan", text: "Read the plan" })));
      renderOutline([]);
    } else {
      result.append(el("p", { class: "error", text:
        `The service refused the request (${reply.status}); each problem is shown beside its field below.` }));
      renderOutline(reply.problems);
    }
  }

  async function openRecipe(event) {
    event.preventDefault();
    const out = document.getElementById("open-error");
    out.textContent = "";
    const name = document.getElementById("open-name").value.trim();
    let version = document.getElementById("open-version").value.trim();
    if (!version || version === "latest") {
      const list = await api(`/v1/recipes/${encodeURIComponent(name)}`);
      if (!list.ok) { out.textContent = list.problems.map((p) => p.message).join("; "); return; }
      const versions = list.data.versions || [];
      version = String(versions[versions.length - 1].version);
    }
    const got = await api(`/v1/recipes/${encodeURIComponent(name)}/${encodeURIComponent(version)}`);
    if (!got.ok) { out.textContent = got.problems.map((p) => p.message).join("; "); return; }
    load(got.data.request, `recipe ${got.data.name} v${got.data.version}`);
    await check();
  }

  document.querySelectorAll("button.example").forEach((button) => {
    button.addEventListener("click", async () => {
      const key = button.dataset.example;
      load(examples[key], `example ${key}`);
      await check();
    });
  });
  document.getElementById("request-file").addEventListener("change", async (event) => {
    const file = event.target.files[0];
    if (!file) return;
    load(await file.text(), `file ${file.name}`);
    await check();
  });
  document.getElementById("recipe-open").addEventListener("submit", openRecipe);
  document.getElementById("compose-form").addEventListener("submit", (event) => {
    event.preventDefault();
    check();
  });
  text.addEventListener("change", () => Bench.setRequest(text.value, "edited by hand"));

  text.value = Bench.requestText();
  renderOutline([]);
})();
