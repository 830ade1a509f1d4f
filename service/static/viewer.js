// geotween viewer: plain JavaScript, no build step, talks only to this service's /v1 endpoints.
// Frames shown here are synthesized by a learned model, not captured.
"use strict";

(function () {
  const SVG = "http://www.w3.org/2000/svg";
  const MAP_W = 560, MAP_H = 290, MAP_PAD = 22, MAP_FOOT = 16;  // px of the SVG
  const $ = (id) => document.getElementById(id);

  const state = {
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

  // -- requests ----------------------------------------------------------------------------
  async function api(path, options) {
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

  async function getJSON(path) {
    return (await api(path)).json();
  }

  function postJSON(path, body, accept) {
    return api(path, {
      method: "POST",
      headers: { "Content-Type": "application/json", "Accept": accept || "application/json" },
      body: JSON.stringify(body),
    });
  }

  function modelPath(suffix) {
    return "v1/models/" + encodeURIComponent(state.model.name) + (suffix || "");
  }

  function versionQuery() {
    return state.version ? "?version=" + state.version : "";
  }

  // -- messages ----------------------------------------------------------------------------
  function say(text) {
    $("status").textContent = text;
  }

  function problem(text) {
    const el = $("problem");
    el.hidden = !text;
    el.textContent = text ? "Could not do that: " + text : "";
  }

  function el(tag, attrs, text) {
    const node = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
    if (text !== undefined) node.textContent = text;
    return node;
  }

  function svg(tag, attrs) {
    const node = document.createElementNS(SVG, tag);
    for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
    return node;
  }

  function fmt(value, digits) {
    if (value === null || value === undefined) return "-";
    if (typeof value !== "number") return String(value);
    if (Number.isInteger(value) && digits === undefined) return String(value);
    return value.toFixed(digits === undefined ? 2 : digits);
  }

  function describeParams(params) {
    return state.model.parameters.map((p) =>
      p.name + " " + fmt(params[p.name], 1) + (p.unit ? " " + p.unit : "")).join(", ");
  }

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

  function showInfo(detail) {
    const box = $("model-info");
    box.replaceChildren();
    const table = el("table", { class: "params" });
    table.append(el("caption", {}, "Settings"));
    const head = el("tr");
    for (const h of ["name", "range", "unit", "wraps"]) head.append(el("th", { scope: "col" }, h));
    const thead = el("thead");
    thead.append(head);
    table.append(thead);
    const body = el("tbody");
    for (const p of detail.parameters) {
      const row = el("tr");
      row.append(el("td", {}, p.name), el("td", {}, fmt(p.min, 0) + " to " + fmt(p.max, 0)),
        el("td", {}, p.unit || "-"), el("td", {}, p.periodic ? "yes" : "no"));
      body.append(row);
    }
    table.append(body);
    box.append(table);

    // the numbers a reader needs first; every other numeric metric folds away below them
    const main = el("dl", { class: "metrics" });
    const more = el("dl", { class: "metrics" });
    const add = (dl, term, value) => { dl.append(el("dt", {}, term), el("dd", {}, value)); };
    const m = detail.metrics || {};
    if (typeof m.holdout_psnr === "number") add(main, "held-out PSNR", fmt(m.holdout_psnr, 2) + " dB");
    if (typeof m.holdout_ssim === "number") add(main, "held-out SSIM", fmt(m.holdout_ssim, 4));
    const c = detail.calibration;
    add(main, "confidence", c.fitted ? "calibrated (" + (c.method || "?") + "), tau " + fmt(c.tau, 2) : "not calibrated");
    if (c.fitted) add(main, "ECE / AUROC", fmt(c.ece, 3) + " / " + fmt(c.auroc, 3));
    add(main, "detail transfer", refineText(detail.refine));
    // a refining model with a confidence for its decoded frames may be asked to skip refinement
    const skippable = Boolean(detail.refine && detail.refine.on && detail.refine.skippable);
    $("refine-field").hidden = !skippable;
    if (!skippable) $("skip-refine").checked = false;
    for (const [k, v] of Object.entries(m)) {
      if (typeof v === "number" && k !== "holdout_psnr" && k !== "holdout_ssim") {
        add(more, k.replace(/_/g, " "), Number.isInteger(v) ? String(v) : fmt(v, 3));
      }
    }
    add(more, "resolution", detail.resolution + " px, " + detail.channels + " channel" + (detail.channels === 1 ? "" : "s"));
    box.append(main);
    const fold = el("details", { class: "more" });
    fold.append(el("summary", {}, "More metrics"), more);
    box.append(fold);
  }

  // Whether frames take detail from real training images, with the held-out figures behind the choice.
  function refineText(r) {
    if (!r || !r.chosen) return "off (not chosen at training)";
    let text = r.on ? "on" : "off";
    const h = r.holdout;
    if (h) {
      text += "; held-out PSNR " + fmt(h.decoded.psnr, 2) + " dB decoded, " + fmt(h.refined.psnr, 2) + " dB refined";
    }
    return text;
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
        answer.rejected + " rejected (min confidence " + fmt(body.min_confidence, 2) + "). " +
        "All are synthesized, not captured.");
    } catch (err) {
      problem(err.message);
      say("No frames.");
    } finally {
      $("go").disabled = false;
    }
  }

  function confidenceText(f) {
    // rounded down, so a frame just under the threshold never reads as if it were at it
    return f.confidence === null ? "confidence: not calibrated"
      : "confidence " + (Math.floor(f.confidence * 100 + 1e-9) / 100).toFixed(2);
  }

  // The share of the frame's pixels carried over from real training images by detail transfer
  // (moved by an estimated optical flow; the frame is still synthesized); "" when the model does not refine.
  function detailText(f) {
    return f.detail === null || f.detail === undefined ? "" : "detail " + Math.round(f.detail * 100) + " %";
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
      const img = el("img", { src: "data:image/png;base64," + f.image, alt: "" });
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
    img.src = "data:image/png;base64," + f.image;
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
    for (const mark of $("map").querySelectorAll(".route-frame")) {
      mark.classList.toggle("current", Number(mark.dataset.index) === f.index);
    }
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

  // -- latent map --------------------------------------------------------------------------
  function mapScale(points) {
    let x0 = Infinity, x1 = -Infinity, y0 = Infinity, y1 = -Infinity;
    for (const p of points) {
      x0 = Math.min(x0, p.x); x1 = Math.max(x1, p.x); y0 = Math.min(y0, p.y); y1 = Math.max(y1, p.y);
    }
    // one scale for both axes, so distances on the map are distances between codes
    const k = Math.min((MAP_W - 2 * MAP_PAD) / Math.max(x1 - x0, 1e-9),
      (MAP_H - 2 * MAP_PAD - MAP_FOOT) / Math.max(y1 - y0, 1e-9));
    const cx = (x0 + x1) / 2, cy = (y0 + y1) / 2;
    return (p) => [MAP_W / 2 + (p.x - cx) * k, (MAP_H - MAP_FOOT) / 2 - (p.y - cy) * k];
  }

  function hue(p, value) {
    const u = (value - p.min) / (p.max - p.min);
    return "hsl(" + Math.round(360 * (p.periodic ? u : 0.72 * u)) + ", 55%, 62%)";
  }

  function drawMap() {
    const map = $("map");
    map.replaceChildren();
    if (!state.bank) return;
    const first = state.model.parameters[0];
    $("colour-name").textContent = first.name;
    const all = state.bank.bank.slice();
    if (state.route) all.push(state.route.start, state.route.end, ...state.route.frames);
    const at = mapScale(all);
    const ex = state.bank.explained;
    map.append(svg("rect", { x: 0.5, y: 0.5, width: MAP_W - 1, height: MAP_H - 1, class: "frame-box" }));
    const axes = svg("text", { x: 8, y: MAP_H - 8, class: "axis-label" });
    axes.textContent = "axis 1: " + Math.round(100 * ex[0]) + "% of variance, axis 2: " + Math.round(100 * ex[1]) + "%";
    map.append(axes);

    const bank = svg("g", { class: "bank" });
    for (const b of state.bank.bank) {
      const [x, y] = at(b);
      const dot = svg("circle", { cx: x.toFixed(1), cy: y.toFixed(1), r: 4.5, fill: hue(first, b.params[first.name]),
        class: "bank-point", "data-tip": "captured sample " + b.index + ": " + describeParams(b.params) });
      bank.append(dot);
    }
    map.append(bank);
    if (!state.route || !state.answer) return;

    const r = state.route;
    const line = [r.start].concat(r.frames, [r.end]).map((p) => at(p).map((v) => v.toFixed(1)).join(",")).join(" ");
    map.append(svg("polyline", { points: line, class: "route-line" }));
    const marks = svg("g", { class: "route" });
    state.answer.frames.forEach((f, i) => {
      const [x, y] = at(r.frames[i]);
      const tip = "frame " + f.index + " (t " + fmt(f.t, 2) + "), " + confidenceText(f) + ", " +
        (f.accepted ? "accepted" : "rejected") + "; shows " + describeParams(f.params);
      const g = svg("g", { class: "route-frame " + (f.accepted ? "ok" : "rejected"), "data-index": String(f.index),
        "data-tip": tip, tabindex: "0", role: "img", "aria-label": tip });
      if (f.accepted) {
        g.append(svg("circle", { cx: x, cy: y, r: 4.5, class: "frame-ok" }));
      } else {
        g.append(svg("circle", { cx: x, cy: y, r: 7, class: "frame-bad-ring" }));
        g.append(svg("path", { d: "M" + (x - 5) + " " + (y - 5) + " L" + (x + 5) + " " + (y + 5) + " M" + (x - 5) + " " +
          (y + 5) + " L" + (x + 5) + " " + (y - 5), class: "frame-bad" }));
      }
      g.addEventListener("click", () => { stopPlayback(); show(i); });
      marks.append(g);
    });
    const ends = [["start", r.start, state.answer.start_params], ["end", r.end, state.answer.end_params]];
    for (const [name, point, params] of ends) {
      const [x, y] = at(point);
      const tip = name + ": " + describeParams(params);
      const g = svg("g", { class: "route-end", "data-tip": tip, tabindex: "0", role: "img", "aria-label": tip });
      g.append(name === "start"
        ? svg("rect", { x: x - 6, y: y - 6, width: 12, height: 12, class: "end-mark" })
        : svg("path", { d: "M" + x + " " + (y - 8) + " L" + (x + 7) + " " + (y + 6) + " L" + (x - 7) + " " + (y + 6) + " Z",
          class: "end-mark" }));
      const label = svg("text", { x: x + 10, y: y + 4, class: "end-label" });
      label.textContent = name;
      g.append(label);
      marks.append(g);
    }
    map.append(marks);
    show(state.current);
  }

  function tipFor(target) {
    const node = target && target.closest ? target.closest("[data-tip]") : null;
    return node && $("map").contains(node) ? node : null;
  }

  function showTip(node, clientX, clientY) {
    const tip = $("tip");
    const wrap = $("map").parentElement.getBoundingClientRect();
    if (clientX === undefined) {
      const box = node.getBoundingClientRect();
      clientX = box.right; clientY = box.top;
    }
    tip.textContent = node.dataset.tip;
    tip.hidden = false;
    const left = Math.min(clientX - wrap.left + 12, wrap.width - tip.offsetWidth - 4);
    tip.style.left = Math.max(4, left) + "px";
    tip.style.top = Math.max(4, clientY - wrap.top - tip.offsetHeight - 8) + "px";
  }

  function hideTip() {
    $("tip").hidden = true;
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
    const map = $("map");
    map.addEventListener("mouseover", (e) => { const n = tipFor(e.target); if (n) showTip(n, e.clientX, e.clientY); });
    map.addEventListener("mousemove", (e) => { const n = tipFor(e.target); if (n) showTip(n, e.clientX, e.clientY); else hideTip(); });
    map.addEventListener("mouseleave", hideTip);
    map.addEventListener("focusin", (e) => { const n = tipFor(e.target); if (n) showTip(n); });
    map.addEventListener("focusout", hideTip);
    document.addEventListener("keydown", (e) => { if (e.key === "Escape") hideTip(); });
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
      say("ZIP downloaded: every frame as PNG plus manifest.json (which says which frames were rejected).");
    } catch (err) {
      problem(err.message);
    }
  }

  document.addEventListener("DOMContentLoaded", () => {
    wire();
    loadModels().catch((err) => { problem(err.message); say("The viewer could not load the models."); });
  });
})();
