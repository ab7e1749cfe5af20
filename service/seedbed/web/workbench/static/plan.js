// Plan view: the service's plan as a table with the rationale behind each row, the std of each
// weight across depth, and a histogram of a tensor's served values under its intended density.
"use strict";

(() => {
  const { el, svg, num, api, problemList } = Bench;
  const status = document.getElementById("plan-status");
  const body = document.querySelector("#plan-table tbody");
  const select = document.getElementById("sample-tensor");

  function fans(t) { return [num(t.fan_in), num(t.fan_out)]; }

  function rows(t, index) {
    const warnings = t.warnings || [];
    const main = el("tr", { "data-tensor": t.tensor },
      el("th", { scope: "row" }, el("code", { text: t.tensor })),
      el("td", { class: "mono", text: "[" + t.shape.join(", ") + "]" }),
      el("td", { text: t.method }),
      el("td", { text: t.distribution || "—" }),
      el("td", { class: "num", text: fans(t)[0] }),
      el("td", { class: "num", text: fans(t)[1] }),
      el("td", { class: "num", text: num(t.gain) }),
      el("td", { class: "num", "data-std": t.std === null ? "" : t.std, text: num(t.std) }),
      el("td", { class: "num", text: num(t.bound) }),
      el("td", { class: warnings.length ? "warn" : "" }, warnings.length ? warnings.join(" ") : "none"));
    const why = el("tr", { class: "why" }, el("td", { colspan: 10 },
      el("details", { id: `why-${index}` },
        el("summary", {}, "Why ", el("span", { class: "mono", text: t.tensor })),
        el("p", { text: t.rationale }),
        t.value !== null && t.value !== undefined ? el("p", {}, "Every value: ", num(t.value, 6)) : null,
        t.block_values ? el("p", {}, "Values per gate block: ", t.block_values.map((v) => num(v)).join(", ")) : null,
        (t.references || []).length
          ? el("div", {}, el("strong", { text: "References" }), el("ul", {}, t.references.map((r) => el("li", { text: r }))))
          : null,
        el("p", { class: "help" }, `dtype ${t.dtype} · reproducible: ${t.reproducible}`))));
    return [main, why];
  }

  function stdChart(tensors) {
    const figure = document.getElementById("std-chart");
    const caption = figure.querySelector("figcaption");
    const points = tensors.filter((t) => /weight$/.test(t.tensor) && t.std > 0);
    figure.querySelectorAll("svg, p").forEach((n) => n.remove());
    if (!points.length) { figure.prepend(el("p", { class: "help", text: "No random weights to chart." })); return; }
    const W = 560, H = 250, L = 62, R = 70, T = 14, B = 70;
    const logs = points.map((t) => Math.log10(t.std));
    let lo = Math.floor(Math.min(...logs)), hi = Math.ceil(Math.max(...logs));
    if (hi - lo < 1) { lo -= 1; hi += 1; }
    const x = (i) => L + (points.length === 1 ? (W - L - R) / 2 : (i * (W - L - R)) / (points.length - 1));
    const y = (v) => T + ((hi - Math.log10(v)) * (H - T - B)) / (hi - lo);
    const parts = [];
    for (let d = lo; d <= hi; d++) {
      parts.push(svg("line", { x1: L, x2: W - R, y1: y(10 ** d), y2: y(10 ** d), stroke: "#d7dbcf" }));
      parts.push(svg("text", { x: L - 6, y: y(10 ** d) + 4, "text-anchor": "end", "font-size": 11, fill: "#4d5a52", text: "1e" + d }));
    }
    parts.push(svg("polyline", { points: points.map((t, i) => `${x(i)},${y(t.std)}`).join(" "),
                                 fill: "none", stroke: "#2c6440", "stroke-width": 2 }));
    points.forEach((t, i) => {
      parts.push(svg("circle", { cx: x(i), cy: y(t.std), r: 4, fill: "#2c6440" },
                     svg("title", { text: `${t.tensor}: std ${num(t.std)}` })));
      const every = Math.ceil(points.length / 14);
      if (i % every === 0) {
        parts.push(svg("text", { x: x(i), y: H - B + 14, "font-size": 10, fill: "#1c2a22",
          transform: `rotate(35 ${x(i)} ${H - B + 14})`, text: t.tensor }));
      }
    });
    parts.push(svg("text", { x: 14, y: T + (H - T - B) / 2, "font-size": 11, fill: "#4d5a52",
      transform: `rotate(-90 14 ${T + (H - T - B) / 2})`, "text-anchor": "middle", text: "std (log)" }));
    const label = "Std per weight tensor, in network order: " +
      points.map((t) => `${t.tensor} ${num(t.std)}`).join("; ");
    figure.insertBefore(svg("svg", { viewBox: `0 0 ${W} ${H}`, role: "img", "aria-label": label }, parts), caption);
  }

  function histogram(doc) {
    const figure = document.getElementById("histogram");
    const caption = figure.querySelector("figcaption");
    figure.querySelectorAll("svg").forEach((n) => n.remove());
    const W = 560, H = 260, L = 50, R = 12, T = 12, B = 34;
    const edges = doc.histogram.edges, counts = doc.histogram.counts;
    const curve = doc.intended.curve;
    const top = Math.max(1, ...counts, ...(curve ? curve.y : [])) * 1.08;
    const x = (v) => L + ((v - edges[0]) * (W - L - R)) / (edges[edges.length - 1] - edges[0]);
    const y = (c) => H - B - (c * (H - T - B)) / top;
    const parts = [svg("line", { x1: L, x2: W - R, y1: H - B, y2: H - B, stroke: "#4d5a52" })];
    counts.forEach((c, i) => {
      parts.push(svg("rect", { x: x(edges[i]) + 0.5, y: y(c), width: Math.max(0.5, x(edges[i + 1]) - x(edges[i]) - 1),
                               height: H - B - y(c), fill: "#9fbf8a" },
                     svg("title", { text: `[${num(edges[i])}, ${num(edges[i + 1])}): ${c}` })));
    });
    if (curve) {
      parts.push(svg("polyline", { class: "intended", points: curve.x.map((v, i) => `${x(v)},${y(curve.y[i])}`).join(" "),
                                   fill: "none", stroke: "#7a4520", "stroke-width": 2.2 }));
    }
    if (doc.intended.law === "point") {
      // Constants and identities: the intended values are point masses, drawn as rules.
      for (const v of doc.intended.points || []) {
        parts.push(svg("line", { class: "intended", x1: x(v), x2: x(v), y1: T, y2: H - B,
                                 stroke: "#7a4520", "stroke-width": 2.2, "stroke-dasharray": "5 3" }));
      }
    }
    const ends = [edges[0], edges[edges.length - 1]];
    for (const v of (ends[0] < 0 && ends[1] > 0 ? [ends[0], 0, ends[1]] : ends)) {
      parts.push(svg("text", { x: x(v), y: H - B + 16, "text-anchor": "middle", "font-size": 11, fill: "#1c2a22", text: num(v, 3) }));
    }
    parts.push(svg("text", { x: L - 6, y: y(top / 1.08) + 4, "text-anchor": "end", "font-size": 11, fill: "#4d5a52", text: String(Math.round(top / 1.08)) }));
    const label = `Histogram of ${doc.summary.count} served values of ${doc.tensor}` +
      (curve ? `, with the intended ${doc.intended.law.replace(/_/g, " ")} density drawn over it` : "");
    figure.insertBefore(svg("svg", { viewBox: `0 0 ${W} ${H}`, role: "img", "aria-label": label }, parts), caption);
    const s = doc.summary;
    document.getElementById("sample-stats").replaceChildren(
      el("ul", { class: "stats", id: "sample-summary", "data-mean": s.mean, "data-std": s.std, "data-count": s.count },
        el("li", {}, el("strong", { text: "sampled " }), `${s.count} of ${doc.total_values} values`),
        el("li", {}, el("strong", { text: "mean " }), num(s.mean)),
        el("li", {}, el("strong", { text: "std " }), num(s.std)),
        el("li", {}, el("strong", { text: "plan std " }), num(doc.intended.std)),
        el("li", {}, el("strong", { text: "min " }), num(s.min)),
        el("li", {}, el("strong", { text: "max " }), num(s.max)),
        el("li", {}, el("strong", { text: "intended " }), doc.intended.law.replace(/_/g, " "))),
      el("p", { class: "help", text: doc.notice }));
  }

  async function sample(event) {
    if (event) event.preventDefault();
    const button = document.querySelector("#sample-form button");
    Bench.busy(button, true);
    const count = document.getElementById("sample-count").value || "4096";
    const path = `/v1/sample?tensor=${encodeURIComponent(select.value)}&values=${encodeURIComponent(count)}`;
    const reply = await api(path, { method: "POST", json: Bench.request() });
    Bench.busy(button, false);
    if (!reply.ok) { document.getElementById("sample-stats").replaceChildren(problemList(reply.problems)); return; }
    histogram(reply.data);
  }

  async function start() {
    if (!Bench.needRequest(status)) return;
    status.replaceChildren(el("p", { text: "Asking the service for the plan…" }));
    const reply = await api("/v1/plan", { method: "POST", json: Bench.request() });
    if (!reply.ok) {
      status.replaceChildren(el("p", { class: "error" }, "The service refused the request. ",
        el("a", { href: "/workbench/compose", text: "Fix it in Compose" })), problemList(reply.problems));
      return;
    }
    const plan = reply.data;
    const tensors = plan.tensors || [];
    const warnings = plan.warnings || [];
    status.replaceChildren(el("p", {}, `${tensors.length} tensors · seed `, el("code", { text: JSON.stringify(plan.seed) }),
      ` · generator `, el("code", { text: plan.algorithm })),
      ...(warnings.length ? [el("ul", { class: "caution" }, warnings.map((w) => el("li", { text: w })))] : []));
    const policy = plan.depth_policy;
    if (policy) {
      const multipliers = plan.multipliers || [];
      status.append(el("section", { class: "panel", id: "depth-policy", "aria-labelledby": "policy-h" },
        el("h2", { id: "policy-h" }, "Depth policy ", el("code", { text: policy.name })),
        el("p", { text: policy.text || "" }),
        el("p", { class: "help" }, "Parameters: ", Object.entries(policy.parameters || {})
          .map(([k, v]) => `${k} ${typeof v === "number" ? num(v, 6) : JSON.stringify(v)}`).join(" · ")),
        (policy.references || []).length ? el("ul", {}, policy.references.map((r) => el("li", { text: r }))) : "",
        multipliers.length ? el("table", {},
          el("caption", { text: "What the training script must apply besides the weights" }),
          el("thead", {}, el("tr", {}, ["Name", "Group", "Optimizer", "Value", "What it means"].map((h) => el("th", { scope: "col", text: h })))),
          el("tbody", {}, multipliers.map((m) => el("tr", {},
            el("th", { scope: "row", text: m.name }), el("td", { text: m.group || "—" }),
            el("td", { text: m.optimizer || "—" }), el("td", { class: "num", text: num(m.value, 6) }),
            el("td", { text: m.text || "" }))))) : ""));
    }
    body.replaceChildren(...tensors.flatMap(rows));
    stdChart(tensors);
    select.replaceChildren(...tensors.map((t) => el("option", { value: t.tensor, text: t.tensor })));
    const first = tensors.find((t) => t.distribution) || tensors[0];
    if (first) { select.value = first.tensor; await sample(); }
  }

  document.getElementById("sample-form").addEventListener("submit", sample);
  start();
})();
