"""The bundle manifest (manifest.json), read once into typed sections.

    format        FORMAT when written; LEGACY_FORMAT is still read
    name, created (ISO 8601, UTC), hash (models.bundle.content_hash), scene (its name)
    model_config  ModelConfig (resolution and channels, also written at the top, come from it)
    train_config  TrainConfig
    space         ParamSpace
    scale         settings spacing per axis, in each parameter's unit
    bank_size, holdout_size
    metrics       Metrics: the training figures and the calibration report
    confidence    Confidence or None: tau, the signal names, the fitted confidence model
    route         RouteChoice: the geodesic's tube radius, chosen on the held-out share
    refine        RefineChoice: detail transfer on or off, its settings, the held-out figures behind
                  the choice, and the confidence of decoded frames (for requests that skip it)

Format 1 manifests were written before some sections existed and get what the code has always
done for them: no route section means the tube DEFAULT_TUBE, no refine section means no detail
transfer, a confidence without signal names was fitted on LEGACY_SIGNALS, a refine config without
a flow was chosen with Farneback flow. Format 2 writes every section, null where training made no
choice, so there a missing key is damage, not age. Whatever cannot be read raises BundleError
naming the field.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any, Mapping

from .confidence import BoundConfidence, ConfidenceModel
from .nets import ModelConfig
from .params import ParamSpace
from .refine import RefineConfig
from .train import TrainConfig

FORMAT = "geotween-bundle/2"
LEGACY_FORMAT = "geotween-bundle/1"
FORMATS = (LEGACY_FORMAT, FORMAT)
DEFAULT_TUBE = 1.0  # bank spacings: a route keeps within one sample spacing of real samples
LEGACY_SIGNALS = ("cycle", "nearest", "settings", "image_cycle")  # confidences that name none
_OLD = object()  # marks "no default for a format 1 manifest either"


class BundleError(ValueError):
    """A bundle folder that is missing, incomplete or of an unknown format."""


# -- checked reads; `where` is the field's path in the manifest ------------------------------------
def _key(d: Mapping, key: str, where: str, legacy: bool, old: Any = _OLD) -> Any:
    """d[key]; where a format 1 manifest lacks it, `old` (when given)."""
    if key in d:
        return d[key]
    if legacy and old is not _OLD:
        return old
    raise BundleError(f"{where}.{key}: missing" if where else f"{key}: missing")


def _obj(value: Any, where: str, known: tuple[str, ...] | None = None) -> Mapping:
    if not isinstance(value, Mapping):
        raise BundleError(f"{where}: {value!r:.80} is not an object")
    extra = sorted(set(value) - set(known)) if known is not None else []
    if extra:
        raise BundleError(f"{where}: unknown fields {extra}; expected some of {list(known)}")
    return value


def _num(value: Any, where: str, *, lo: float | None = None, hi: float | None = None,
         none: bool = False) -> float | None:
    """A JSON number (NaN kept: a metric may be undefined), inside the open range (lo, hi)."""
    if value is None and none:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise BundleError(f"{where}: {value!r:.80} is not a number")
    if (lo is not None and not value > lo) or (hi is not None and not value < hi):
        allowed = " and ".join(f"{op} {v}" for op, v in ((">", lo), ("<", hi)) if v is not None)
        raise BundleError(f"{where}: {value!r} is out of range; allowed {allowed}")
    return value


def _int(value: Any, where: str, *, none: bool = False) -> int | None:
    if value is None and none:
        return None
    if isinstance(value, bool) or not isinstance(value, int) or value < 0:
        raise BundleError(f"{where}: {value!r:.80} is not a count (an integer >= 0)")
    return value


def _str(value: Any, where: str, *, none: bool = False) -> str | None:
    if value is None and none:
        return None
    if not isinstance(value, str):
        raise BundleError(f"{where}: {value!r:.80} is not a string")
    return value


def _numbers(value: Any, where: str) -> dict[str, float | None]:
    return {k: _num(v, f"{where}.{k}", none=True) for k, v in _obj(value, where).items()}


def _config(cls, value: Any, where: str):
    """A config dataclass from its stored dict; its own checks become BundleErrors."""
    try:
        return cls.from_dict(dict(_obj(value, where)))
    except (TypeError, ValueError) as exc:
        raise BundleError(f"{where}: {exc}") from None


# -- sections ---------------------------------------------------------------------------------------
@dataclass(frozen=True)
class Confidence:
    """A fitted confidence: the probability that a frame's SSIM against the true view is >= tau."""
    tau: float                     # SSIM threshold, in (0, 1)
    signals: tuple[str, ...]       # the off-manifold signals it reads, in its column order
    model: Mapping[str, Any]       # ConfidenceModel.to_dict(): combiner and calibrator
    straight: Mapping[str, Any] | None = None  # the straight route's own curve (same signals); None: `model`'s

    @property
    def method(self) -> str:
        """How the signals become a probability: the calibrator ("platt" or "isotonic"), or for a
        model without one its kind ("bound": one conservative rate for every frame)."""
        calibrator = self.model.get("calibrator")
        return self.model["kind"] if calibrator is None else calibrator["method"]

    def predictor(self, route: str = "geodesic") -> ConfidenceModel | BoundConfidence:
        """The model that scores frames of `route` (settings fills: "geodesic")."""
        model = self.straight if route == "straight" and self.straight is not None else self.model
        return ConfidenceModel.from_dict(model)

    def to_dict(self) -> dict:
        out = {"tau": self.tau, "signals": list(self.signals), "model": dict(self.model)}
        if self.straight is not None:
            out["straight"] = dict(self.straight)
        return out

    @classmethod
    def from_dict(cls, value: Any, where: str, legacy: bool = False) -> "Confidence | None":
        if value is None:
            return None
        d = _obj(value, where, ("tau", "signals", "model", "straight"))
        signals = _key(d, "signals", where, legacy, list(LEGACY_SIGNALS))
        if (not isinstance(signals, list) or not signals
                or not all(isinstance(s, str) for s in signals)):
            raise BundleError(f"{where}.signals: {signals!r:.80} is not a list of signal names")
        model = _obj(_key(d, "model", where, legacy), f"{where}.model")
        straight = None if d.get("straight") is None else _obj(d["straight"], f"{where}.straight")
        for key, m in (("model", model), ("straight", straight or model)):
            try:
                ConfidenceModel.from_dict(m)
            except (LookupError, TypeError, ValueError) as exc:
                raise BundleError(f"{where}.{key}: {exc}") from None
        return cls(tau=_num(_key(d, "tau", where, legacy), f"{where}.tau", lo=0.0, hi=1.0),
                   signals=tuple(signals), model=model, straight=straight)


@dataclass(frozen=True)
class Calibration:
    """How the confidence was fitted on the held-out share (written as metrics.confidence)."""
    status: str | None                          # "fitted", or why not
    tau: float | None = None
    rows: int | None = None                     # held-out frames with a known truth
    rows_by_kind: Mapping[str, int] = field(default_factory=dict)  # geodesic, straight, fill
    faithful_share: float | None = None         # share of those frames with SSIM >= tau
    ssim_quantiles: Mapping[str, float] = field(default_factory=dict)  # geodesic frames' SSIM p10, p50, p90
    ece: float | None = None                    # expected calibration error, 15 bins, rows not fitted on
    auroc: float | None = None
    method: str | None = None                   # "platt" or "isotonic"
    report: Mapping[str, Any] | None = None     # the fit's own report (reliability bins and more)
    decoded_frames: "Calibration | None" = None  # a refining model's second confidence, on decoded frames
    straight: "Calibration | None" = None  # the straight route's own curve, fitted on its frames only

    FIELDS = ("tau", "rows", "rows_by_kind", "faithful_share", "ssim_quantiles", "status", "ece", "auroc", "method",
              "report", "decoded_frames", "straight")

    def to_dict(self) -> dict:
        out = {"tau": self.tau, "rows": self.rows, "rows_by_kind": dict(self.rows_by_kind),
               "faithful_share": self.faithful_share, "status": self.status}
        if self.ssim_quantiles:  # bundles trained before it was recorded have none
            out["ssim_quantiles"] = dict(self.ssim_quantiles)
        for key in ("ece", "auroc", "method", "report", "decoded_frames", "straight"):
            value = getattr(self, key)
            if value is not None:
                out[key] = value.to_dict() if isinstance(value, Calibration) else value
        return out

    @classmethod
    def from_dict(cls, value: Any, where: str) -> "Calibration | None":
        if value is None:
            return None
        d = _obj(value, where, cls.FIELDS)
        report = d.get("report")
        return cls(status=_str(d.get("status"), f"{where}.status", none=True),
                   tau=_num(d.get("tau"), f"{where}.tau", lo=0.0, hi=1.0, none=True),
                   rows=_int(d.get("rows"), f"{where}.rows", none=True),
                   rows_by_kind={k: _int(v, f"{where}.rows_by_kind.{k}")
                                 for k, v in _obj(d.get("rows_by_kind", {}), f"{where}.rows_by_kind").items()},
                   faithful_share=_num(d.get("faithful_share"), f"{where}.faithful_share", none=True),
                   ssim_quantiles={k: _num(v, f"{where}.ssim_quantiles.{k}")
                                   for k, v in _obj(d.get("ssim_quantiles", {}), f"{where}.ssim_quantiles").items()},
                   ece=_num(d.get("ece"), f"{where}.ece", none=True),
                   auroc=_num(d.get("auroc"), f"{where}.auroc", none=True),
                   method=_str(d.get("method"), f"{where}.method", none=True),
                   report=None if report is None else _obj(report, f"{where}.report"),
                   decoded_frames=cls.from_dict(d.get("decoded_frames"), f"{where}.decoded_frames"),
                   straight=cls.from_dict(d.get("straight"), f"{where}.straight"))


@dataclass(frozen=True)
class Metrics:
    """Training figures (train/holdout PSNR in dB and SSIM, triplet losses, train_seconds, steps,
    triplets) and, when confidence was calibrated, how (written under "confidence")."""
    fit: Mapping[str, float | None] = field(default_factory=dict)
    calibration: Calibration | None = None

    def to_dict(self) -> dict:
        out = dict(self.fit)
        if self.calibration is not None:
            out["confidence"] = self.calibration.to_dict()
        return out

    @classmethod
    def from_dict(cls, value: Any) -> "Metrics":
        d = dict(_obj(value, "metrics"))
        calibration = Calibration.from_dict(d.pop("confidence", None), "metrics.confidence")
        return cls(fit=_numbers(d, "metrics"), calibration=calibration)


@dataclass(frozen=True)
class RouteChoice:
    """The geodesic's tube radius in bank spacings; chosen False: trained without a choice."""
    tube: float = DEFAULT_TUBE
    holdout_psnr_by_tube: Mapping[str, float | None] = field(default_factory=dict)  # dB per candidate
    chosen: bool = False

    def to_dict(self) -> dict | None:
        return {"tube": self.tube, "holdout_psnr_by_tube": dict(self.holdout_psnr_by_tube)} if self.chosen else None

    @classmethod
    def from_dict(cls, value: Any, legacy: bool = False) -> "RouteChoice":
        if value is None:
            return cls()
        d = _obj(value, "route", ("tube", "holdout_psnr_by_tube"))
        return cls(tube=_num(_key(d, "tube", "route", legacy, DEFAULT_TUBE), "route.tube", lo=0.0),
                   holdout_psnr_by_tube=_numbers(_key(d, "holdout_psnr_by_tube", "route", legacy, {}),
                                                 "route.holdout_psnr_by_tube"),
                   chosen=True)


@dataclass(frozen=True)
class Scores:
    """Mean held-out figures of geodesic in-betweens: PSNR (dB), SSIM, and for refined frames the
    share of pixels carried over from real images ([0, 1])."""
    psnr: float | None
    ssim: float | None
    detail: float | None = None

    def to_dict(self) -> dict:
        out = {"psnr": self.psnr, "ssim": self.ssim}
        if self.detail is not None:
            out["detail"] = self.detail
        return out

    @classmethod
    def from_dict(cls, value: Any, where: str) -> "Scores":
        d = _obj(value, where, ("psnr", "ssim", "detail"))
        return cls(*(_num(d.get(k), f"{where}.{k}", none=True) for k in ("psnr", "ssim", "detail")))


@dataclass(frozen=True)
class RefineHoldout:
    """The held-out figures behind a detail-transfer choice."""
    decoded: Scores                  # the frames as decoded
    refined: Scores                  # the same frames refined with the chosen settings
    by_tolerance: Mapping[str, Any] = field(default_factory=dict)  # the chosen flow's candidates
    by_flow: Mapping[str, Any] = field(default_factory=dict)       # every flow's candidates

    def to_dict(self) -> dict:
        out = {"decoded": self.decoded.to_dict(), "refined": self.refined.to_dict()}
        out.update({k: dict(v) for k, v in (("by_tolerance", self.by_tolerance), ("by_flow", self.by_flow)) if v})
        return out

    @classmethod
    def from_dict(cls, value: Any) -> "RefineHoldout | None":
        d = _obj(value, "refine.holdout", ("decoded", "refined", "by_tolerance", "by_flow"))
        if not d:  # no held-out sample lay between two bank samples: nothing was scored
            return None
        return cls(decoded=Scores.from_dict(_key(d, "decoded", "refine.holdout", False), "refine.holdout.decoded"),
                   refined=Scores.from_dict(_key(d, "refined", "refine.holdout", False), "refine.holdout.refined"),
                   by_tolerance=_obj(d.get("by_tolerance", {}), "refine.holdout.by_tolerance"),
                   by_flow=_obj(d.get("by_flow", {}), "refine.holdout.by_flow"))


@dataclass(frozen=True)
class RefineChoice:
    """Detail transfer as chosen at training time (models.calibrate.choose_refine). chosen False:
    trained without a choice, never refines unless forced, and then with `config`, the settings
    of the bundles written before the flow choice existed."""
    chosen: bool = False
    on: bool = False
    config: RefineConfig = field(default_factory=lambda: RefineConfig.from_dict(None))
    holdout: RefineHoldout | None = None
    decoded_confidence: Confidence | None = None  # scores a refining model's decoded frames

    @property
    def skippable(self) -> bool:
        """A request may skip detail transfer: there is a confidence for the decoded frames."""
        return self.decoded_confidence is not None

    def summary(self) -> dict:
        """{"on", "chosen", "config", "holdout", "skippable"}: what the models listing and the
        describe answer show (config None without a choice; holdout the decoded and refined figures)."""
        held = None
        if self.holdout is not None:
            held = {"decoded": {"psnr": self.holdout.decoded.psnr, "ssim": self.holdout.decoded.ssim},
                    "refined": {"psnr": self.holdout.refined.psnr, "ssim": self.holdout.refined.ssim,
                                "detail": self.holdout.refined.detail}}
        return {"on": self.on, "chosen": self.chosen, "config": self.config.to_dict() if self.chosen else None,
                "holdout": held, "skippable": self.skippable}

    def to_dict(self) -> dict | None:
        if not self.chosen:
            return None
        out = {"on": self.on, "config": self.config.to_dict(),
               "holdout": {} if self.holdout is None else self.holdout.to_dict()}
        if self.on or self.decoded_confidence is not None:  # training writes it exactly for refining models
            out["decoded_confidence"] = None if self.decoded_confidence is None else self.decoded_confidence.to_dict()
        return out

    @classmethod
    def from_dict(cls, value: Any, legacy: bool = False) -> "RefineChoice":
        if value is None or (legacy and value == {}):
            return cls()
        d = _obj(value, "refine", ("on", "config", "holdout", "decoded_confidence"))
        on = _key(d, "on", "refine", legacy, False)
        if not isinstance(on, bool):
            raise BundleError(f"refine.on: {on!r:.80} is not true or false")
        config = _obj(_key(d, "config", "refine", legacy, {}), "refine.config")
        if not legacy and "flow" not in config:
            raise BundleError("refine.config.flow: missing")
        return cls(chosen=True, on=on, config=_config(RefineConfig, config, "refine.config"),
                   holdout=RefineHoldout.from_dict(_key(d, "holdout", "refine", legacy, {})),
                   decoded_confidence=Confidence.from_dict(d.get("decoded_confidence"), "refine.decoded_confidence",
                                                           legacy))


# -- the manifest -----------------------------------------------------------------------------------
@dataclass(frozen=True)
class Manifest:
    name: str
    model_config: ModelConfig
    train_config: TrainConfig
    space: ParamSpace
    scale: tuple[float, ...]             # settings spacing per axis, each parameter's unit
    bank_size: int
    holdout_size: int
    metrics: Metrics = field(default_factory=Metrics)
    confidence: Confidence | None = None
    route: RouteChoice = field(default_factory=RouteChoice)
    refine: RefineChoice = field(default_factory=RefineChoice)
    scene: str | None = None
    created: str = ""                    # set when the bundle is written
    hash: str = ""                       # set when the bundle is written
    format: str = FORMAT

    FIELDS = ("format", "name", "created", "model_config", "train_config", "space", "resolution", "channels",
              "scale", "bank_size", "holdout_size", "metrics", "confidence", "scene", "route", "refine", "hash")

    @property
    def resolution(self) -> int:
        """Pixels per side of the model's images."""
        return self.model_config.resolution

    @property
    def channels(self) -> int:
        return self.model_config.channels

    @property
    def tau(self) -> float | None:
        """The SSIM threshold the confidence speaks about; None for a model without confidence."""
        return None if self.confidence is None else self.confidence.tau

    def calibration_summary(self) -> dict:
        """{"fitted", "kind", "tau", "method", "signals", "ece", "auroc", "status", "ssim_quantiles",
        "warning", "straight"}: the confidence and how it was fitted, as the describe answer shows them. kind:
        "fitted" (a curve), "bound" (one conservative rate for every frame) or "none" (no
        confidence: every frame is rejected); warning: plain words when frames will be rejected
        whatever they look like, else None."""
        conf, report = self.confidence, self.metrics.calibration or Calibration(status=None)
        kind = "none" if conf is None else ("bound" if conf.method == "bound" else "fitted")
        tau = report.tau if conf is None else conf.tau
        warning = None
        if kind == "none":
            warning = ("this model has no confidence (it was trained without calibration): every frame it serves "
                       "is rejected; train it again with calibration")
        elif kind == "bound":
            rate = float(conf.model.get("rate", 0.0))
            reach = f" (held-out SSIM p90 {report.ssim_quantiles['p90']:.3f})" if "p90" in report.ssim_quantiles else ""
            warning = (f"too few held-out frames reached SSIM {tau:g}{reach} to fit a confidence curve: every frame "
                       f"gets {rate:.3f}, so frames are rejected at min_confidence above it; train with a lower "
                       f"--tau to get a confidence you can use")
        chord = None if conf is None else conf.straight  # the straight route's own curve, if it has one
        curve = None if chord is None else {"kind": "fitted" if "calibrator" in chord else "bound",
                                            "method": (chord.get("calibrator") or {}).get("method"),
                                            **{k: getattr(report.straight, k, None) for k in ("ece", "auroc", "rows")}}
        return {"fitted": kind == "fitted", "kind": kind, "tau": tau, "method": report.method if conf is None
                else conf.method, "signals": [] if conf is None else list(conf.signals), "ece": report.ece,
                "auroc": report.auroc, "status": report.status or ("fitted" if conf is not None else "not calibrated"),
                "ssim_quantiles": dict(report.ssim_quantiles), "warning": warning, "straight": curve}

    def to_dict(self) -> dict:
        """The JSON object manifest.json holds."""
        return {"format": self.format, "name": self.name, "created": self.created,
                "model_config": self.model_config.to_dict(), "train_config": self.train_config.to_dict(),
                "space": self.space.to_list(), "resolution": self.resolution, "channels": self.channels,
                "scale": list(self.scale), "bank_size": self.bank_size, "holdout_size": self.holdout_size,
                "metrics": self.metrics.to_dict(),
                "confidence": None if self.confidence is None else self.confidence.to_dict(),
                "scene": self.scene, "route": self.route.to_dict(), "refine": self.refine.to_dict(),
                "hash": self.hash}

    @classmethod
    def from_dict(cls, value: Any) -> "Manifest":
        d = _obj(value, "manifest")
        if d.get("format") not in FORMATS:
            raise BundleError(f"format: unknown bundle format {d.get('format')!r}; expected one of {list(FORMATS)}")
        _obj(d, "manifest", cls.FIELDS)
        legacy = d["format"] == LEGACY_FORMAT
        model_config = _config(ModelConfig, _key(d, "model_config", "", legacy), "model_config")
        for key in ("resolution", "channels"):
            if _key(d, key, "", legacy) != getattr(model_config, key):
                raise BundleError(f"{key}: {d[key]!r} disagrees with model_config.{key} "
                                  f"{getattr(model_config, key)!r}")
        space = _key(d, "space", "", legacy)
        try:
            space = ParamSpace.from_list(space)
        except (KeyError, TypeError, ValueError) as exc:
            raise BundleError(f"space: {space!r:.80} is not a list of parameters ({exc!r})") from None
        scale = _key(d, "scale", "", legacy)
        if not isinstance(scale, list) or len(scale) != len(space):
            raise BundleError(f"scale: {scale!r:.80} is not a list of {len(space)} spacings, one per parameter")
        return cls(format=d["format"], name=_str(_key(d, "name", "", legacy), "name"),
                   created=_str(_key(d, "created", "", legacy), "created"),
                   hash=_str(_key(d, "hash", "", legacy), "hash"),
                   model_config=model_config,
                   train_config=_config(TrainConfig, _key(d, "train_config", "", legacy), "train_config"),
                   space=space, scale=tuple(_num(s, f"scale[{i}]", lo=0.0) for i, s in enumerate(scale)),
                   bank_size=_int(_key(d, "bank_size", "", legacy), "bank_size"),
                   holdout_size=_int(_key(d, "holdout_size", "", legacy), "holdout_size"),
                   metrics=Metrics.from_dict(_key(d, "metrics", "", legacy)),
                   confidence=Confidence.from_dict(_key(d, "confidence", "", legacy, None), "confidence", legacy),
                   scene=_str(_key(d, "scene", "", legacy, None), "scene", none=True),
                   route=RouteChoice.from_dict(_key(d, "route", "", legacy, None), legacy),
                   refine=RefineChoice.from_dict(_key(d, "refine", "", legacy, None), legacy))
