"""Fitting, at training time on the held-out share, what serving needs: the route's tube and the
confidence model.

Every held-out sample h whose settings lie (within tolerance) on the segment between two bank
samples s and t gives frames with a known truth: the frame at fraction a of a route from s to t,
by each route kind, and the frame that a settings request for p_h yields. The off-manifold
signals of those frames, labelled by SSIM(frame, truth) >= tau, fit a combiner and a monotone
calibrator (`models.confidence.fit_confidence`); ECE and AUROC are measured on rows not used to fit.
The same bracketed held-out samples first choose the geodesic's tube radius (`Engine.tube`): the
candidate whose route frames match the held-out truth best (mean PSNR), so the confidence is then
fitted on the routes the model will serve. They then decide whether the model refines its frames
with detail from the nearest real images (`choose_refine`): on only when that wins on the held-out
truth, with the cheapest flow setting that does as well as the best, and the confidence is fitted
on the frames exactly as served, refined or not.
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np

from .bundle import Bundle
from .confidence import BoundConfidence, fit_confidence
from .engine import ROUTES, Engine, ServingConfig, fitted_signals
from .manifest import Calibration, Confidence, Manifest, RefineChoice, RefineHoldout, RouteChoice, Scores
from .metrics import psnr_batch, ssim_batch
from .nets import Autoencoder
from .params import SPAN_BUCKETS, span_bucket
from .refine import RefineConfig
from .triplets import mine_triplets

DEFAULT_TAU = 0.90
MIN_FIT_ROWS, MIN_PER_CLASS = 12, 3  # fewer held-out frames of a kind, or of one outcome: no curve
SSIM_QUANTILES = (10, 50, 90)  # reported held-out SSIM quantiles of geodesic frames: which tau is reachable
TUBES = (0.5, 0.75, 1.0, 1.5, 2.0)  # candidate tube radii, in local sample spacings
MAX_SPAN = 12.0  # sample spacings: the longest calibration route (mining cost grows with its square)
REFINE_MARGIN_DB = 0.2  # detail transfer must win by this much mean PSNR on the held-out truth,
REFINE_MARGIN_SSIM = 0.003  # or, losing no PSNR, by this much mean SSIM (what the confidence speaks about)
REFINE_TOLERANCES = (0.05, 0.03)  # candidate trust tolerances (models.refine); the first is the default
# candidate flow settings for detail transfer, cheapest first: "none" (bank images where they
# stand) costs no flow estimate, which is most of the step's time and about 40% of a 16-frame
# answer's. The first within REFINE_TIE_DB of the best held-out PSNR, with SSIM within
# REFINE_TIE_SSIM of the best's, is taken: a flow estimate has to pay for its time with at least
# 0.1 dB (half the margin detail transfer itself must earn). Measured on the lamp tile: DIS won the
# held-out share by 0.08 dB, while on the truth set no flow was 0.035 dB better; on the photo
# window DIS wins by 1.6 dB (bench/RESULTS.md)
REFINE_FLOWS = ("none", "dis")
REFINE_TIE_DB = 0.1
REFINE_TIE_SSIM = 0.001
# frames made from the two captures that bracket them (models.pairs): candidate tolerances for the
# agreement of the two warped captures, tried with DIS flow. The mode that serves the held-out
# in-betweens best wins (mean SSIM, what the confidence speaks about; PSNR on a tie)
PAIR_TOLERANCES = (0.05, 0.1)
PAIR_FLOW = "dis-fine"  # models.flow.FINE_DIS: measured on the turntable scene, the best of the flows
PAIR_RANKS = (1, 2)  # next-best brackets whose frames calibration adds (`calibration_frames`)


def bank_only(engine: Engine) -> None:
    """Refuse an engine that makes frames from the held-out captures too: their truth would be
    among the captures a frame is made from (load it with ServingConfig(holdout_captures=False))."""
    if engine.holdout_captures:
        raise ValueError("held-out choices and calibration need an engine that makes frames from the bank's "
                         "captures only: load it with ServingConfig(holdout_captures=False)")


def bracketed(engine: Engine, holdout_params: np.ndarray, *, span: float | None = None, tolerance: float = 0.15,
              max_triplets: int = 400, seed: int = 0):
    """Triplets (s, m, t, a) with s, t bank samples and m a held-out one on their segment; m is
    indexed into the held-out share. Routes of every span are drawn: `span` (sample spacings)
    defaults to the farthest two settings can be (half a periodic setting's period, a whole
    range), up to MAX_SPAN; at most max_triplets, an equal share from each SPAN_BUCKETS bucket that
    has triplets, drawn with `seed`."""
    space, params = engine.space, engine.bundle.params
    if span is None:
        farthest = np.where(space.periodic, 0.5 * space.span, space.span) / engine.scale
        span = float(min(np.max(farthest), MAX_SPAN))
    n_bank = len(params)
    allp = np.vstack([params, holdout_params])
    trip = mine_triplets(allp, space, scale=engine.scale, span=span, tolerance=tolerance)
    order = np.nonzero((trip.m >= n_bank) & (trip.s < n_bank) & (trip.t < n_bank))[0]
    if len(order) > max_triplets:
        rng = np.random.default_rng(seed)
        buckets = np.array([span_bucket(r) for r in space.reach(allp[trip.s[order]], allp[trip.t[order]])])
        names = [n for n, _ in SPAN_BUCKETS if np.any(buckets == n)]
        share, picked = max_triplets // len(names), []
        for name in names:
            members = order[buckets == name]
            picked.append(rng.choice(members, size=min(share, len(members)), replace=False))
        order = np.sort(np.concatenate(picked))
    return trip.s[order], trip.m[order] - n_bank, trip.t[order], trip.a[order]


def route_codes(engine: Engine, s: np.ndarray, t: np.ndarray, a: np.ndarray, route: str,
                tube: float | None = None, *, image_ends: bool = False) -> np.ndarray:
    """(len(s), d) codes at fraction a of the route from bank sample s to bank sample t. The ends
    are given as settings (the samples' own), or with image_ends as a request with image ends gives
    them: the image's code (a bank code is its image's encoding) with the settings the head reads."""
    codes = engine.bundle.codes
    params = engine.settings_of(codes) if image_ends else engine.bundle.params
    return np.array([engine.route(codes[i], params[i], codes[j], params[j], route, tube).codes_at([f])[0]
                     for i, j, f in zip(s, t, a)]).reshape(len(s), codes.shape[1])


def choose_tube(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                candidates=TUBES, seed: int = 0) -> tuple[float, dict]:
    """Set engine.tube to the candidate whose geodesic frames best match the held-out truth
    (mean PSNR; the smaller radius on a tie) and return it with the PSNR of every candidate."""
    s, m, t, a = bracketed(engine, holdout_params, seed=seed)
    if len(s) == 0:
        return engine.tube, {}
    codes, params, scores = engine.bundle.codes, engine.bundle.params, {}
    # the graph path does not depend on the tube: searched once per triplet, pulled taut per tube
    paths = [engine.planner.path(codes[i], params[i], codes[k], params[k]) for i, k in zip(s, t)]
    for tube in map(float, candidates):
        at = np.array([engine.planner.pulled(u, nodes, tube).codes_at([f])[0] for (u, nodes), f in zip(paths, a)])
        scores[tube] = float(np.mean(psnr_batch(engine.decode(at), holdout_images[m])))
    best = max(scores, key=lambda c: (round(scores[c], 6), -c))
    engine.tube = best
    return best, {str(c): round(v, 3) for c, v in scores.items()}


def pick_refine(tried: dict[str, dict[float, dict]]) -> tuple[str, float]:
    """(flow, tolerance) from held-out scores {flow: {tolerance: {"psnr", "ssim"}}}, flows listed
    cheapest first: the cheapest flow with a candidate within REFINE_TIE_DB mean PSNR and
    REFINE_TIE_SSIM mean SSIM of the best candidate, and that flow's best tolerance (the smaller on
    a tie)."""
    scores = [r for by_tol in tried.values() for r in by_tol.values()]
    if not scores:
        raise ValueError("pick_refine: no candidates were scored")
    top = max(scores, key=lambda r: r["psnr"])
    for flow, by_tol in tried.items():  # the best candidate's own flow always qualifies
        near = [k for k, r in by_tol.items()
                if r["psnr"] >= top["psnr"] - REFINE_TIE_DB and r["ssim"] >= top["ssim"] - REFINE_TIE_SSIM]
        if near:
            return flow, max(near, key=lambda k: (by_tol[k]["psnr"], -k))
    raise AssertionError("unreachable: the best candidate's flow qualifies")


def refine_wins(decoded: dict, refined: dict) -> bool:
    """Whether detail transfer earns its place on held-out scores {"psnr", "ssim"}: REFINE_MARGIN_DB
    more mean PSNR without lowering mean SSIM, or REFINE_MARGIN_SSIM more mean SSIM without lowering
    mean PSNR."""
    gain_db, gain_ssim = refined["psnr"] - decoded["psnr"], refined["ssim"] - decoded["ssim"]
    return bool((gain_db >= REFINE_MARGIN_DB and gain_ssim >= 0.0)
                or (gain_ssim >= REFINE_MARGIN_SSIM and gain_db >= 0.0))


def choose_refine(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                  tolerances=REFINE_TOLERANCES, flows=REFINE_FLOWS, pair_tolerances=PAIR_TOLERANCES,
                  seed: int = 0) -> RefineChoice:
    """How the model makes its frames sharp (engine.refine), chosen on the held-out truth of
    geodesic in-betweens. Detail transfer: every flow setting (`flows`, cheapest first) with every
    tolerance, keeping the cheapest flow within REFINE_TIE_DB / REFINE_TIE_SSIM of the best, with its
    best tolerance. Frames from bracketing captures (mode "pair"): every `pair_tolerances`. The
    better of the two modes (mean SSIM, then PSNR) is on when it beats the decoded frames
    (`refine_wins`). Returns the choice with its held-out figures ("by_tolerance": the chosen
    candidates, "by_flow": every detail-transfer flow's, and "pair" under by_flow)."""
    bank_only(engine)
    s, m, t, a = bracketed(engine, holdout_params, seed=seed)
    engine.refine = None
    if len(s) == 0:
        return RefineChoice(chosen=True, on=False, config=RefineConfig(tolerance=float(tolerances[0])))
    codes = route_codes(engine, s, t, a, "geodesic")
    truth, place = holdout_images[m], holdout_params[m]

    def scored(img: np.ndarray) -> dict:
        return {"psnr": round(float(np.mean(np.minimum(psnr_batch(img, truth), 99.0))), 3),
                "ssim": round(float(np.mean(ssim_batch(img, truth))), 4)}

    def tried_with(cfg: RefineConfig) -> dict:
        refined, fig = engine.refined(codes, decoded, cfg, place=place)
        return {**scored(refined), "detail": round(float(np.mean(fig["detail"])), 4)}

    decoded = engine.decode(codes)
    dec = scored(decoded)
    tried = {flow: {float(tol): tried_with(RefineConfig(tolerance=float(tol), flow=flow)) for tol in tolerances}
             for flow in flows}
    flow, best = pick_refine(tried)
    cfg, ref, by_tol = RefineConfig(tolerance=best, flow=flow), tried[flow][best], tried[flow]
    pair = {float(tol): tried_with(RefineConfig(tolerance=float(tol), flow=PAIR_FLOW, mode="pair"))
            for tol in pair_tolerances}
    if pair:
        tol = max(pair, key=lambda k: (pair[k]["ssim"], pair[k]["psnr"], -k))
        if (pair[tol]["ssim"], pair[tol]["psnr"]) > (ref["ssim"], ref["psnr"]):
            cfg, ref, by_tol = RefineConfig(tolerance=tol, flow=PAIR_FLOW, mode="pair"), pair[tol], pair
    on = refine_wins(dec, ref)
    engine.refine = cfg if on else None
    engine.signal_names = fitted_signals(engine.refine)  # the confidence follows
    by_flow = {f: {str(k): v for k, v in by_t.items()} for f, by_t in tried.items()}
    if pair:
        by_flow["pair"] = {str(k): v for k, v in pair.items()}
    held = RefineHoldout(decoded=Scores(**dec), refined=Scores(**ref),
                         by_tolerance={str(k): v for k, v in by_tol.items()}, by_flow=by_flow)
    return RefineChoice(chosen=True, on=on, config=cfg, holdout=held)


def calibration_frames(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                       span: float | None = None, tolerance: float = 0.15, max_triplets: int = 400,
                       seed: int = 0, refine: bool = True) -> tuple[np.ndarray, np.ndarray, list[str]]:
    """Signals (N, len(engine.scoring(refine)[0])), SSIM (N,) against the truth, and each row's
    kind, for the frames as a request with `refine` is served: routes of every span (`bracketed`),
    by both routes, half with settings ends and half with image ends, and fill frames."""
    bank_only(engine)
    s, m, t, a = bracketed(engine, holdout_params, span=span, tolerance=tolerance, max_triplets=max_triplets,
                           seed=seed)
    codes, intended, truth, kinds = [], [], [], []
    image = np.arange(len(s)) % 2 == 1
    for route in ROUTES:
        for ends, rows in (("settings", ~image), ("image", image)):
            codes += list(route_codes(engine, s[rows], t[rows], a[rows], route, image_ends=ends == "image"))
            intended += list(holdout_params[m[rows]])
            truth += list(m[rows])
            kinds += [route] * int(rows.sum())
    fill_codes = engine.code_of_settings(holdout_params)
    codes += list(fill_codes)
    intended += list(holdout_params)
    truth += list(range(len(holdout_params)))
    kinds += ["fill"] * len(holdout_params)
    codes, intended = np.asarray(codes), np.asarray(intended)
    # as served: refined when the model refines, a geodesic's and a fill's frames made where they should show
    place = np.where(np.array(kinds)[:, None] == "straight", engine.settings_of(codes), intended)
    names = engine.scoring(refine)[0]
    images, figures = engine.render(codes, refine, place)
    sig = [engine.signals(codes, images, intended, figures=figures, names=names)]
    ssim = [ssim_batch(images, holdout_images[np.asarray(truth)])]
    if refine and engine.refine is not None and engine.refine.mode == "pair":
        # a held-out capture lies exactly between two bank samples; a served frame between captures
        # often lies off every pair (inside a grid cell, beside scattered samples). The fill frames
        # made from the next-best brackets show the confidence such frames
        fill = len(holdout_params)
        for rank in PAIR_RANKS:
            more, fig = engine.render(fill_codes, refine, holdout_params, rank=rank)
            sig.append(engine.signals(fill_codes, more, holdout_params, figures=fig, names=names))
            ssim.append(ssim_batch(more, holdout_images))
            kinds += [f"fill_bracket{rank + 1}"] * fill
    return np.vstack(sig), np.concatenate(ssim), kinds


def _fit_kind(sig: np.ndarray, outcome: np.ndarray, names: list[str], tau: float, seed: int
              ) -> tuple[dict, Calibration]:
    """(model dict, how it was fitted) on one kind's calibration rows: a fitted curve, or where the
    rows are too few of one kind one conservative rate for every frame (0 when no held-out frame
    reached tau), never "no confidence" (a frame nobody judged is never let through)."""
    n, good = len(outcome), int(outcome.sum())
    base = dict(tau=tau, rows=n, faithful_share=round(good / n, 4) if n else None)
    if n < MIN_FIT_ROWS or good < MIN_PER_CLASS or n - good < MIN_PER_CLASS:
        bound = BoundConfidence(names, successes=good, trials=n)
        status = (f"bound: {good} of {n} held-out frames reached SSIM {tau:g}, too few of one kind to fit a curve; "
                  f"every frame gets {bound.rate:.3f}")
        return bound.to_dict(), Calibration(status=status, **base)
    model, report = fit_confidence(sig, outcome, names=names, seed=seed)
    return model.to_dict(), Calibration(status="fitted", ece=report.get("ece"), auroc=report.get("auroc"),
                                        method=report.get("method"), report=report, **base)


def calibrate_engine(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                     tau: float = DEFAULT_TAU, seed: int = 0, refine: bool = True
                     ) -> tuple[Confidence, Calibration]:
    """(confidence, how it was fitted) for an engine whose bundle has no confidence yet, fitted on
    its frames as a request with `refine` is served. The main curve is fitted on every kind of
    frame (the chord's failures show it what a frame off the manifold looks like; fitted on the
    geodesic's and the fills' alone it came out too low on served geodesic frames at 128 px), except
    for a model that makes frames from the captures around them: there a chord's frame is made where
    its code shows, not where the frame should show, and with it in the pool the camera move's curve
    rejected 93-96% of its served geodesic frames at or above tau (26-35% without; 1-3% of the
    accepted below tau, bench/RESULTS.md). The straight route's frames get a curve of their own on
    top: with the same signals a chord's frame is faithful less often (it may cut across the
    manifold where no signal sees it), and the one curve let a tenth of the photo window's long
    chord frames through below tau (bench/RESULTS.md)."""
    if not 0.0 < tau < 1.0:
        raise ValueError(f"tau: {tau!r} is outside (0, 1)")
    sig, ssim, kinds = calibration_frames(engine, holdout_params, holdout_images, seed=seed, refine=refine)
    outcome = (ssim >= tau).astype(float)
    kind = np.array(kinds)
    geodesic, straight = kind == "geodesic", kind == "straight"
    reach = ssim[geodesic] if geodesic.any() else ssim
    names = list(engine.scoring(refine)[0])
    # frames made from the captures around them: a geodesic's or a fill's frame is made where it should
    # show, a chord's where its code shows, so the chord's frames are another population and only
    # its own curve learns from them
    pooled = ~straight if refine and engine.refine is not None and engine.refine.mode == "pair" else np.ones_like(straight)
    model, main = _fit_kind(sig[pooled], outcome[pooled], names, tau, seed)
    line, chord = _fit_kind(sig[straight], outcome[straight], names, tau, seed)
    summary = replace(main, rows=int(len(outcome)), rows_by_kind={k: kinds.count(k) for k in sorted(set(kinds))},
                      faithful_share=round(float(outcome.mean()), 4) if len(outcome) else None,
                      ssim_quantiles={f"p{q}": round(float(np.quantile(reach, q / 100)), 4) for q in SSIM_QUANTILES}
                      if len(reach) else {}, straight=chord)
    return Confidence(tau=tau, signals=tuple(names), model=model, straight=line), summary


def calibrate_decoded(engine: Engine, holdout_params: np.ndarray, holdout_images: np.ndarray, *,
                      tau: float = DEFAULT_TAU, seed: int = 0) -> tuple[Confidence | None, Calibration]:
    """(confidence, how it was fitted) for a refining model's frames served without detail
    transfer (a request's refine: false): fitted the same way on the same held-out frames, decoded
    only, with the signals of a model that does not refine."""
    return calibrate_engine(engine, holdout_params, holdout_images, tau=tau, seed=seed, refine=False)


def fit_serving(manifest: Manifest, model: Autoencoder, arrays: dict[str, np.ndarray]) -> Manifest:
    """Straight after training, from the in-memory model and bank arrays: `manifest` with the
    route's tube, the detail-transfer choice and the confidence (tau and seed from its training
    config), and how the confidence was fitted in its metrics."""
    stored = {k: (np.round(np.clip(v, 0, 1) * 255).astype(np.uint8) if "images" in k else v)
              for k, v in arrays.items()}
    engine = Engine(Bundle(manifest, model, stored), ServingConfig(tube=TUBES[0], refine=False,
                                                                    holdout_captures=False))
    tau, seed = manifest.train_config.confidence_tau, manifest.train_config.seed
    held = arrays["holdout_params"], arrays["holdout_images"]
    tube, by_tube = choose_tube(engine, *held, seed=seed)
    refine = choose_refine(engine, *held, seed=seed)
    confidence, report = calibrate_engine(engine, *held, tau=tau, seed=seed)
    if engine.refine is not None:
        decoded, decoded_report = calibrate_decoded(engine, *held, tau=tau, seed=seed)
        refine, report = replace(refine, decoded_confidence=decoded), replace(report, decoded_frames=decoded_report)
    return replace(manifest, route=RouteChoice(tube=tube, holdout_psnr_by_tube=by_tube, chosen=True), refine=refine,
                   confidence=confidence, metrics=replace(manifest.metrics, calibration=report))
