// geotween viewer, the model panel: the settings a model spans, its held-out figures, and how far
// its confidence can be trusted (what it is about, how it was fitted, and a warning when frames
// will be rejected whatever they look like).
import { $, el, fmt } from "./viewer-core.js";

export function showInfo(detail) {
  const box = $("model-info");
  box.replaceChildren();
  const c = detail.calibration || {};
  if (c.warning) {  // first and loud: with it, the frames' verdicts say little about the frames
    box.append(el("p", { class: "problem model-warning", role: "alert" }, "Warning: " + c.warning));
  }
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
  add(main, "confidence", confidenceKind(c));
  if (typeof c.tau === "number") add(main, "SSIM threshold (tau)", fmt(c.tau, 2));
  if (c.fitted) add(main, "ECE / AUROC", fmt(c.ece, 3) + " / " + fmt(c.auroc, 3));
  const s = c.straight;  // the straight route's frames are scored by a curve of their own
  if (s) add(more, "straight route's confidence", s.kind === "bound" ? "one conservative rate"
    : s.method + ", ECE " + fmt(s.ece, 3) + " / AUROC " + fmt(s.auroc, 3));
  const q = c.ssim_quantiles || {};
  if (["p10", "p50", "p90"].every((k) => typeof q[k] === "number")) {
    add(main, "held-out SSIM p10 / p50 / p90", fmt(q.p10, 3) + " / " + fmt(q.p50, 3) + " / " + fmt(q.p90, 3));
  }
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

// How the confidence was made. Servers before `kind` existed only say whether a curve was fitted.
function confidenceKind(c) {
  const kind = c.kind || (c.fitted ? "fitted" : null);
  if (kind === "fitted") return "calibrated (" + (c.method || "?") + ")";
  if (kind === "bound") return "one cautious rate for every frame (too few held-out frames to fit a curve)";
  if (kind === "none") return "none: every frame is rejected";
  return "not calibrated";
}

// Whether frames take detail from real training images, with the held-out figures behind the choice.
function refineText(r) {
  if (!r || !r.chosen) return "off (not chosen at training)";
  let text = r.on ? "on" : "off";
  if (r.on && r.config && r.config.mode === "pair") text = "on, frames made from the captures around each";
  const h = r.holdout;
  if (h) {
    text += "; held-out PSNR " + fmt(h.decoded.psnr, 2) + " dB decoded, " + fmt(h.refined.psnr, 2) + " dB refined";
  }
  return text;
}
