// Fetch seedbed weights as safetensors and verify every tensor, with Node's standard library only.
//
//   node fetch_and_verify.mjs REQUEST.json [OUTPUT.safetensors]
//
// The server is SEEDBED_URL (default http://127.0.0.1:8600). The script POSTs the request to
// /v1/weights?format=safetensors, checks the body length against Content-Length, reads the
// 8-byte little-endian header length and the JSON header, takes the manifest from
// __metadata__["seedbed.manifest"], and recomputes the SHA-256 of each tensor's bytes. It
// prints one line per tensor and exits 0 when all match, 1 on any mismatch or damaged body,
// 2 on bad usage, 3 when the service answers with an error, 4 when it cannot be reached.
// The file is written (if asked) only after every tensor has been verified.

import { createHash } from "node:crypto";
import { readFile, writeFile, rename } from "node:fs/promises";
import process from "node:process";

const DTYPE_CODES = { float64: "F64", float32: "F32", float16: "F16", bfloat16: "BF16" };
const ITEM_SIZES = { F64: 8, F32: 4, F16: 2, BF16: 2 };

function fail(code, message) {
  console.error(`fetch_and_verify: ${message}`);
  process.exit(code);
}

async function fetchWeights(baseUrl, requestText) {
  let response;
  try {
    response = await fetch(`${baseUrl}/v1/weights?format=safetensors`, {
      method: "POST",
      headers: { "content-type": "application/json", "accept-encoding": "identity" },
      body: requestText,
    });
  } catch (err) {
    fail(4, `cannot reach ${baseUrl}: ${err.cause?.code ?? err.cause?.message ?? err.message}`);
  }
  if (!response.ok) {
    const text = await response.text();
    let detail = text;
    try {
      const e = JSON.parse(text).error;
      detail = `${e.code} [${e.field}]: ${e.message}`;
    } catch {
      // not the service's error shape; show the text as it is
    }
    fail(3, `service answered ${response.status}: ${detail}`);
  }
  let body;
  try {
    body = Buffer.from(await response.arrayBuffer());
  } catch (err) {
    fail(1, `the connection dropped mid-body (${err.cause?.code ?? err.message})`);
  }
  const declared = Number(response.headers.get("content-length"));
  if (Number.isFinite(declared) && body.length !== declared) {
    fail(1, `short body: ${body.length} of ${declared} bytes`);
  }
  return { body, etag: response.headers.get("etag") };
}

function verify(body) {
  if (body.length < 8) fail(1, "body shorter than the safetensors length prefix");
  const headerLength = body.readBigUInt64LE(0);
  if (headerLength > BigInt(body.length - 8)) fail(1, "header length runs past the body");
  const n = Number(headerLength);
  const header = JSON.parse(body.subarray(8, 8 + n).toString("utf8"));
  const manifestText = header.__metadata__?.["seedbed.manifest"];
  if (typeof manifestText !== "string") fail(1, "no seedbed manifest in __metadata__");
  const manifest = JSON.parse(manifestText);
  const data = body.subarray(8 + n);

  const listed = new Set(manifest.tensors.map((t) => t.tensor));
  const stored = Object.keys(header).filter((k) => k !== "__metadata__");
  const extra = stored.filter((k) => !listed.has(k));
  if (extra.length) fail(1, `tensors not in the manifest: ${extra.join(", ")}`);

  let bad = 0;
  let bytes = 0;
  for (const entry of manifest.tensors) {
    const info = header[entry.tensor];
    let problem = null;
    if (!info) {
      problem = "missing from the body";
    } else {
      const [start, end] = info.data_offsets;
      const count = entry.shape.reduce((a, b) => a * b, 1);
      const code = DTYPE_CODES[entry.dtype];
      const raw = data.subarray(start, end);
      const digest = createHash("sha256").update(raw).digest("hex");
      if (info.dtype !== code) problem = `dtype ${info.dtype}, manifest ${entry.dtype}`;
      else if (JSON.stringify(info.shape) !== JSON.stringify(entry.shape))
        problem = `shape ${JSON.stringify(info.shape)}, manifest ${JSON.stringify(entry.shape)}`;
      else if (end > data.length || raw.length !== count * ITEM_SIZES[code])
        problem = `${raw.length} bytes, expected ${count * ITEM_SIZES[code]}`;
      else if (digest !== entry.sha256) problem = `sha256 ${digest} != ${entry.sha256}`;
      bytes += raw.length;
    }
    if (problem) bad += 1;
    console.log(`${problem ? "BAD" : "ok "} ${entry.tensor} ${entry.dtype} [${entry.shape}]` +
      (problem ? `  (${problem})` : ""));
  }
  return { manifest, bad, bytes };
}

async function main() {
  const [requestPath, outputPath] = process.argv.slice(2);
  if (!requestPath) fail(2, "usage: node fetch_and_verify.mjs REQUEST.json [OUTPUT.safetensors]");
  let requestText;
  try {
    requestText = await readFile(requestPath, "utf8");
    JSON.parse(requestText);
  } catch (err) {
    fail(2, `cannot use ${requestPath}: ${err.message}`);
  }
  const baseUrl = (process.env.SEEDBED_URL || "http://127.0.0.1:8600").replace(/\/+$/, "");
  const { body, etag } = await fetchWeights(baseUrl, requestText);
  const { manifest, bad, bytes } = verify(body);
  const total = manifest.tensors.length;
  if (bad) {
    console.log(`MISMATCH: ${bad} of ${total} tensors do not match the manifest`);
    process.exit(1);
  }
  if (outputPath) {
    await writeFile(`${outputPath}.part`, body);
    await rename(`${outputPath}.part`, outputPath);
  }
  console.log(`all ${total} tensors verified (${bytes} bytes of values); algorithm ` +
    `${manifest.algorithm}; etag ${etag}` + (outputPath ? `; written to ${outputPath}` : ""));
}

await main();
