"""Serving engine: one bundle in memory with its latent graph; frames between two ends.

Ends are images (encoded) or settings (a local affine chart over the bank codes of the nearest
samples in settings space, with the settings-to-code head as fallback). Routes come from
`geodesic.Planner`: the geodesic is found on the pruned kNN graph of bank codes, pulled taut in
the settings chart within a tube of `tube` local sample spacings around real samples (chosen per
model on held-out routes of every span), and charted back to codes, so its frames lie between
real samples at every span; the straight route is the chord between the end codes. Every frame
carries the settings it shows (code-to-settings head) and a calibrated confidence. Frames are
synthesized, not captured.
"""
from __future__ import annotations

from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Mapping, Sequence

import numpy as np
import torch

from . import graph as lgraph
from . import pairs as lpairs
from . import placing as lplacing
from . import refine as lrefine
from . import route as lroute
from .bundle import Bundle, load_bundle
from .chart import SettingsChart
from .confidence import ConfidenceModel
from .geodesic import ROUTES, Planner, Route
from .manifest import LEGACY_SIGNALS
from .nets import inference_copy
from .refine import RefineConfig
from .train import to_images, to_tensor
from .triplets import normalised_coords

# every signal the engine can compute; pair_* come with frames made from bracketing captures (models.pairs)
SIGNALS = LEGACY_SIGNALS + ("detail", "pair_flow", "pair_span", "pair_off", "pair_gap")
# what a new model's confidence is fitted on: image_cycle would cost a second decode per request and adds nothing the
# cycle residual does not already carry (see bench/RESULTS.md). "nearest" is left out because the calibration set
# cannot show it as it is served: each calibration frame stands where a held-out capture was taken out of the bank, so
# its nearest bank code is about one spacing away, while a served in-between has the whole bank around it (measured
# mean 1.04 against 0.51 spacings on the lamp scene, 0.99 against 0.39 on the photo window); fitted on it, the
# confidence came out too low on every served frame (bench/RESULTS.md)
FITTED_SIGNALS = ("cycle", "settings")
# a refining model adds how little of the frame could be taken from real images (1 - detail share)
REFINED_SIGNALS = FITTED_SIGNALS + ("detail",)
# frames made from bracketing captures add where they disagree (1 - detail), how much of the blend the flows could
# not follow, the bracket's size and the frame's distance off it (spacings), and the frame's gap to the decoded one
PAIR_SIGNALS = REFINED_SIGNALS + ("pair_flow", "pair_span", "pair_off", "pair_gap")


def fitted_signals(refine: RefineConfig | None) -> tuple[str, ...]:
    """The signals a model serving frames with `refine` (None: decoded only) fits its confidence on."""
    if refine is None:
        return FITTED_SIGNALS
    return PAIR_SIGNALS if refine.mode == "pair" else REFINED_SIGNALS


@dataclass(frozen=True)
class ServingConfig:
    """How an engine serves its bundle. `tube` and `refine` None: as the bundle chose at training
    time (manifest.route, manifest.refine); a value overrides that choice."""
    graph_k: int | None = None     # neighbours per bank code in the latent graph (None: the graph's k rule)
    chart_neighbours: int = 6      # bank samples in the local chart of a settings point
    attach: int = 3                # bank nodes each end of a route joins
    tube: float | None = None      # local sample spacings around real samples a geodesic is pulled taut in
    refine: bool | None = None     # detail transfer from the nearest real images, on or off
    refine_threads: int = 2        # threads that refine one answer's frames
    # frames made from the captures around them may use the held-out captures too (real captures of the subject);
    # training-time choices and calibration turn this off, so the held-out truth is never among them
    holdout_captures: bool = True
    flow_cache_mb: int = 64        # flows between capture pairs kept across requests (0: none kept)

    def __post_init__(self) -> None:
        counts = {"chart_neighbours": 1, "attach": 1, "refine_threads": 1, "flow_cache_mb": 0}
        if self.graph_k is not None:
            counts["graph_k"] = 1
        for name, lo in counts.items():
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int) or value < lo:
                raise ValueError(f"{name}: {value!r} is out of range; allowed integers >= {lo}")
        if not isinstance(self.refine, bool) and self.refine is not None:
            raise ValueError(f"refine: {self.refine!r} is not allowed; expected true or false")
        if self.tube is not None and not self.tube > 0.0:
            raise ValueError(f"tube: {self.tube!r} is out of range; allowed > 0 local sample spacings")


@dataclass
class Endpoint:
    """One end of a request: an image (H, W, C) float in [0, 1] at the model's size, or settings."""
    image: np.ndarray | None = None
    params: Mapping[str, float] | None = None

    def __post_init__(self) -> None:
        if (self.image is None) == (self.params is None):
            raise ValueError("an end needs exactly one of 'image' or 'params'")


@dataclass
class Frame:
    index: int                 # 1-based
    t: float                   # fraction of the route's length
    image: np.ndarray          # (H, W, C) float32 in [0, 1]
    params: dict[str, float]   # the settings the frame shows: where it was made from captures, else its code's
    confidence: float | None   # calibrated probability that SSIM against the true view >= tau (None: unjudged, never accepted)
    accepted: bool
    signals: dict[str, float] = field(default_factory=dict)
    detail: float | None = None  # share of pixels carried over from real bank images (None: not refined)
    place: np.ndarray | None = None  # the settings it was made at (models.fullsize makes it larger there)


class FrameCounts:
    """accepted / rejected counts of anything with a `frames` list of accepted-flagged frames."""

    @property
    def accepted(self) -> int:
        return sum(f.accepted for f in self.frames)

    @property
    def rejected(self) -> int:
        return len(self.frames) - self.accepted


@dataclass
class Answer(FrameCounts):
    route: str
    frames: list[Frame]
    start_params: dict[str, float]
    end_params: dict[str, float]
    codes: np.ndarray          # (frames, d) codes of the frames
    path_nodes: np.ndarray     # bank indices the geodesic passed through (empty for straight)
    ends: np.ndarray | None = None  # (2, d) codes of the start and the end
    tau: float | None = None   # the SSIM threshold the frames' confidence speaks about (None: no confidence)
    ends_placed: bool = True   # False: an image end could not be placed, and no frame was judged


class Engine:
    def __init__(self, bundle: Bundle, config: ServingConfig = ServingConfig()):
        self.bundle = bundle
        self.config = config
        self.model = inference_copy(bundle.model)  # the bundle's own model stays as trained
        self.space = bundle.space
        self.manifest = bundle.manifest
        self.scale = bundle.scale
        # tube radius in local sample spacings for pulling routes taut: the one chosen on the held-out share
        # at training time (DEFAULT_TUBE for bundles without one) unless the config names one
        self.tube = self.manifest.route.tube if config.tube is None else config.tube
        # detail transfer from the nearest real images: as chosen on the held-out share at training
        # time (off for bundles without a choice) unless the config turns it on or off
        chosen = self.manifest.refine
        on = chosen.on if config.refine is None else config.refine
        self.refine = chosen.config if on else None
        pixels = bundle.pixels()  # read for the pruning test only, not kept
        self.graph = lgraph.build_graph(bundle.codes, k=config.graph_k, params=bundle.params, space=self.space,
                                        param_scale=self.scale, images=pixels.reshape(len(pixels), -1))
        del pixels
        self.chart = SettingsChart(bundle.params, bundle.codes, self.space, self.scale,
                                   neighbours=config.chart_neighbours, fallback=self._head_codes)
        self.planner = Planner(self.graph, self.space, bundle.params, self.scale, self.chart, attach=config.attach)
        held = bundle.arrays.get("holdout_params")
        self.holdout_captures = bool(config.holdout_captures and held is not None and len(held))
        # the settings of every capture a frame may be made from: the bank's, then the held-out share's
        self.capture_params = np.vstack([bundle.params, held]) if self.holdout_captures else bundle.params
        self.bracketer = lpairs.Bracketer(*normalised_coords(self.capture_params, self.space, self.scale))
        nn, _ = self.graph.tree.query(self.graph.warped, k=2)
        self.spacing = float(np.median(nn[:, 1]))  # typical code distance between bank neighbours
        conf = self.manifest.confidence
        self.confidence = None if conf is None else conf.predictor()
        self.straight_confidence = None if conf is None else conf.predictor("straight")
        self.tau = None if conf is None else conf.tau
        # a model computes only the signals its confidence was fitted on
        self.signal_names = conf.signals if conf is not None else fitted_signals(self.refine)
        # a refining model's second confidence, fitted on its decoded frames: what a request that
        # skips detail transfer (refine=False) is scored with; None for bundles trained without one
        plain = chosen.decoded_confidence
        self.decoded_confidence = None if plain is None else plain.predictor()
        self.decoded_straight_confidence = None if plain is None else plain.predictor("straight")
        self.decoded_signal_names = FITTED_SIGNALS if plain is None else plain.signals
        for where, names in (("confidence", self.signal_names),
                             ("refine.decoded_confidence", self.decoded_signal_names)):
            unknown = sorted(set(names) - set(SIGNALS))
            if unknown:
                raise ValueError(f"{where}.signals: {unknown} are not signals this engine knows; "
                                 f"expected names from {list(SIGNALS)}")

    @classmethod
    def load(cls, path: str | Path, config: ServingConfig = ServingConfig()) -> "Engine":
        return cls(load_bundle(path), config)

    @cached_property
    def latent_map(self):
        """The bank's 2-D PCA map (models.latent_map), fitted once per engine."""
        from .latent_map import fit_map

        return fit_map(self.bundle.codes)

    @cached_property
    def bank_pixels(self) -> np.ndarray:
        """The bank's uint8 images for detail transfer: memory-mapped from the bundle on disk, so a
        large bank's pixels are read as frames need them, not held."""
        return self.bundle.mapped_pixels()

    def refined(self, codes: np.ndarray, images: np.ndarray, cfg: RefineConfig | None = None,
                place: np.ndarray | None = None, rank: int = 0) -> tuple[np.ndarray, dict[str, np.ndarray]]:
        """Decoded `images` of `codes` made sharp from real bank images, and per frame its figures
        ({"detail": share of pixels taken from real images, plus the pair figures in "pair" mode}).
        Mode "detail": detail from the nearest bank images (models.refine). Mode "pair": the frame
        made from the two captures that bracket `place` (N, P), the settings it should show
        (default: those the code shows), the decoded frame arbitrating (models.pairs); `rank` > 0
        takes a worse bracket (for calibration)."""
        cfg = cfg or self.refine or RefineConfig()
        if cfg.mode == "pair":
            place = self.settings_of(codes) if place is None else np.asarray(place, dtype=np.float64)
            u = (self.space.wrap(place) - self.space.lo) / self.scale
            bracket = self.bracketer(u, rank)
            out, fig = lpairs.synthesize(self.captures, bracket, images, tolerance=cfg.tolerance, method=cfg.flow,
                                         pool=self._refine_pool, cache=self.flow_cache)
            return out, lpairs.signal_figures(fig, bracket)
        k = min(cfg.neighbours, len(self.bundle.codes))
        _, idx = self.graph.tree.query(self.graph.warp(codes), k=k)
        refs = self.captures(np.asarray(idx).reshape(len(codes), k))
        out, detail = lrefine.refine(images, refs, cfg, pool=self._refine_pool)
        return out, {"detail": detail}

    def captures(self, idx: np.ndarray, full: bool = False) -> np.ndarray:
        """Float images in [0, 1] of capture indices (any shape; `capture_params` order: the bank,
        then the held-out share), read from the bundle's pixels; `full`: at the captures' own size."""
        idx = np.asarray(idx, dtype=np.int64)
        bank, held = self.full_pixels if full else (self.bank_pixels, self.holdout_pixels)
        n = len(self.bundle.codes)
        if not self.holdout_captures or idx.size == 0 or idx.max() < n:
            return bank[idx].astype(np.float32) / 255.0
        out = np.empty(idx.shape + bank.shape[1:], dtype=np.uint8)
        inside = idx < n
        out[inside], out[~inside] = bank[idx[inside]], held[idx[~inside] - n]
        return out.astype(np.float32) / 255.0

    @cached_property
    def holdout_pixels(self) -> np.ndarray:
        """The held-out share's uint8 images, memory-mapped like `bank_pixels`."""
        return self.bundle.mapped_pixels("holdout_images")

    @cached_property
    def full_pixels(self) -> tuple[np.ndarray, np.ndarray]:
        """The bank's and the held-out share's captures at their own size (bundle.has_full), mapped."""
        return self.bundle.mapped_pixels("full_images"), self.bundle.mapped_pixels("holdout_full_images")

    @cached_property
    def flow_cache(self) -> lpairs.FlowCache:
        """Flows between capture pairs, kept across requests (models.pairs.FlowCache)."""
        return lpairs.FlowCache(self.config.flow_cache_mb << 20)

    def warm_flows(self, stop=None) -> int:
        """Fill the flow cache with the flows of the capture pairs brackets are likely to take (a service
        runs it after a load); the pairs added. Nothing for a model that does not make frames from pairs."""
        if self.refine is None or self.refine.mode != "pair" or self.config.flow_cache_mb == 0:
            return 0
        return lpairs.warm(self.flow_cache, self.captures, lpairs.likely_pairs(self.bracketer), self.refine.flow, stop)

    @cached_property
    def _refine_pool(self) -> ThreadPoolExecutor | None:
        threads = self.config.refine_threads
        return ThreadPoolExecutor(threads, thread_name_prefix="refine") if threads > 1 else None

    def render(self, codes: np.ndarray, refine: bool = True, place: np.ndarray | None = None, rank: int = 0
               ) -> tuple[np.ndarray, dict[str, np.ndarray] | None]:
        """The frames as served: decoded, then made sharp from real images when this model refines
        and `refine` does not turn it off; (images, per-frame figures of `refined`, or None).
        `place`: the settings each frame should show (pair mode brackets them)."""
        images = self.decode(codes)
        if self.refine is None or not refine:
            return images, None
        return self.refined(codes, images, place=place, rank=rank)

    def scoring(self, refine: bool = True, route: str = "geodesic") -> tuple[tuple[str, ...], ConfidenceModel | None]:
        """(signal names, confidence model) for `route`'s frames (fills: "geodesic") rendered with `refine`: a
        refining model's decoded frames have their own (None for older bundles), the straight route its own curve."""
        chord = route == "straight"
        if refine or self.refine is None:
            return self.signal_names, self.straight_confidence if chord else self.confidence
        return self.decoded_signal_names, self.decoded_straight_confidence if chord else self.decoded_confidence

    resolution = property(lambda self: self.manifest.resolution, doc="pixels per side of the model's images")
    channels = property(lambda self: self.manifest.channels, doc="1 (grayscale) or 3 (RGB)")

    # -- ends ---------------------------------------------------------------------------------
    @torch.inference_mode()
    def encode(self, images: np.ndarray) -> np.ndarray:
        """(N, H, W, C) float in [0, 1] at the model's size -> (N, d) codes."""
        images = np.asarray(images, dtype=np.float32)
        want = (self.resolution, self.resolution, self.channels)
        if images.ndim != 4 or images.shape[1:] != want:
            raise ValueError(f"images: shape {images.shape[1:]} not allowed; expected {want}")
        return self.model.encoder(to_tensor(images)).double().numpy()

    @torch.inference_mode()
    def decode(self, codes: np.ndarray) -> np.ndarray:
        """(N, d) codes -> (N, H, W, C) float32 images, decoded in one batch."""
        return to_images(self.model.decoder(torch.as_tensor(codes, dtype=torch.float32)))

    @torch.inference_mode()
    def settings_of(self, codes: np.ndarray) -> np.ndarray:
        """(N, d) codes -> (N, P) settings the code-to-settings head reads from them."""
        f = self.model.to_features(torch.as_tensor(codes, dtype=torch.float32)).double().numpy()
        return self.space.from_features(f)

    def code_of_settings(self, p: np.ndarray) -> np.ndarray:
        """(N, P) settings -> (N, d) codes by a local affine chart over the nearest bank samples."""
        return self.chart(p)

    @torch.inference_mode()
    def _head_codes(self, p: np.ndarray) -> np.ndarray:
        """(N, P) settings -> (N, d) codes by the settings-to-code head (the chart's fallback)."""
        f = torch.as_tensor(self.space.features(p), dtype=torch.float32)
        return self.model.to_code(f).double().numpy()

    def end_code(self, end: Endpoint) -> tuple[np.ndarray, np.ndarray]:
        """Code and settings (P,) of one end; settings of an image end are read by the chart run
        backwards (SettingsChart.settings_of)."""
        if end.image is not None:
            z = self.encode(np.asarray(end.image)[None])[0]
            # read by the chart over the bank codes around it (exact for a captured image), the head
            # where the code lies off the bank: measured on the turntable from scattered settings,
            # the head alone misread ends by about 3 sample spacings (bench/RESULTS.md)
            return z, self.chart.settings_of(z[None], self.settings_of)[0]
        p = self.space.vector(end.params)
        return self.code_of_settings(p[None])[0], p

    # -- routes -------------------------------------------------------------------------------
    def route(self, z_start: np.ndarray, p_start: np.ndarray, z_end: np.ndarray, p_end: np.ndarray,
              kind: str = "geodesic", tube: float | None = None) -> Route:
        """The route between two ends given by their codes (d,) and settings (P,); the geodesic is
        pulled taut within `tube` local sample spacings (default self.tube)."""
        if kind not in ROUTES:
            raise ValueError(f"route: {kind!r} is not allowed; expected one of {list(ROUTES)}")
        if kind == "straight":
            return self.planner.straight(z_start, z_end)
        return self.planner.geodesic(z_start, p_start, z_end, p_end, self.tube if tube is None else tube)

    # -- confidence ---------------------------------------------------------------------------
    def signals(self, codes: np.ndarray, images: np.ndarray, intended: np.ndarray,
                shown: np.ndarray | None = None, figures: Mapping[str, np.ndarray] | None = None,
                names: Sequence[str] | None = None) -> np.ndarray:
        """(N, len(self.signal_names)) off-manifold signals, each larger = worse: the cycle residual
        ||E(D(z)) - z|| and the distance to the nearest bank code (both in code spacings), the
        distance between the settings the frame shows and those it should show (settings
        spacings), the RMS pixel change of a second round trip D(E(D(z))), the share of the frame
        that could not be taken from real images (1 - detail; 1 for an unrefined frame), and for
        frames made from bracketing captures the pair figures (`refined`; 0 for other frames).
        `names`: the signals to compute (default self.signal_names); `figures`: from `render`."""
        figures = figures or {}

        def figure(name: str) -> np.ndarray:
            return np.asarray(figures[name], float) if name in figures else np.zeros(len(codes))

        names = self.signal_names if names is None else tuple(names)
        with torch.inference_mode():
            round_trip = {"cycle", "image_cycle"} & set(names)
            z2 = self.model.encoder(to_tensor(images)).double().numpy() if round_trip else None
            img2 = (to_images(self.model.decoder(torch.as_tensor(z2, dtype=torch.float32)))
                    if "image_cycle" in names else None)
        make = {"cycle": lambda: np.linalg.norm(z2 - codes, axis=1) / self.spacing,
                "nearest": lambda: self.graph.tree.query(self.graph.warp(codes), k=1)[0] / self.spacing,
                "settings": lambda: self.space.distance(self.settings_of(codes) if shown is None else shown,
                                                        intended, self.scale),
                "image_cycle": lambda: np.sqrt(np.mean((img2 - images) ** 2, axis=(1, 2, 3))),
                "detail": lambda: 1.0 - figure("detail"),
                **{n: (lambda n=n: figure(n)) for n in ("pair_flow", "pair_span", "pair_off", "pair_gap")}}
        return np.stack([make[n]() for n in names], axis=1).reshape(len(codes), len(names))

    def frames_at(self, codes: np.ndarray, t: np.ndarray, intended: np.ndarray, min_confidence: float = 0.5,
                  refine: bool = True, place: np.ndarray | None = None, route: str = "geodesic") -> list[Frame]:
        """Frames for `codes` (N, d) at route fractions `t`, each meant to show the settings `intended`
        (N, P): rendered, read by the code-to-settings head, scored by the confidence of `route`'s frames
        (as between does). `place`: where a frame made from captures is made (default: what the code shows)."""
        names, model = self.scoring(refine, route)
        if model is None and self.confidence is not None:
            raise ValueError("refine: this model version has no confidence fitted on frames without "
                             "detail transfer; ask with refine true, or train a new version")
        shown = self.settings_of(codes)
        place = shown if place is None else place
        images, figures = self.render(codes, refine, place)
        sig = self.signals(codes, images, intended, shown, figures, names=names)
        conf = None if model is None else model.predict(sig)
        made = place if figures is not None and "pair_span" in figures else shown  # made from captures there
        frames = []
        for i in range(len(codes)):
            c = None if conf is None else float(conf[i])
            frames.append(Frame(index=i + 1, t=float(t[i]), image=images[i], params=self.space.named(made[i]),
                                confidence=c, accepted=c is not None and c >= min_confidence,
                                signals=dict(zip(names, map(float, sig[i]))),
                                detail=None if figures is None else float(figures["detail"][i]), place=place[i]))
        return frames

    def between(self, start: Endpoint, end: Endpoint, frames: int = 8, route: str = "geodesic",
                min_confidence: float = 0.5, refine: bool = True) -> Answer:
        """`frames` in-between frames, frame i at t = i / (frames + 1) of the route's length.
        refine=False skips detail transfer on a refining model: its decoded frames, faster, scored
        by the confidence fitted on decoded frames (no effect on a model that does not refine)."""
        if isinstance(frames, bool) or not isinstance(frames, (int, np.integer)) or frames < 1:
            raise ValueError(f"frames: {frames!r} is out of range; expected an integer >= 1")
        if not 0.0 <= min_confidence <= 1.0:
            raise ValueError(f"min_confidence: {min_confidence!r} is outside [0, 1]")
        zs, ps = self.end_code(start)
        ze, pe = self.end_code(end)
        (ps, placed_start), (pe, placed_end) = self.place_end(start, zs, ps), self.place_end(end, ze, pe)
        way = self.route(zs, ps, ze, pe, route)
        t = lroute.interior_t(frames)
        codes = way.codes_at(t)
        along = way.settings_at(t)
        intended = self.space.lerp(ps, pe, t) if along is None else along
        # a geodesic's frames are made where the route puts them; the straight route's where its codes lie
        frames = self.frames_at(codes, t, intended, min_confidence, refine, place=along, route=route)
        placed = placed_start and placed_end
        if not placed:  # the frames' settings rest on ends it could not place: nobody judged them
            for f in frames:
                f.confidence, f.accepted = None, False
        return Answer(route=route, frames=frames,
                      start_params=self.space.named(ps), end_params=self.space.named(pe),
                      codes=codes, path_nodes=way.nodes, ends=np.stack([zs, ze]), tau=self.tau,
                      ends_placed=placed)

    def place_end(self, end: Endpoint, code: np.ndarray, settings: np.ndarray) -> tuple[np.ndarray, bool]:
        """(settings, placed) of an end: a settings end as given, always placed; an image end
        placed among the captures (models.placing: the frame made from them at its settings must
        give the image back to SSIM >= tau; searched when the first read does not, and then placed
        only where the search finds a capture it equals). The confidence
        is fitted on frames whose ends are placed right (calibration's image ends are captures); an
        image the model cannot place leaves every frame unjudged. A model without a confidence
        judges nothing anyway, and reads image ends without searching."""
        if end.image is None or self.tau is None:
            return settings, True
        return lplacing.place(self, end.image, code, settings, self.tau)

    def fill(self, targets: Sequence[Mapping[str, float]], min_confidence: float = 0.5,
             refine: bool = True) -> list[Frame]:
        """One frame per settings target (a missing view); `refine` as for between."""
        if len(targets) == 0:
            raise ValueError("targets: empty; expected at least one settings target")
        if not 0.0 <= min_confidence <= 1.0:
            raise ValueError(f"min_confidence: {min_confidence!r} is outside [0, 1]")
        p = np.array([self.space.vector(tg) for tg in targets]).reshape(len(targets), len(self.space))
        codes = self.code_of_settings(p)
        frames = self.frames_at(codes, np.zeros(len(p)), p, min_confidence, refine, place=p)
        for f in frames:
            f.t = 0.0
        return frames
