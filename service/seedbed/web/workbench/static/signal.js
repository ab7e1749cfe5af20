// Signal view: run /v1/diagnose for the plan and the chosen alternatives; the service's chart
// and the verdict table side by side, under the estimate's caution.
"use strict";

(() => {
  const { el, num, api, problemList } = Bench;
  const alternatives = JSON.parse(document.getElementById("alternatives-data").textContent);
  const chart = document.getElementById("signal-chart");
  const verdicts = document.getElementById("verdicts");
  const error = document.getElementById("signal-error");
  const notice = document.getElementById("signal-notice");

  function badge(verdict) {
    const kind = verdict === "stable" ? "good" : verdict === "symmetric" ? "meh" : "bad";
    return el("span", { class: "badge " + kind, text: verdict });
  }

  function table(doc) {
    return el("table", { id: "verdict-table" },
      el("caption", { text: "One row per run; the first is the plan as recommended." }),
      el("thead", {}, el("tr", {}, ["Run", "Verdict", "Where", "Why"].map((h) => el("th", { scope: "col", text: h })))),
      el("tbody", {}, doc.runs.map((run) => el("tr", { "data-run": run.label },
        el("th", { scope: "row", text: run.label }),
        el("td", {}, badge(run.verdict)),
        el("td", {}, run.failed_at ? el("code", { text: run.failed_at }) : "—",
          run.failed_ratio !== null && run.failed_ratio !== undefined ? ` (ratio ${num(run.failed_ratio)})` : ""),
        el("td", {}, run.reason, (run.verdict_notes || []).map((n) => el("p", { class: "help", text: n })))))));
  }

  async function run(event) {
    event.preventDefault();
    error.textContent = "";
    if (!Bench.needRequest(verdicts)) return;
    const chosen = [...document.querySelectorAll("#signal-form input[type=checkbox]:checked")]
      .map((box) => alternatives[Number(box.value)]);
    const ownText = document.getElementById("own-init").value.trim();
    if (ownText) {
      let init;
      try { init = JSON.parse(ownText); } catch (e) {
        error.textContent = "Your own alternative's initialisation is not JSON: " + e.message;
        return;
      }
      chosen.push({ label: document.getElementById("own-label").value.trim() || "my alternative", init });
    }
    const body = { request: Bench.request(), alternatives: chosen,
                   batch: Number(document.getElementById("signal-batch").value || 64) };
    const button = document.querySelector("#signal-form button");
    Bench.busy(button, true);
    chart.replaceChildren(el("p", { text: "Running the synthetic batch…" }));
    verdicts.replaceChildren();
    const [doc, picture] = await Promise.all([
      api("/v1/diagnose", { method: "POST", json: body }),
      api("/v1/diagnose?chart=svg", { method: "POST", json: body }),
    ]);
    Bench.busy(button, false);
    if (!doc.ok) { chart.replaceChildren(); verdicts.replaceChildren(problemList(doc.problems)); return; }
    notice.replaceChildren(el("strong", { text: "An estimate, not a promise. " }), doc.data.notice);
    verdicts.replaceChildren(table(doc.data));
    if (picture.ok) {
      // The service's own SVG, parsed as XML (never run as HTML) and placed in the page.
      const parsed = new DOMParser().parseFromString(picture.text, "image/svg+xml").documentElement;
      // Scale with the panel: a viewBox from the drawing's own size, then CSS sets the width.
      if (!parsed.getAttribute("viewBox") && parsed.getAttribute("width") && parsed.getAttribute("height")) {
        parsed.setAttribute("viewBox", `0 0 ${parseFloat(parsed.getAttribute("width"))} ${parseFloat(parsed.getAttribute("height"))}`);
      }
      parsed.removeAttribute("width");
      parsed.removeAttribute("height");
      parsed.setAttribute("role", "img");
      parsed.setAttribute("aria-label", "Activation and gradient std through depth for each run: " +
        doc.data.runs.map((r) => `${r.label} ${r.verdict}`).join(", "));
      chart.replaceChildren(document.importNode(parsed, true));
    } else {
      chart.replaceChildren(problemList(picture.problems));
    }
  }

  document.getElementById("signal-form").addEventListener("submit", run);
  Bench.needRequest(verdicts);
})();
