// Audit view: send a weights file (optionally with the current request) to /v1/audit and show
// the report's verdict, findings and per-tensor figures.
"use strict";

(() => {
  const { el, num, api, problemList } = Bench;
  const input = document.getElementById("audit-file");
  const zone = document.getElementById("dropzone");
  const result = document.getElementById("audit-result");
  const error = document.getElementById("audit-error");
  let dropped = null;

  function report(doc) {
    const s = doc.summary;
    const kind = s.verdict === "ok" ? "good" : s.verdict === "warnings" ? "meh" : "bad";
    return [
      el("section", { class: "panel", "aria-labelledby": "summary-h" },
        el("h2", { id: "summary-h" }, "Verdict ", el("span", { class: "badge " + kind, id: "audit-verdict", text: s.verdict })),
        el("p", {}, `${doc.container} file, ${doc.file_bytes.toLocaleString("en")} bytes: ${s.tensors} tensors, ` +
          `${s.values.toLocaleString("en")} values; ${s.errors} errors, ${s.warnings} warnings, ${s.notes} notes` +
          (s.compared_with_request ? "; compared with the request." : ".")),
        el("p", { class: "help", text: doc.notice })),
      el("section", { class: "panel", "aria-labelledby": "findings-h" },
        el("h2", { id: "findings-h", text: "Findings" }),
        doc.findings.length ? el("table", { id: "findings" },
          el("thead", {}, el("tr", {}, ["Severity", "Tensor", "Kind", "What was found"].map((h) => el("th", { scope: "col", text: h })))),
          el("tbody", {}, doc.findings.map((f) => el("tr", { "data-code": f.code },
            el("td", {}, el("span", { class: "badge " + (f.severity === "error" ? "bad" : f.severity === "warning" ? "meh" : "good"), text: f.severity })),
            el("td", {}, f.tensor ? el("code", { text: f.tensor }) : "(file)"),
            el("td", {}, el("code", { text: f.code })),
            el("td", { text: f.message })))))
          : el("p", { text: "Nothing to report." })),
      el("section", { "aria-labelledby": "per-tensor-h" },
        el("h2", { id: "per-tensor-h", text: "Per tensor" }),
        el("div", { class: "table-wrap" }, el("table", {},
          el("thead", {}, el("tr", {}, ["Tensor", "dtype", "Shape", "Mean", "Std", "Min", "Max", "Planned std", "Ratio"]
            .map((h) => el("th", { scope: "col", text: h })))),
          el("tbody", {}, doc.tensors.map((t) => el("tr", {},
            el("th", { scope: "row" }, el("code", { text: t.tensor })), el("td", { text: t.dtype }),
            el("td", { class: "mono", text: "[" + t.shape.join(", ") + "]" }),
            el("td", { class: "num", text: num(t.mean) }), el("td", { class: "num", text: num(t.std) }),
            el("td", { class: "num", text: num(t.min) }), el("td", { class: "num", text: num(t.max) }),
            el("td", { class: "num", text: t.planned ? num(t.planned.recommended_std) : "—" }),
            el("td", { class: "num", text: t.planned ? num(t.planned.ratio) : "—" }))))))),
    ];
  }

  async function send(event) {
    event.preventDefault();
    error.textContent = "";
    const file = dropped || input.files[0];
    if (!file) { error.textContent = "Choose or drop a weights file first."; return; }
    const form = new FormData();
    form.append("file", file, file.name);
    if (document.getElementById("audit-with-request").checked) {
      const req = Bench.request();
      if (!req) { error.textContent = "There is no current request to compare with; compose one first."; return; }
      form.append("request", new Blob([JSON.stringify(req)], { type: "application/json" }), "request.json");
    }
    const button = document.querySelector("#audit-form button");
    Bench.busy(button, true);
    result.replaceChildren(el("p", { text: `Auditing ${file.name}…` }));
    const reply = await api("/v1/audit", { method: "POST", body: form });
    Bench.busy(button, false);
    result.replaceChildren(...(reply.ok ? report(reply.data) : [problemList(reply.problems)]));
  }

  zone.addEventListener("dragover", (e) => { e.preventDefault(); zone.classList.add("over"); });
  zone.addEventListener("dragleave", () => zone.classList.remove("over"));
  zone.addEventListener("drop", (e) => {
    e.preventDefault();
    zone.classList.remove("over");
    dropped = e.dataTransfer.files[0] || null;
    if (dropped) zone.querySelector(".help").textContent = "Dropped: " + dropped.name;
  });
  input.addEventListener("change", () => { dropped = null; });
  document.getElementById("audit-form").addEventListener("submit", send);
})();
