// geotween viewer, the latent map: bank codes on their two main axes (PCA), the last route's
// frames and ends on top, and tooltips by pointer or keyboard focus.
import { $, confidenceText, describeParams, fmt, state } from "./viewer-core.js";

const SVG = "http://www.w3.org/2000/svg";
const MAP_W = 560, MAP_H = 290, MAP_PAD = 22, MAP_FOOT = 16;  // px of the SVG

let pick = () => {};  // what choosing a frame on the map does (set by wireMap)

function svg(tag, attrs) {
  const node = document.createElementNS(SVG, tag);
  for (const [k, v] of Object.entries(attrs || {})) node.setAttribute(k, v);
  return node;
}

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

// The frame with this index is the one in playback: its mark on the map says so.
export function markCurrent(index) {
  for (const mark of $("map").querySelectorAll(".route-frame")) {
    mark.classList.toggle("current", Number(mark.dataset.index) === index);
  }
}

export function drawMap() {
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
    g.addEventListener("click", () => pick(i));
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
  const shown = state.answer.frames[state.current];
  if (shown) markCurrent(shown.index);
}

// -- tooltips ----------------------------------------------------------------------------
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

// Tooltips follow the pointer and keyboard focus; onPick(i) runs when frame i's mark is clicked.
export function wireMap(onPick) {
  pick = onPick;
  const map = $("map");
  map.addEventListener("mouseover", (e) => { const n = tipFor(e.target); if (n) showTip(n, e.clientX, e.clientY); });
  map.addEventListener("mousemove", (e) => { const n = tipFor(e.target); if (n) showTip(n, e.clientX, e.clientY); else hideTip(); });
  map.addEventListener("mouseleave", hideTip);
  map.addEventListener("focusin", (e) => { const n = tipFor(e.target); if (n) showTip(n); });
  map.addEventListener("focusout", hideTip);
  document.addEventListener("keydown", (e) => { if (e.key === "Escape") hideTip(); });
}
