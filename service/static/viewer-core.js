// geotween viewer, shared core: the page's state, requests to this service's /v1 endpoints,
// messages, DOM helpers and the wording of a frame's confidence. Frames are synthesized, not captured.

export const state = {
  model: null,       // GET /v1/models/{name} answer
  version: null,     // the version chosen (null: latest)
  bank: null,        // GET /v1/models/{name}/map answer
  answer: null,      // last between answer
  loads: 0,          // model choices made so far (only the latest one's answers are used)
  route: null,       // map points of the last route: {start, end, frames: [...]}
  current: 0,        // frame shown in playback (0-based)
  timer: null,
  images: { start: null, end: null },  // data URLs of dropped or chosen images
};

export const $ = (id) => document.getElementById(id);

// -- requests ----------------------------------------------------------------------------
export async function api(path, options) {
  let response;
  try {
    response = await fetch(path, options);
  } catch (err) {
    throw new Error("the service did not answer (" + err.message + ")");
  }
  if (!response.ok) {
    let text = response.status + " " + response.statusText;
    try {
      const body = await response.json();
      if (body && body.error) {
        text = body.error.message + (body.error.field ? " (field " + body.error.field + ")" : "");
      }
    } catch (ignored) { /* not JSON: keep the status line */ }
    throw new Error(text);
  }
  return response;
}

export async function getJSON(path) {
  return (await api(path)).json();
}

export function postJSON(path, body, accept) {
  return api(path, {
    method: "POST",
    headers: { "Content-Type": "application/json", "Accept": accept || "application/json" },
    body: JSON.stringify(body),
  });
}

export function modelPath(suffix) {
  return "v1/models/" + encodeURIComponent(state.model.name) + (suffix || "");
}

export function versionQuery() {
  return state.version ? "?version=" + state.version : "";
}

// -- messages ----------------------------------------------------------------------------
export function say(text) {
  $("status").textContent = text;
}

export function problem(text) {
  const node = $("problem");
  node.hidden = !text;
  node.textContent = text ? "Could not do that: " + text : "";
}

// -- DOM and text helpers ------------------------------------------------------------------
export function el(tag, attrs, text) {
  const node = document.createElement(tag);
  for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
  if (text !== undefined) node.textContent = text;
  return node;
}

export function fmt(value, digits) {
  if (value === null || value === undefined) return "-";
  if (typeof value !== "number") return String(value);
  if (Number.isInteger(value) && digits === undefined) return String(value);
  return value.toFixed(digits === undefined ? 2 : digits);
}

export function describeParams(params) {
  return state.model.parameters.map((p) =>
    p.name + " " + fmt(params[p.name], 1) + (p.unit ? " " + p.unit : "")).join(", ");
}

export function confidenceText(f) {
  // rounded down, so a frame just under the threshold never reads as if it were at it
  return f.confidence === null ? "confidence: not calibrated"
    : "confidence " + (Math.floor(f.confidence * 100 + 1e-9) / 100).toFixed(2);
}

// The share of the frame's pixels carried over from real training images by detail transfer
// (moved by an estimated optical flow; the frame is still synthesized); "" when the model does not refine.
export function detailText(f) {
  return f.detail === null || f.detail === undefined ? "" : "detail " + Math.round(f.detail * 100) + " %";
}
