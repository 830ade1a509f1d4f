"""Fitting the confidence model at training time, on the held-out share.

Every held-out sample h whose settings lie (within tolerance) on the segment between two bank
samples s and t gives frames with a known truth: the frame at fraction a of a route from s to t,
by each route kind, and the frame that a settings request for p_h yields. The off-manifold
signals of those frames, labelled by SSIM(frame, truth) >= tau, fit a combiner and a monotone
calibrator (`models.confidence.fit_confidence`); ECE and AUROC are measured on rows not used to fit.
"""
from __future__ import annotations

import numpy as np

from . import route as lroute
from .bundle import Bundle
from .confidence import fit_confidence
from .engine import ROUTES, SIGNALS, Engine
from .metrics import ssim_batch
from .triplets import mine_triplets

DEFAULT_TAU = 0.90


def calibration_frames(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                       span: float = 6.0, tolerance: float = 0.15, max_triplets: int = 400,
                       seed: int = 0) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Signals (N, len(SIGNALS)), SSIM (N,) against the truth, and each row's kind."""
    bank_p = engine.bundle.params
    n_bank = len(bank_p)
    allp = np.vstack([bank_p, holdout_params])
    trip = mine_triplets(allp, engine.space, scale=engine.scale, span=span, tolerance=tolerance)
    keep = (trip.m >= n_bank) & (trip.s < n_bank) & (trip.t < n_bank)
    order = np.nonzero(keep)[0]
    rng = np.random.default_rng(seed)
    if len(order) > max_triplets:
        order = np.sort(rng.choice(order, size=max_triplets, replace=False))
    codes, intended, truth, kinds = [], [], [], []
    bank_codes = engine.bundle.codes
    for j in order:
        s, m, t, a = trip.s[j], trip.m[j], trip.t[j], trip.a[j]
        for route in ROUTES:
            line, _ = engine.route_line(bank_codes[s], bank_codes[t], route)
            codes.append(lroute.at_t(line, [a])[0])
            intended.append(allp[m])
            truth.append(m - n_bank)
            kinds.append(route)
    fill_codes = engine.code_of_settings(holdout_params)
    codes += list(fill_codes)
    intended += list(holdout_params)
    truth += list(range(len(holdout_params)))
    kinds += ["fill"] * len(holdout_params)
    codes = np.asarray(codes)
    images = engine.decode(codes)
    sig = engine.signals(codes, images, np.asarray(intended))
    ssim = ssim_batch(images, holdout_images[np.asarray(truth)])
    return sig, ssim, kinds


def calibrate_engine(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                     tau: float = DEFAULT_TAU, seed: int = 0) -> tuple[dict, dict]:
    """(confidence entry for the manifest, report) for an engine whose bundle has no confidence yet."""
    if not 0.0 < tau < 1.0:
        raise ValueError(f"tau: {tau!r} is outside (0, 1)")
    sig, ssim, kinds = calibration_frames(engine, holdout_params, holdout_images, seed=seed)
    outcome = (ssim >= tau).astype(float)
    counts = {k: int(sum(1 for x in kinds if x == k)) for k in sorted(set(kinds))}
    base = {"tau": tau, "rows": int(len(outcome)), "rows_by_kind": counts,
            "faithful_share": round(float(outcome.mean()), 4) if len(outcome) else None}
    if len(outcome) < 12 or outcome.sum() < 3 or (1 - outcome).sum() < 3:
        # too few frames of one kind to fit: no confidence rather than a made-up one
        return None, {**base, "status": "not fitted: too few faithful or unfaithful held-out frames"}
    model, report = fit_confidence(sig, outcome, names=list(SIGNALS), seed=seed)
    summary = {**base, "status": "fitted", "ece": report.get("ece"), "auroc": report.get("auroc"),
               "method": report.get("method"), "report": report}
    return {"tau": tau, "signals": list(SIGNALS), "model": model.to_dict()}, summary


def calibrate_bundle_confidence(result, scene, arrays: dict[str, np.ndarray], *, tau: float = DEFAULT_TAU
                                ) -> tuple[dict | None, dict]:
    """Calibrate straight after training, from the in-memory model and bank arrays."""
    stored = {k: (np.round(np.clip(v, 0, 1) * 255).astype(np.uint8) if "images" in k else v)
              for k, v in arrays.items()}
    manifest = {"scale": [float(s) for s in result.scale], "resolution": result.model_config.resolution,
                "channels": result.model_config.channels, "confidence": None}
    engine = Engine(Bundle(manifest, result.model, scene.space, stored))
    return calibrate_engine(engine, arrays["holdout_params"], arrays["holdout_images"], tau=tau,
                            seed=result.train_config.seed)
