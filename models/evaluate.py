"""Quality report against a truth set: in-betweens by each method scored against the true views.

Methods: what a user would otherwise reach for (cross-dissolve of the two end images, dense
optical-flow warping of both ends, `models.flow.tween`, and the nearest capture: the model's bank
image whose settings lie closest to the frame's true settings, a real photograph the user already
has, shown in place of the frame), the straight route between the two end codes, the geodesic
route, and the model's own ceiling (decode(encode(true frame))), which no decoded route can beat.
Routes are scored as served: when the model refines its frames with detail from real bank images
(`models.refine`), the report also carries the decoded geodesic frames before refinement
("geodesic_decoded", with the confidence a refine=False request gets when the model has one), and
refined frames may exceed the ceiling. Ends are the truth set's end images.

Every number is also given per span bucket (`models.params.SPAN_BUCKETS`, by the reach of each
pair's ends), so that a method which does well on short pairs and badly on long ones shows it.
"""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
from PIL import Image

from . import flow as lflow
from .confidence import auroc, ece
from .engine import Endpoint, Engine
from .metrics import psnr_batch, ssim_batch
from .params import SPAN_BUCKETS, ParamSpace, span_bucket
from .scene import image_to_array

METHODS = ("dissolve", "flow", "nearest", "straight", "geodesic", "ceiling")
TRUTH_FORMAT = "geotween-truth/1"


def load_truth(truth_dir: str | Path, resolution: int, channels: int) -> list[dict]:
    """Pairs of the truth set with images loaded as (H, W, C) float32 at the model's size."""
    truth_dir = Path(truth_dir)
    try:
        doc = json.loads((truth_dir / "truth.json").read_text())
    except FileNotFoundError:
        raise ValueError(f"{truth_dir}: no truth.json; expected a truth set written by render-demo") from None
    if doc.get("format") != TRUTH_FORMAT:
        raise ValueError(f"{truth_dir / 'truth.json'}: format {doc.get('format')!r}, expected {TRUTH_FORMAT!r}")

    def load(name: str) -> np.ndarray:
        with Image.open(truth_dir / name) as img:
            return image_to_array(img, resolution, channels)

    pairs = []
    for pair in doc["pairs"]:
        pairs.append({**pair, "start_image": load(pair["start"]["image"]), "end_image": load(pair["end"]["image"]),
                      "t": np.array([f["t"] for f in pair["frames"]]),
                      "truth": np.stack([load(f["image"]) for f in pair["frames"]]),
                      "truth_params": [f["params"] for f in pair["frames"]]})
    return pairs


def pair_spans(space: ParamSpace, pairs: list[dict]) -> tuple[np.ndarray, list[str]]:
    """Each truth pair's reach in [0, 1] (`ParamSpace.reach` of its start and end settings) and the
    name of its SPAN_BUCKETS bucket."""
    reach = np.array([float(space.reach(space.vector(p["start"]["params"]), space.vector(p["end"]["params"])))
                      for p in pairs])
    return reach, [span_bucket(r) for r in reach]


def nearest_captures(space: ParamSpace, scale: np.ndarray | None, bank_params: np.ndarray,
                     params: np.ndarray) -> np.ndarray:
    """(N,) index into the bank of the capture nearest to each of (N, P) settings, by
    `space.distance` with each axis divided by `scale` (the first of equals)."""
    bank_params = np.asarray(bank_params, dtype=np.float64)
    params = np.asarray(params, dtype=np.float64).reshape(-1, len(space))
    if not len(bank_params):
        raise ValueError("nearest capture: the bank is empty")
    dist = space.distance(bank_params[None, :, :], params[:, None, :], scale)  # (N, bank)
    return np.argmin(dist, axis=1)


def _summary(psnr: np.ndarray, ssim: np.ndarray) -> dict:
    psnr = np.minimum(psnr, 99.0)
    return {"psnr": round(float(psnr.mean()), 3), "ssim": round(float(ssim.mean()), 4),
            "psnr_p10": round(float(np.percentile(psnr, 10)), 3), "frames": int(len(psnr))}


ENDS = ("image", "settings")


def evaluate(engine: Engine, truth_dir: str | Path, *, min_confidence: float = 0.5,
             sheet: str | Path | None = None, sheet_pairs: int = 6, latent_map: str | Path | None = None,
             ends: str = "image") -> dict:
    """Report dict: per method PSNR (dB), SSIM, p10 PSNR; pacing error (spacing units) and
    confidence ECE / AUROC / accept-reject confusion for the latent routes; "by_span" holds the
    same per span bucket (see `span_report`) and "longest_pair" the pair of greatest reach.
    `sheet` and `latent_map` are PNG paths: the contact sheet and the bank's map with the geodesic
    routes of the same first `sheet_pairs` pairs; beside the map, "<name>_long.png" shows the
    geodesic route of the longest pair. `ends`: the routes are asked for between the pairs' end images
    ("image", the model places them first) or between their true settings ("settings": an end image
    that is no capture may not be placeable, as on scattered samples)."""
    if ends not in ENDS:
        raise ValueError(f"ends: {ends!r} is not one of {list(ENDS)}")
    pairs = load_truth(truth_dir, engine.resolution, engine.channels)
    if not pairs:
        raise ValueError(f"{truth_dir}: the truth set has no pairs")
    reach, pair_bucket = pair_spans(engine.space, pairs)
    longest = int(np.argmax(reach))  # the first of equals
    frame_bucket: list[str] = []
    tau = engine.tau if engine.tau is not None else 0.90
    methods = METHODS + (("geodesic_decoded",) if engine.refine is not None else ())
    got = {m: {"psnr": [], "ssim": []} for m in methods}
    pacing = {"straight": [], "geodesic": []}
    unplaced = {"straight": 0, "geodesic": 0}
    conf = {"straight": ([], []), "geodesic": ([], []), "geodesic_decoded": ([], [])}
    rows, mapped, long_answer = [], [], None
    for i, pair in enumerate(pairs):
        truth, t = pair["truth"], pair["t"]
        frame_bucket += [pair_bucket[i]] * len(t)
        want = np.array([engine.space.vector(p) for p in pair["truth_params"]])
        # among the captures the engine makes frames from (the bank, and the held-out share unless turned off)
        near = nearest_captures(engine.space, engine.scale, engine.capture_params, want)
        outs = {"dissolve": (1 - t)[:, None, None, None] * pair["start_image"] + t[:, None, None, None] * pair["end_image"],
                "flow": lflow.tween(pair["start_image"], pair["end_image"], t),
                "nearest": engine.captures(near),
                "ceiling": engine.decode(engine.encode(truth))}
        start, end = ((Endpoint(image=pair["start_image"]), Endpoint(image=pair["end_image"])) if ends == "image"
                      else (Endpoint(params=pair["start"]["params"]), Endpoint(params=pair["end"]["params"])))
        for route in ("straight", "geodesic"):
            ans = engine.between(start, end, frames=len(t), route=route, min_confidence=min_confidence)
            outs[route] = np.stack([f.image for f in ans.frames])
            shown = np.array([engine.space.vector(f.params) for f in ans.frames])
            pacing[route] += list(engine.space.distance(shown, want, engine.scale))
            if engine.confidence is not None:
                # a frame left unjudged (an image end the model could not place) is never accepted: it
                # counts as confidence 0
                conf[route][0].extend(0.0 if f.confidence is None else f.confidence for f in ans.frames)
                unplaced[route] += 0 if ans.ends_placed else len(ans.frames)
            if route == "geodesic" and len(mapped) < sheet_pairs:
                mapped.append(ans)
            if route == "geodesic" and i == longest:
                long_answer = ans
            if route == "geodesic" and "geodesic_decoded" in methods:
                if engine.decoded_confidence is not None:  # the same route, as a refine=False request serves it
                    placed = np.stack([engine.space.vector(ans.start_params), engine.space.vector(ans.end_params)])
                    at = np.array([f.t for f in ans.frames])
                    plain = engine.frames_at(ans.codes, at, engine.space.lerp(placed[0], placed[1], at),
                                             min_confidence, refine=False)
                    conf["geodesic_decoded"][0].extend(f.confidence for f in plain)
                    outs["geodesic_decoded"] = np.stack([f.image for f in plain])
                else:
                    outs["geodesic_decoded"] = engine.decode(ans.codes)
        for m in methods:
            got[m]["psnr"].append(psnr_batch(outs[m], truth))
            got[m]["ssim"].append(ssim_batch(outs[m], truth))
        for route in ("straight", "geodesic", "geodesic_decoded"):
            if route in methods:
                conf[route][1].extend(got[route]["ssim"][-1] >= tau)
        if len(rows) < sheet_pairs:
            rows.append((truth, outs))
    report: dict = {"pairs": len(pairs), "frames_per_pair": int(len(pairs[0]["t"])), "tau": tau, "ends": ends,
                    "min_confidence": min_confidence, "methods": {}}
    for m in methods:
        report["methods"][m] = _summary(np.concatenate(got[m]["psnr"]), np.concatenate(got[m]["ssim"]))
    for route in ("straight", "geodesic", "geodesic_decoded"):
        if route in pacing:
            report["methods"][route]["pacing_error"] = round(float(np.mean(pacing[route])), 4)
        prob, faithful = np.asarray(conf[route][0], dtype=float), np.asarray(conf[route][1], dtype=float)
        if len(prob):
            report["methods"][route]["confidence"] = confidence_summary(prob, faithful, min_confidence)
            if route in unplaced:
                report["methods"][route]["confidence"]["unjudged"] = unplaced[route]
    geo, ceil = report["methods"]["geodesic"], report["methods"]["ceiling"]
    report["geodesic_below_ceiling_db"] = round(ceil["psnr"] - geo["psnr"], 3)
    scores = {m: (np.concatenate(got[m]["psnr"]), np.concatenate(got[m]["ssim"])) for m in methods}
    served = {r: (np.asarray(conf[r][0], dtype=float), np.asarray(conf[r][1], dtype=float))
              for r in conf if len(conf[r][0])}
    report["by_span"] = span_report(scores, served, np.array(frame_bucket), pair_bucket, min_confidence)
    report["longest_pair"] = {"index": longest, "reach": round(float(reach[longest]), 4),
                              "bucket": pair_bucket[longest], "direction": pairs[longest].get("direction"),
                              "steps": pairs[longest].get("steps"), "start": pairs[longest]["start"]["params"],
                              "end": pairs[longest]["end"]["params"]}
    if sheet is not None:
        contact_sheet(rows, sheet)
        report["contact_sheet"] = str(sheet)
    if latent_map is not None:
        from .latent_map import engine_map_png

        engine_map_png(engine, mapped, latent_map, title=f"bank codes and the geodesic routes of {len(mapped)} pairs")
        report["latent_map"] = str(latent_map)
        long_map = long_map_path(latent_map)
        engine_map_png(engine, [long_answer], long_map,
                       title=f"bank codes and the geodesic route of the longest pair (reach {reach[longest]:.2f}, "
                             f"{pair_bucket[longest]})")
        report["latent_map_long"] = str(long_map)
    return report


def long_map_path(latent_map: str | Path) -> Path:
    """Where the longest pair's map goes beside the latent map: NAME_long.png next to NAME.png."""
    latent_map = Path(latent_map)
    return latent_map.with_name(f"{latent_map.stem}_long{latent_map.suffix or '.png'}")


def span_report(scores: dict, served: dict, frame_bucket: np.ndarray, pair_bucket: list[str],
                min_confidence: float) -> dict:
    """Per SPAN_BUCKETS bucket, in order: {"reach": [low, high], "pairs", "frames", "methods": {method:
    PSNR/SSIM/p10 summary, plus "confidence" (`confidence_summary`) for the routes served with one}}.
    `scores` maps a method to per-frame (psnr, ssim); `served` a route to per-frame (confidence,
    1 where SSIM >= tau); `frame_bucket` names each frame's bucket. A bucket without pairs has
    pairs 0 and no methods."""
    out, low = {}, 0.0
    for name, high in SPAN_BUCKETS:
        sel = frame_bucket == name
        entry = {"reach": [low, high], "pairs": pair_bucket.count(name), "frames": int(sel.sum()), "methods": {}}
        if sel.any():
            for m, (psnr, ssim) in scores.items():
                entry["methods"][m] = _summary(psnr[sel], ssim[sel])
                if m in served:
                    prob, faithful = served[m]
                    entry["methods"][m]["confidence"] = confidence_summary(prob[sel], faithful[sel], min_confidence)
        out[name] = entry
        low = high
    return out


def _share(part: np.ndarray, whole: np.ndarray) -> float | None:
    return round(float(part.sum() / whole.sum()), 4) if whole.any() else None


def confidence_summary(prob: np.ndarray, faithful: np.ndarray, min_confidence: float) -> dict:
    """ECE (15 bins), AUROC for telling unfaithful frames, and the accept/reject confusion: counts,
    the share of frames accepted, the share of accepted frames below tau (accepted but unfaithful),
    and the share of frames at or above tau that were rejected (None where the share is of nothing)."""
    accepted = prob >= min_confidence
    bad, good = faithful == 0, faithful == 1
    return {"frames": int(len(prob)), "accepted": int(accepted.sum()),
            "accept_rate": _share(accepted, np.ones_like(accepted)),
            "below_tau_share_of_accepted": _share(accepted & bad, accepted),
            "reject_rate_above_tau": _share(~accepted & good, good),
            "ece": round(ece(prob, faithful, 15), 4),
            "auroc": round(float(auroc(prob, faithful)), 4) if bad.any() and good.any() else None,
            "below_tau": int(bad.sum()), "at_or_above_tau": int(good.sum()),
            "rejected_below_tau": int((~accepted & bad).sum()), "accepted_below_tau": int((accepted & bad).sum()),
            "accepted_above_tau": int((accepted & good).sum()), "rejected_above_tau": int((~accepted & good).sum()),
            "reject_rate_below_tau": round(float((~accepted[bad]).mean()), 4) if bad.any() else None,
            "keep_rate_above_tau": round(float(accepted[good].mean()), 4) if good.any() else None}


def contact_sheet(rows: list, out: str | Path, *, gap: int = 2) -> Path:
    """PNG grid: per pair, rows truth / dissolve / flow / nearest / straight / geodesic, frames left to right."""
    labels = ("truth", "dissolve", "flow", "nearest", "straight", "geodesic")
    blocks = []
    for truth, outs in rows:
        for lab in labels:
            strip = truth if lab == "truth" else outs[lab]
            blocks.append(np.concatenate([np.pad(f, ((gap, gap), (gap, gap), (0, 0)), constant_values=1.0)
                                          for f in strip], axis=1))
        blocks.append(np.ones((gap * 3, blocks[-1].shape[1], blocks[-1].shape[2]), dtype=np.float32))
    sheet = np.concatenate(blocks, axis=0)
    arr = np.round(np.clip(sheet, 0, 1) * 255).astype(np.uint8)
    img = Image.fromarray(arr[..., 0] if arr.shape[2] == 1 else arr)
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    img.save(out)
    return out


def format_table(report: dict) -> str:
    lines = ["routes asked between the pairs' true settings"] if report.get("ends") == "settings" else []
    lines += [f"{'method':<16} {'PSNR dB':>8} {'SSIM':>7} {'p10 dB':>7} {'pacing':>7} {'ECE':>6} {'AUROC':>6}"]
    for m in report["methods"]:
        r = report["methods"][m]
        c = r.get("confidence", {})
        pace = f"{r['pacing_error']:.3f}" if "pacing_error" in r else "-"
        e = f"{c['ece']:.3f}" if c else "-"
        a = f"{c['auroc']:.3f}" if c and c.get("auroc") is not None else "-"
        lines.append(f"{m:<16} {r['psnr']:8.2f} {r['ssim']:7.4f} {r['psnr_p10']:7.2f} {pace:>7} {e:>6} {a:>6}")
    if "by_span" in report:
        lines += ["", span_table(report["by_span"])]
    return "\n".join(lines)


def _num(x, fmt: str) -> str:
    return "-" if x is None else format(x, fmt)


def span_table(by_span: dict) -> str:
    """The per-bucket lines of `format_table`: quality per method, and for the routes with a
    confidence its ECE, AUROC, share accepted, share of accepted frames below tau and share of
    frames at or above tau rejected."""
    bounds = ", ".join(f"{name} {b['reach'][0]:.2f}-{b['reach'][1]:.2f}" for name, b in by_span.items())
    lines = [f"by span (reach of the pair's ends, share of the farthest apart: {bounds})",
             f"{'span':<7} {'pairs':>5} {'method':<16} {'PSNR dB':>8} {'SSIM':>7} {'p10 dB':>7} {'ECE':>6} "
             f"{'AUROC':>6} {'accept':>6} {'bad/acc':>7} {'rej/good':>8}"]
    for name, b in by_span.items():
        if not b["methods"]:
            lines.append(f"{name:<7} {b['pairs']:>5} (no pairs)")
        for m, r in b["methods"].items():
            c = r.get("confidence")
            conf = (f"{_num(c['ece'], '.3f'):>6} {_num(c['auroc'], '.3f'):>6} {_num(c['accept_rate'], '.0%'):>6} "
                    f"{_num(c['below_tau_share_of_accepted'], '.0%'):>7} {_num(c['reject_rate_above_tau'], '.0%'):>8}"
                    if c else f"{'-':>6} {'-':>6} {'-':>6} {'-':>7} {'-':>8}")
            lines.append(f"{name:<7} {b['pairs']:>5} {m:<16} {r['psnr']:8.2f} {r['ssim']:7.4f} {r['psnr_p10']:7.2f} "
                         + conf)
    lines.append("accept: share of frames accepted; bad/acc: share of the accepted frames below tau; "
                 "rej/good: share of the frames at or above tau rejected")
    return "\n".join(lines)
