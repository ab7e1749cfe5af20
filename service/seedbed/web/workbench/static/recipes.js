// Recipes view: the registry's names and versions, a comparison of two versions (request
// fields and tensor fingerprints), and publishing the current request with a key that lives
// only in this page's memory.
"use strict";

(() => {
  const { el, api, problemList } = Bench;
  const list = document.getElementById("recipe-list");
  const versions = document.getElementById("version-list");
  const compared = document.getElementById("compare-result");
  let publishingKey = null; // never written anywhere: gone when the page goes

  const enc = encodeURIComponent;
  // Reads carry the key too when the service asks for one (SEEDBED_READ_REQUIRES_KEY).
  const read = (path) => api(path, { bearer: publishingKey || undefined });

  function askForKey(where, retry) {
    const input = el("input", { id: "read-key", type: "password", autocomplete: "off", required: true });
    where.replaceChildren(el("form", { class: "inline", onsubmit: (e) => {
      e.preventDefault();
      publishingKey = input.value;
      retry();
    } },
      el("p", { class: "caution", text: "This service asks for a key to read recipes. It stays in this page's memory only." }),
      el("div", { class: "pair" }, el("label", { for: "read-key", text: "Key" }), input),
      el("button", { type: "submit", text: "Use the key" })));
  }
  const when = (iso) => (iso || "").replace("T", " ").replace(/\.\d+/, "").replace("+00:00", " UTC");

  async function loadList(after) {
    const reply = await read("/v1/recipes?limit=50" + (after ? "&after=" + enc(after) : ""));
    if (reply.status === 401) { publishingKey = null; askForKey(list, () => loadList(after)); return; }
    if (!reply.ok) { list.replaceChildren(problemList(reply.problems)); return; }
    const rows = reply.data.recipes.map((r) => el("tr", { "data-recipe": r.name },
      el("th", { scope: "row" }, el("button", { type: "button", class: "linkish", onclick: () => loadVersions(r.name), text: r.name })),
      el("td", { class: "num", text: r.latest_version }),
      el("td", { text: r.description || "—" }),
      el("td", { text: when(r.published_at) })));
    if (!after) {
      list.replaceChildren(rows.length
        ? el("table", {}, el("thead", {}, el("tr", {}, ["Name", "Latest", "Description", "Published"].map((h) => el("th", { scope: "col", text: h })))),
             el("tbody", { id: "recipe-rows" }, rows))
        : el("p", { class: "help", text: "No recipe has been published on this service yet." }));
    } else {
      document.getElementById("recipe-rows").append(...rows);
    }
    document.getElementById("more-recipes")?.remove();
    if (reply.data.next_after) {
      list.append(el("button", { type: "button", id: "more-recipes", text: "More recipes",
                                 onclick: () => loadList(reply.data.next_after) }));
    }
  }

  async function open(name, version) {
    const reply = await read(`/v1/recipes/${enc(name)}/${version}`);
    if (!reply.ok) { versions.append(problemList(reply.problems)); return; }
    Bench.setRequest(JSON.stringify(reply.data.request, null, 2), `recipe ${name} v${version}`);
    window.location.href = "/workbench/plan";
  }

  async function loadVersions(name) {
    const reply = await read(`/v1/recipes/${enc(name)}`);
    if (!reply.ok) { versions.replaceChildren(problemList(reply.problems)); return; }
    const all = reply.data.versions;
    versions.replaceChildren(el("h3", {}, "Versions of ", el("code", { text: name })),
      el("table", { id: "versions-table" },
        el("thead", {}, el("tr", {}, ["Version", "Description", "Publisher", "Published", "Use"].map((h) => el("th", { scope: "col", text: h })))),
        el("tbody", {}, all.map((v) => el("tr", {},
          el("th", { scope: "row", class: "num", text: v.version }),
          el("td", { text: v.description || "—" }),
          el("td", { text: v.publisher }),
          el("td", { text: when(v.published_at) }),
          el("td", {},
            el("button", { type: "button", onclick: () => open(name, v.version) }, "Open ", el("span", { class: "visually-hidden", text: `v${v.version}` })),
            " ", el("a", { href: `${v.links.weights}?format=safetensors`, download: `${name}-v${v.version}.safetensors` }, "safetensors")))))));
    document.getElementById("cmp-name").value = name;
    if (all.length >= 2) {
      document.getElementById("cmp-a").value = all[all.length - 2].version;
      document.getElementById("cmp-b").value = all[all.length - 1].version;
    }
  }

  // Every leaf path where two JSON values differ: [path, before, after] (undefined = absent).
  function differences(a, b, path, out) {
    const isObj = (x) => x !== null && typeof x === "object";
    if (isObj(a) && isObj(b) && Array.isArray(a) === Array.isArray(b)) {
      const keys = Array.isArray(a)
        ? [...Array(Math.max(a.length, b.length)).keys()]
        : [...new Set([...Object.keys(a), ...Object.keys(b)])].sort();
      for (const k of keys) {
        const sub = Array.isArray(a) ? `${path}[${k}]` : path ? `${path}.${k}` : k;
        differences(a[k], b[k], sub, out);
      }
    } else if (JSON.stringify(a) !== JSON.stringify(b)) {
      out.push([path, a, b]);
    }
    return out;
  }

  const shown = (v) => (v === undefined ? "(absent)" : JSON.stringify(v));

  async function compare(event) {
    event.preventDefault();
    const name = document.getElementById("cmp-name").value.trim();
    const a = document.getElementById("cmp-a").value, b = document.getElementById("cmp-b").value;
    compared.replaceChildren(el("p", { text: "Fetching both versions…" }));
    const [left, right] = await Promise.all([read(`/v1/recipes/${enc(name)}/${enc(a)}`), read(`/v1/recipes/${enc(name)}/${enc(b)}`)]);
    if (!left.ok || !right.ok) { compared.replaceChildren(problemList([...left.problems, ...right.problems])); return; }
    const fields = differences(left.data.request, right.data.request, "", []);
    const fa = left.data.fingerprints, fb = right.data.fingerprints;
    const names = [...new Set([...Object.keys(fa), ...Object.keys(fb)])];
    const tensorRows = names.map((t) => {
      const state = !(t in fa) ? "added" : !(t in fb) ? "removed" : fa[t] === fb[t] ? "same bytes" : "bytes changed";
      return el("tr", { class: state === "same bytes" ? "" : "changed", "data-tensor": t, "data-state": state },
        el("th", { scope: "row" }, el("code", { text: t })), el("td", { text: state }),
        el("td", { class: "mono", text: fa[t] ? fa[t].slice(0, 16) + "…" : "—" }),
        el("td", { class: "mono", text: fb[t] ? fb[t].slice(0, 16) + "…" : "—" }));
    });
    const changedTensors = tensorRows.filter((r) => r.dataset.state !== "same bytes").length;
    compared.replaceChildren(
      el("p", {}, `${name} v${a} → v${b}: ${fields.length} request field${fields.length === 1 ? "" : "s"} changed, ` +
        `${changedTensors} of ${names.length} tensors' bytes differ (by manifest SHA-256).`),
      el("h3", { text: "Request fields that changed" }),
      fields.length ? el("table", { id: "field-changes" },
        el("thead", {}, el("tr", {}, ["Field", `v${a}`, `v${b}`].map((h) => el("th", { scope: "col", text: h })))),
        el("tbody", {}, fields.map(([p, x, y]) => el("tr", { class: "changed", "data-field": p },
          el("th", { scope: "row" }, el("code", { text: p })), el("td", { class: "mono", text: shown(x) }), el("td", { class: "mono", text: shown(y) })))))
        : el("p", { text: "The two requests are identical." }),
      el("h3", { text: "Tensors" }),
      el("div", { class: "table-wrap" }, el("table", { id: "tensor-changes" },
        el("thead", {}, el("tr", {}, ["Tensor", "Bytes", `SHA-256 v${a}`, `SHA-256 v${b}`].map((h) => el("th", { scope: "col", text: h })))),
        el("tbody", {}, tensorRows))));
  }

  async function publish(event) {
    event.preventDefault();
    const out = document.getElementById("publish-result");
    const keyInput = document.getElementById("pub-key");
    if (keyInput.value) { publishingKey = keyInput.value; keyInput.value = ""; }
    if (!publishingKey) { out.replaceChildren(el("p", { class: "error", text: "Enter a publishing key." })); return; }
    const req = Bench.request();
    if (!req) { out.replaceChildren(el("p", { class: "error", text: "There is no current request; compose one first." })); return; }
    const body = { name: document.getElementById("pub-name").value.trim(), request: req,
                   description: document.getElementById("pub-description").value };
    const reply = await api("/v1/recipes", { method: "POST", json: body, bearer: publishingKey });
    if (reply.status === 401) publishingKey = null; // a refused key is not kept either
    if (!reply.ok) { out.replaceChildren(problemList(reply.problems)); return; }
    out.replaceChildren(el("p", { class: "ok" }, `Published ${reply.data.name} version ${reply.data.version}.`));
    keyInput.placeholder = "kept in memory for this page";
    keyInput.required = false;
    await loadList();
    await loadVersions(reply.data.name);
  }

  document.getElementById("compare-form").addEventListener("submit", compare);
  document.getElementById("publish-form").addEventListener("submit", publish);
  loadList();
})();
