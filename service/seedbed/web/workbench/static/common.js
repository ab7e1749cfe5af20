// Shared by every workbench view: the request being worked on (kept in this tab's
// sessionStorage so it follows the user between views), calls to the service's JSON API on
// this origin, and small DOM and formatting helpers. Plain script, no build step.
"use strict";

const Bench = (() => {
  const REQUEST_KEY = "seedbed.workbench.request";
  const SOURCE_KEY = "seedbed.workbench.source";

  function el(tag, attrs, ...children) {
    const node = document.createElement(tag);
    for (const [key, value] of Object.entries(attrs || {})) {
      if (value === null || value === undefined || value === false) continue;
      if (key === "text") node.textContent = value;
      else if (key === "class") node.className = value;
      else if (key.startsWith("on")) node.addEventListener(key.slice(2), value);
      else node.setAttribute(key, value === true ? "" : String(value));
    }
    for (const child of children.flat()) {
      if (child === null || child === undefined || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  const SVG_NS = "http://www.w3.org/2000/svg";
  function svg(tag, attrs, ...children) {
    const node = document.createElementNS(SVG_NS, tag);
    for (const [key, value] of Object.entries(attrs || {})) {
      if (key === "text") node.textContent = value;
      else node.setAttribute(key, String(value));
    }
    for (const child of children.flat()) if (child) node.append(child);
    return node;
  }

  function num(value, digits = 4) {
    if (value === null || value === undefined) return "—";
    if (typeof value !== "number") return String(value);
    if (value === 0) return "0";
    const a = Math.abs(value);
    if (a >= 1e5 || a < 1e-3) return value.toExponential(digits - 1);
    return Number(value.toPrecision(digits)).toString();
  }

  function requestText() { return sessionStorage.getItem(REQUEST_KEY) || ""; }
  function source() { return sessionStorage.getItem(SOURCE_KEY) || ""; }
  function setRequest(text, from) {
    sessionStorage.setItem(REQUEST_KEY, text);
    sessionStorage.setItem(SOURCE_KEY, from || "edited by hand");
    showLoaded();
  }
  // The request as an object, or null when there is none or it is not JSON.
  function request() {
    const text = requestText();
    if (!text.trim()) return null;
    try { return JSON.parse(text); } catch (e) { return null; }
  }
  // {name, version} when the current request was opened from a recipe and not edited since.
  function recipeSource() {
    const m = /^recipe ([a-z0-9][a-z0-9._-]*) v(\d+)$/.exec(source());
    return m ? { name: m[1], version: Number(m[2]) } : null;
  }

  function showLoaded() {
    const node = document.getElementById("loaded");
    if (!node) return;
    const req = request();
    if (!req) { node.textContent = "No request loaded yet."; return; }
    const layers = Array.isArray(req.layers) ? req.layers.length : 0;
    node.textContent = `Working on: ${source() || "a request"} · ${layers} layer${layers === 1 ? "" : "s"}`;
  }

  // Calls the service on this origin. Resolves to {ok, status, data, text, problems}.
  async function api(path, options = {}) {
    const init = { method: options.method || "GET", headers: {} };
    if (options.json !== undefined) {
      init.headers["Content-Type"] = "application/json";
      init.body = JSON.stringify(options.json);
    } else if (options.body !== undefined) {
      init.body = options.body;
      if (options.contentType) init.headers["Content-Type"] = options.contentType;
    }
    if (options.bearer) init.headers["Authorization"] = "Bearer " + options.bearer;
    let response;
    try {
      response = await fetch(path, init);
    } catch (e) {
      return { ok: false, status: 0, data: null, text: "", problems: [
        { field: "(network)", code: "unreachable", message: "the service did not answer: " + e.message }] };
    }
    const type = response.headers.get("content-type") || "";
    const text = await response.text();
    let data = null;
    if (type.includes("json")) { try { data = JSON.parse(text); } catch (e) { data = null; } }
    const problems = !response.ok && data && data.error ? (data.error.problems || [data.error]) : [];
    if (!response.ok && !problems.length) {
      problems.push({ field: "(response)", code: String(response.status), message: text.slice(0, 300) });
    }
    return { ok: response.ok, status: response.status, data, text, problems };
  }

  function problemList(problems) {
    return el("ul", { class: "error" },
      problems.map((p) => el("li", {}, el("code", { text: p.field }), ": ", p.message)));
  }

  function needRequest(container) {
    if (request()) return true;
    container.replaceChildren(el("p", { class: "caution" },
      "No request yet. ", el("a", { href: "/workbench/compose", text: "Compose or load one" }), " first."));
    return false;
  }

  function busy(button, on) { if (button) button.disabled = on; }

  document.addEventListener("DOMContentLoaded", showLoaded);
  return { el, svg, num, request, requestText, setRequest, source, recipeSource, api,
           problemList, needRequest, busy, showLoaded };
})();
