// geotween viewer: plain JavaScript modules, no build step, talks only to this service's /v1 endpoints.
// Frames shown here are synthesized by a learned model, not captured. This file holds the form (model
// choice, ends, request), the filmstrip and playback; viewer-core.js the shared state and requests,
// viewer-model.js the model panel, viewer-map.js the latent map.
import { $, confidenceText, describeParams, detailText, el, fmt, getJSON, modelPath, postJSON, problem, say,
  state, versionQuery } from "./viewer-core.js";
import { drawMap, markCurrent, wireMap } from "./viewer-map.js";
import { showInfo } from "./viewer-model.js";

// -- settings: periodic values wrap, others stay in range ------------------------------------
function stepOf(p) {
  const span = p.max - p.min;
  return Math.pow(10, Math.floor(Math.log10(span / 100)));
}

function settle(p, value) {
  if (!Number.isFinite(value)) return p.min;
  if (p.periodic) {
    const span = p.max - p.min;
    return p.min + (((value - p.min) % span) + span) % span;
  }
  return Math.min(p.max, Math.max(p.min, value));
}

function roundTo(value, step) {
  const digits = Math.max(0, -Math.floor(Math.log10(step)));
  return Number(value.toFixed(digits));
}

// -- model choice ------------------------------------------------------------------------
async function loadModels() {
  const list = (await getJSON("v1/models")).models;
  const select = $("model");
  select.replaceChildren();
  if (!list.length) {
    select.append(el("option", { value: "" }, "(no models)"));
    say("The registry has no models yet. Train one (for example with 'geotween demo'), then reload.");
    return;
  }
  for (const m of list) {
    select.append(el("option", { value: m.name }, m.name + " (" + m.versions + " version" +
      (m.versions === 1 ? "" : "s") + ")"));
  }
  await chooseModel(list[0].name, null);
}

async function chooseModel(name, version) {
  problem("");
  stopPlayback();
  say("Loading " + name + "...");
  const ticket = ++state.loads;  // a later choice supersedes this one: its late answers are dropped
  const detail = await getJSON("v1/models/" + encodeURIComponent(name) + (version ? "?version=" + version : ""));
  if (ticket !== state.loads) return;
  const sameSpace = state.model && state.model.name === detail.name &&
    JSON.stringify(state.model.parameters) === JSON.stringify(detail.parameters);
  state.model = detail;
  state.version = version;
  fillVersions(detail);
  showInfo(detail);
  if (!sameSpace) buildEnds(detail.parameters);
  clearResults();
  const bank = await getJSON(modelPath("/map") + versionQuery());
  if (ticket !== state.loads) return;
  state.bank = bank;
  drawMap();
  say(detail.name + " version " + detail.version + " is ready: choose the two ends, then make frames.");
}

function fillVersions(detail) {
  const select = $("version");
  select.replaceChildren(el("option", { value: "" }, "latest (" + detail.latest_version + ")"));
  for (const v of detail.versions.slice().reverse()) {
    select.append(el("option", { value: String(v.version) }, String(v.version) + " - " + v.created));
  }
  select.value = state.version ? String(state.version) : "";
}

// -- ends --------------------------------------------------------------------------------
function buildEnds(parameters) {
  const host = $("ends");
  host.replaceChildren();
  state.images = { start: null, end: null };
  for (const [side, title, share] of [["start", "Start", 0.25], ["end", "End", 0.75]]) {
    const box = el("fieldset", { class: "end", id: "end-" + side });
    box.append(el("legend", {}, title));
    const kind = el("div", { class: "choice inline", role: "radiogroup", "aria-label": title + " given by" });
    for (const [value, label] of [["params", "settings"], ["image", "image"]]) {
      const lab = el("label");
      const radio = el("input", { type: "radio", name: side + "-kind", value: value, id: side + "-kind-" + value });
      if (value === "params") radio.checked = true;
      radio.addEventListener("change", () => showKind(side));
      lab.append(radio, document.createTextNode(" " + label));
      kind.append(lab);
    }
    box.append(kind);

    const sliders = el("div", { class: "sliders", id: side + "-sliders" });
    for (const p of parameters) sliders.append(slider(side, p, p.min + share * (p.max - p.min)));
    box.append(sliders);

    const drop = el("div", { class: "drop", id: side + "-drop", hidden: "" });
    const fileId = side + "-file";
    const pick = el("label", { for: fileId, class: "drop-label" }, "Drop a PNG or JPEG here, or choose a file");
    const file = el("input", { type: "file", id: fileId, accept: "image/png,image/jpeg" });
    const preview = el("img", { id: side + "-preview", class: "preview", alt: "", hidden: "" });
    file.addEventListener("change", () => { if (file.files[0]) takeImage(side, file.files[0]); });
    drop.addEventListener("dragover", (e) => { e.preventDefault(); drop.classList.add("over"); });
    drop.addEventListener("dragleave", () => drop.classList.remove("over"));
    drop.addEventListener("drop", (e) => {
      e.preventDefault();
      drop.classList.remove("over");
      if (e.dataTransfer.files[0]) takeImage(side, e.dataTransfer.files[0]);
    });
    drop.append(pick, file, preview);
    box.append(drop);
    host.append(box);
  }
}

function slider(side, p, start) {
  const step = stepOf(p);
  const id = side + "-" + p.name;
  const row = el("div", { class: "slider" });
  const label = el("label", { for: id },
    p.name + (p.unit ? " (" + p.unit + ")" : "") + (p.periodic ? ", wraps" : ""));
  const range = el("input", { type: "range", id: id, min: String(p.min), max: String(p.max), step: String(step),
    "data-param": p.name });
  const number = el("input", { type: "number", id: id + "-value", step: String(step), class: "value",
    "aria-label": p.name + " value, " + side });
  if (!p.periodic) { number.min = String(p.min); number.max = String(p.max); }
  const set = (v) => {
    const settled = roundTo(settle(p, v), step);
    range.value = String(settled);
    number.value = String(settled);
  };
  set(start);
  range.addEventListener("input", () => set(Number(range.value)));
  number.addEventListener("change", () => set(Number(number.value)));
  range.addEventListener("keydown", (e) => {
    // a periodic setting goes round: past the top it comes back at the bottom, and back
    if (!p.periodic) return;
    const v = Number(range.value);
    const up = e.key === "ArrowRight" || e.key === "ArrowUp";
    const down = e.key === "ArrowLeft" || e.key === "ArrowDown";
    if (up && v + step > p.max - step / 2) { e.preventDefault(); set(v + step); }
    else if (down && v - step < p.min + step / 2) { e.preventDefault(); set(v - step); }
  });
  row.append(label, range, number);
  return row;
}

function showKind(side) {
  const image = $(side + "-kind-image").checked;
  $(side + "-sliders").hidden = image;
  $(side + "-drop").hidden = !image;
}

function takeImage(side, file) {
  if (!/^image\/(png|jpeg)$/.test(file.type)) {
    problem(file.name + " is not a PNG or JPEG");
    return;
  }
  const reader = new FileReader();
  reader.onload = () => {
    state.images[side] = reader.result;
    const preview = $(side + "-preview");
    preview.src = reader.result;
    preview.alt = side + " image: " + file.name;
    preview.hidden = false;
    $(side + "-kind-image").checked = true;
    showKind(side);
    problem("");
  };
  reader.readAsDataURL(file);
}

function endOf(side) {
  if ($(side + "-kind-image").checked) {
    if (!state.images[side]) throw new Error("the " + side + " is set to an image, but no image was chosen");
    return { image: state.images[side] };
  }
  const params = {};
  for (const p of state.model.parameters) {
    params[p.name] = settle(p, Number($(side + "-" + p.name + "-value").value));
    if (p.periodic && params[p.name] >= p.max) params[p.name] = p.min;
  }
  return { params: params };
}

function request() {
  const frames = Number($("frames").value);
  if (!Number.isInteger(frames) || frames < 1) throw new Error("frames must be a whole number of at least 1");
  const body = {
    start: endOf("start"), end: endOf("end"), frames: frames,
    route: document.querySelector("input[name=route]:checked").value,
    min_confidence: Number($("min-confidence").value),
  };
  if (state.version) body.version = state.version;
  if (!$("refine-field").hidden && $("skip-refine").checked) body.refine = false;
  return body;
}

// The request body from the form, or null with the reason shown (bad input in a field).
function checkedRequest() {
  problem("");
  try {
    return request();
  } catch (err) {
    problem(err.message);
    return null;
  }
}

// -- frames ------------------------------------------------------------------------------
async function makeFrames(event) {
  event.preventDefault();
  if (!state.model) return;
  stopPlayback();
  const body = checkedRequest();
  if (!body) return;
  $("go").disabled = true;
  say("Making " + body.frames + " frame" + (body.frames === 1 ? "" : "s") + "...");
  // the filmstrip and playback at the model's working size keep the page light; the ZIP is at full size
  body.size = "working";
  try {
    const answer = await (await postJSON(modelPath("/between"), body)).json();
    state.answer = answer;
    const codes = [answer.start_code].concat(answer.frames.map((f) => f.code), [answer.end_code]);
    const placed = (await (await postJSON(modelPath("/map"), { codes: codes, version: answer.version })).json()).points;
    state.route = { start: placed[0], end: placed[placed.length - 1], frames: placed.slice(1, -1) };
    showStrip(answer);
    drawMap();
    show(0);
    say(answer.frames.length + " frames on the " + answer.route + " route: " + answer.accepted + " accepted, " +
      answer.rejected + " rejected (min confidence " + fmt(body.min_confidence, 2) + tauText(answer.tau) + "). " +
      "All are synthesized, not captured." + (answer.ends_placed === false
        ? " An image end could not be placed among the captures, so no frame was judged: all are rejected."
        : ""));
  } catch (err) {
    problem(err.message);
    say("No frames.");
  } finally {
    $("go").disabled = false;
  }
}

// A frame's picture as a data URL, in the answer's format (servers before formats existed send PNG).
function pictureURL(answer, f) {
  return "data:image/" + (answer.format === "jpeg" ? "jpeg" : "png") + ";base64," + f.image;
}

// What the confidences are about, from the answer's tau (servers before it existed send none).
function tauText(tau) {
  return typeof tau === "number" ? " that SSIM is at least " + fmt(tau, 2) : "";
}

function showStrip(answer) {
  const strip = $("strip");
  strip.replaceChildren();
  $("strip-empty").hidden = answer.frames.length > 0;
  answer.frames.forEach((f, i) => {
    const item = el("li", { class: "frame " + (f.accepted ? "ok" : "rejected"), "data-index": String(f.index) });
    const button = el("button", { type: "button", class: "thumb",
      "aria-label": "frame " + f.index + ", t " + fmt(f.t, 2) + ", " + confidenceText(f) + ", " +
        (detailText(f) ? detailText(f) + " from real images, " : "") +
        (f.accepted ? "accepted" : "rejected") + "; show in playback" });
    const img = el("img", { src: pictureURL(answer, f), alt: "" });
    button.append(img);
    if (!f.accepted) button.append(el("span", { class: "hatch", "aria-hidden": "true" }));
    button.addEventListener("click", () => { stopPlayback(); show(i); });
    const caption = el("div", { class: "caption" }, "#" + f.index + "  t " + fmt(f.t, 2));
    if (detailText(f)) {
      caption.append(el("span", { class: "detail", title: "share of this frame's pixels carried over from real " +
        "training images (detail transfer); the frame is still synthesized, not captured" }, detailText(f)));
    }
    const bar = el("div", { class: "bar", "aria-hidden": "true" });
    const fill = el("span", { class: "fill" });
    fill.style.width = (f.confidence === null ? 0 : Math.round(100 * f.confidence)) + "%";
    bar.append(fill);
    const conf = el("div", { class: "conf" }, confidenceText(f));
    const verdict = el("div", { class: "verdict " + (f.accepted ? "pass" : "reject") },
      f.accepted ? "accepted" : "REJECTED");
    item.append(button, caption, bar, conf, verdict);
    strip.append(item);
  });
  for (const id of ["play", "step-back", "step-on"]) $(id).disabled = answer.frames.length === 0;
}

function clearResults() {
  state.answer = null;
  state.route = null;
  $("strip").replaceChildren();
  $("strip-empty").hidden = false;
  $("screen-img").removeAttribute("src");
  $("screen-img").alt = "";
  $("screen-mark").hidden = true;
  $("screen").classList.remove("rejected");
  $("screen").classList.add("empty");
  $("screen-label").textContent = "-";
  $("screen-shows").textContent = "";
  for (const id of ["play", "step-back", "step-on"]) $(id).disabled = true;
}

// -- playback ----------------------------------------------------------------------------
function show(i) {
  const frames = state.answer ? state.answer.frames : [];
  if (!frames.length) return;
  state.current = ((i % frames.length) + frames.length) % frames.length;
  const f = frames[state.current];
  const img = $("screen-img");
  img.src = pictureURL(state.answer, f);
  img.alt = "synthesized frame " + f.index + " of " + frames.length;
  $("screen").classList.toggle("rejected", !f.accepted);
  $("screen").classList.remove("empty");
  $("screen-mark").hidden = f.accepted;
  $("screen-label").textContent = "frame " + f.index + " of " + frames.length + ", t " + fmt(f.t, 2) + ", " +
    confidenceText(f) + (detailText(f) ? ", " + detailText(f) : "") + ", " + (f.accepted ? "accepted" : "REJECTED");
  $("screen-shows").textContent = "shows " + describeParams(f.params);
  for (const item of $("strip").children) {
    item.classList.toggle("current", Number(item.dataset.index) === f.index);
  }
  markCurrent(f.index);
}

function stopPlayback() {
  if (state.timer) clearInterval(state.timer);
  state.timer = null;
  $("play").textContent = "Play";
  $("play").setAttribute("aria-pressed", "false");
}

function togglePlayback() {
  if (state.timer) { stopPlayback(); return; }
  const fps = Number($("fps").value);
  state.timer = setInterval(() => show(state.current + 1), 1000 / fps);
  $("play").textContent = "Pause";
  $("play").setAttribute("aria-pressed", "true");
}

// -- wiring ------------------------------------------------------------------------------
function wire() {
  $("ask").addEventListener("submit", makeFrames);
  $("model").addEventListener("change", () => chooseModel($("model").value, null).catch((e) => problem(e.message)));
  $("version").addEventListener("change", () => {
    const v = $("version").value;
    chooseModel(state.model.name, v ? Number(v) : null).catch((e) => problem(e.message));
  });
  $("min-confidence").addEventListener("input", () => {
    $("min-confidence-out").textContent = fmt(Number($("min-confidence").value), 2);
  });
  $("fps").addEventListener("input", () => {
    $("fps-out").textContent = $("fps").value + " fps";
    if (state.timer) { stopPlayback(); togglePlayback(); }
  });
  $("play").addEventListener("click", togglePlayback);
  $("step-back").addEventListener("click", () => { stopPlayback(); show(state.current - 1); });
  $("step-on").addEventListener("click", () => { stopPlayback(); show(state.current + 1); });
  $("zip").addEventListener("click", downloadZip);
  wireMap((i) => { stopPlayback(); show(i); });
}

async function downloadZip() {
  if (!state.model) return;
  const body = checkedRequest();
  if (!body) return;
  say("Preparing the ZIP of " + body.frames + " frames...");
  try {
    const response = await postJSON(modelPath("/between"), body, "application/zip");
    const blob = await response.blob();
    const disposition = response.headers.get("Content-Disposition") || "";
    const named = /filename="([^"]+)"/.exec(disposition);
    const link = el("a", { href: URL.createObjectURL(blob), download: named ? named[1] : "frames.zip" });
    document.body.append(link);
    link.click();
    link.remove();
    setTimeout(() => URL.revokeObjectURL(link.href), 10000);
    say("ZIP downloaded: every frame as PNG at full size (the captures' own, where the model kept them) plus " +
      "manifest.json (which says which frames were rejected).");
  } catch (err) {
    problem(err.message);
  }
}

document.addEventListener("DOMContentLoaded", () => {
  wire();
  loadModels().catch((err) => { problem(err.message); say("The viewer could not load the models."); });
});
