"""The wire contract (pydantic), named by role: *Request is what a caller sends, *Out what it gets.

Requests are strict (no string-to-number coercion), refuse unknown keys and refuse NaN and
infinities. Limits that depend on the service's Settings (max_frames, max_fill_targets...) are
checked by the routes, which name the setting in the message.
"""
from __future__ import annotations

import base64
import io
from typing import Annotated, Literal

from pydantic import BaseModel, ConfigDict, Field, GetPydanticSchema, model_validator

NOTICE = "frames are synthesized by a learned model, not captured"
DETAIL = ("share of the frame's pixels, 0 to 1, carried over from real training images: by detail transfer (the "
          "nearest captured images moved onto the frame along an estimated optical flow, kept only where they "
          "agree with the decoded frame) or, on a model whose refine.config.mode is 'pair', the share where the two "
          "captures around the frame, each moved to it along the optical flow between them, agree. The frame is "
          "still synthesized, not captured. null when the model does not refine (chosen per model at training time)")
CONFIDENCE = ("calibrated probability that SSIM vs the true view >= tau; null when the frame was not judged (the "
              "model has no confidence, or an image end could not be placed: ends_placed false), and such a frame "
              "is never accepted")
TAU = ("the SSIM against the true view that the frames' confidence speaks about (chosen per model at training, "
       "train --tau); null: the model has no confidence and rejects every frame")
FILE_PATTERN = r"^(frame|target)_[0-9]{4,}\.(png|jpg)$"  # between frames, fill frames; 1-based index, 4 digits at least
FILE = ("name of the frame's file beside the manifest: frame_0001.png for between frames, target_0001.png for "
        "fill frames (the 1-based index, four digits at least; .jpg for JPEG); null when it was not written (the "
        "command line writes rejected frames only with --keep-rejected, fill never)")
REFINE_REQUEST = ("detail transfer on a model that refines (see GET /v1/models/{name}, refine.on). false: the decoded "
                  "frames only, faster and softer, each scored by the model's confidence fitted on decoded frames "
                  "(refused with 422 when the model has none: refine.skippable). No effect on a model that does not refine")
SIZE = ("the frames' size: 'full' (the default: the captures' own size, kept up to the cap set at training; the "
        "model's own when it kept none), 'working' (the model's resolution), or a long side in pixels from 8 up to "
        "the captures'. Each frame is judged at the working size; a larger one is made from the captures around "
        "it, at their own size, with the judged frame's broad difference from them added, where they agree with it")
ROUTES = ("geodesic", "straight")
FRAME_PARAMS = "the settings the frame shows: where it was made if made from the captures around it, else its code's"
JOB_STATES = ("queued", "running", "done", "failed", "cancelled")
RESOLUTIONS = (16, 32, 64, 128, 256)
MAX_VERSION = 2**31 - 1  # a version number the registry's index can hold (larger ones are refused with 422, not 500)

_EXAMPLE_PARAMS_A = {"lamp_azimuth": 30.0, "lamp_elevation": 40.0}
_EXAMPLE_PARAMS_B = {"lamp_azimuth": 120.0, "lamp_elevation": 60.0}
MIN_SIDE, MAX_SIDE = 8, 16384  # a frame's long side in pixels, whatever the model (each model caps it lower)
_SIZE_ERROR = f"Input should be 'working', 'full' or a long side in pixels, {MIN_SIDE} to {MAX_SIDE}"
# one error at `size` itself when no member of the union fits, not one per member
Size = Annotated[Literal["working", "full"] | Annotated[int, Field(ge=MIN_SIDE, le=MAX_SIDE)], GetPydanticSchema(
    lambda source, handler: {**handler(source), "custom_error_type": "invalid", "custom_error_message": _SIZE_ERROR})]


class _Request(BaseModel):
    model_config = ConfigDict(strict=True, extra="forbid", allow_inf_nan=False)


class _Output(_Request):
    """What every frame request says about the pictures it wants back."""
    size: Size = Field("full", description=SIZE)
    format: Literal["png", "jpeg"] = Field("png", description="picture format: lossless PNG, or JPEG (smaller "
                                                              "at full size; lossy)")
    quality: int = Field(90, ge=1, le=100, description="JPEG quality, 1 to 100 (format jpeg only)")


class _Out(BaseModel):
    model_config = ConfigDict(extra="forbid")


# -- errors -------------------------------------------------------------------------------------
class ErrorDetail(_Out):
    code: str = Field(description="stable machine-readable code, e.g. 'model_not_found'")
    message: str = Field(description="what went wrong, naming the bad value and the allowed range")
    field: str | None = Field(None, description="the request field at fault, dotted (e.g. 'start.image')")


class ErrorOut(_Out):
    error: ErrorDetail

    model_config = ConfigDict(json_schema_extra={"examples": [{"error": {
        "code": "model_not_found", "message": "no model named 'tile' in the registry", "field": "name"}}]})


# -- between ------------------------------------------------------------------------------------
class EndRequest(_Request):
    """One end of a route: an image (base64 PNG or JPEG) or settings by name, exactly one."""
    image: str | None = Field(None, description="base64 PNG or JPEG (a data:image/...;base64, prefix is allowed)")
    params: dict[str, float] | None = Field(None, description="settings by parameter name, in their units")

    @model_validator(mode="after")
    def _exactly_one(self) -> "EndRequest":
        if (self.image is None) == (self.params is None):
            raise ValueError("an end needs exactly one of 'image' or 'params'")
        return self


class BetweenRequest(_Output):
    start: EndRequest
    end: EndRequest
    frames: int = Field(8, ge=1, description="in-between frames, ends excluded (at most max_frames)")
    route: Literal["geodesic", "straight"] = "geodesic"
    min_confidence: float = Field(0.5, ge=0.0, le=1.0, description="frames below it are marked rejected")
    version: int | None = Field(None, ge=1, le=MAX_VERSION, description="model version (default: the latest)")
    refine: bool = Field(True, description=REFINE_REQUEST)

    model_config = ConfigDict(json_schema_extra={"examples": [
        {"start": {"params": _EXAMPLE_PARAMS_A}, "end": {"params": _EXAMPLE_PARAMS_B}, "frames": 8,
         "route": "geodesic", "min_confidence": 0.5},
        {"start": {"image": "iVBORw0KGgo...(base64 PNG)"}, "end": {"params": _EXAMPLE_PARAMS_B}, "frames": 4}]})


class _Picture:
    """Decoding helpers for a frame that carries its picture as base64 PNG (`image`)."""
    image: str

    def png(self) -> bytes:
        """The frame's file (PNG, or JPEG when the answer's format is jpeg), bytes as the service encoded them."""
        return base64.b64decode(self.image)

    def pil(self):
        """The frame as a PIL image (mode L or RGB)."""
        from PIL import Image

        with Image.open(io.BytesIO(self.png())) as img:
            img.load()
            return img.copy()

    def array(self):
        """The frame as a numpy array (H, W, C), float32 in [0, 1]."""
        import numpy as np

        img = self.pil()
        arr = np.asarray(img.convert("L" if img.mode in ("L", "I", "I;16") else "RGB"), dtype=np.float32) / 255.0
        return arr[..., None] if arr.ndim == 2 else arr


class _BetweenFrame(_Out):
    """What a between frame says, however its picture travels."""
    index: int = Field(ge=1, description="1-based position on the route")
    t: float = Field(ge=0.0, le=1.0, description="fraction of the route's length, i / (frames + 1)")
    confidence: float | None = Field(ge=0.0, le=1.0, description=CONFIDENCE)
    accepted: bool
    params: dict[str, float] = Field(description=FRAME_PARAMS)
    code: list[float] | None = Field(None, description="the frame's latent code (place it on the latent map "
                                                       "with POST /v1/models/{name}/map)")
    detail: float | None = Field(ge=0.0, le=1.0, description=DETAIL)


class FrameOut(_Picture, _BetweenFrame):
    """One synthesized frame: decoded from a latent code, refined by detail transfer when the model refines."""
    image: str = Field(description="base64 PNG or JPEG (the answer's format) at the answer's size")


class FrameFileOut(_BetweenFrame):
    """One frame of a manifest.json (a ZIP answer, or the folder `geotween between --out` writes): the
    frame as in FrameOut, its picture a PNG file beside the manifest."""
    file: str | None = Field(pattern=FILE_PATTERN, description=FILE)


class _BetweenHead(_Out):
    model: str
    version: int = Field(ge=1)
    tau: float | None = Field(None, gt=0.0, lt=1.0, description=TAU)
    route: Literal["geodesic", "straight"]
    frames: list  # each answer names its frame model
    accepted: int = Field(ge=0)
    rejected: int = Field(ge=0)
    start_params: dict[str, float]
    end_params: dict[str, float]
    start_code: list[float] | None = Field(None, description="latent code of the start")
    end_code: list[float] | None = Field(None, description="latent code of the end")
    ends_placed: bool = Field(True, description="false: an image end could not be placed among the captures "
                                                "(the frame the model makes at the settings it read for it does not "
                                                "match it to SSIM tau), so the route rests on settings nobody can "
                                                "vouch for: every frame's confidence is null and none is accepted")
    size: tuple[int, int] | None = Field(None, description="width and height of every frame, pixels (absent "
                                                           "from the answers of services without full-size frames)")
    format: Literal["png", "jpeg"] = "png"
    synthesized: Literal[True] = True
    notice: str = NOTICE


class BetweenOut(_BetweenHead):
    frames: list[FrameOut]


class BetweenManifestOut(_BetweenHead):
    """manifest.json of a between answer as files: in the ZIP answer (Accept: application/zip) and in the
    folder `geotween between --out` writes. The JSON answer with each frame's `image` replaced by `file`."""
    frames: list[FrameFileOut]
    latent_map: str | None = Field(None, description="the latent map picture beside the manifest (bank codes "
                                                     "and this route); written by the command line, absent "
                                                     "from the ZIP answer")


# -- fill ---------------------------------------------------------------------------------------
class FillRequest(_Output):
    targets: list[dict[str, float]] = Field(min_length=1, description="settings of each missing view "
                                                                      "(at most max_fill_targets)")
    min_confidence: float = Field(0.5, ge=0.0, le=1.0)
    version: int | None = Field(None, ge=1, le=MAX_VERSION)
    as_job: bool = Field(False, description="run as a job even when small enough to answer at once")
    refine: bool = Field(True, description=REFINE_REQUEST)

    model_config = ConfigDict(json_schema_extra={"examples": [
        {"targets": [_EXAMPLE_PARAMS_A, _EXAMPLE_PARAMS_B], "min_confidence": 0.5}]})


class _FillFrame(_Out):
    """What a fill frame says, however its picture travels."""
    index: int = Field(ge=1, description="1-based position in the request's targets")
    target: dict[str, float] = Field(description="the settings asked for")
    confidence: float | None = Field(ge=0.0, le=1.0, description=CONFIDENCE)
    accepted: bool
    params: dict[str, float] = Field(description=FRAME_PARAMS)
    detail: float | None = Field(ge=0.0, le=1.0, description=DETAIL)


class FillFrameOut(_Picture, _FillFrame):
    image: str = Field(description="base64 PNG or JPEG (the answer's format) at the answer's size")


class FillFrameFileOut(_FillFrame):
    """One frame of a fill manifest (a ZIP answer's manifest.json, or report.json of `geotween fill --out`)."""
    file: str | None = Field(pattern=FILE_PATTERN, description=FILE)


class _FillHead(_Out):
    model: str
    version: int = Field(ge=1)
    tau: float | None = Field(None, gt=0.0, lt=1.0, description=TAU)
    frames: list  # each answer names its frame model
    accepted: int = Field(ge=0)
    rejected: int = Field(ge=0)
    size: tuple[int, int] | None = Field(None, description="width and height of every frame, pixels (absent "
                                                           "from the answers of services without full-size frames)")
    format: Literal["png", "jpeg"] = "png"
    synthesized: Literal[True] = True
    notice: str = NOTICE


class FillOut(_FillHead):
    frames: list[FillFrameOut]


class FillManifestOut(_FillHead):
    """A fill answer as files: manifest.json of the ZIP answer (Accept: application/zip) and report.json of
    `geotween fill --out`. The JSON answer with each frame's `image` replaced by `file`."""
    frames: list[FillFrameFileOut]


# -- latent map ---------------------------------------------------------------------------------
class MapRequest(_Request):
    codes: list[list[float]] = Field(min_length=1, description="latent codes to place on the map, each of the "
                                                                "model's latent_dim (at most max_map_codes)")
    version: int | None = Field(None, ge=1, le=MAX_VERSION, description="model version (default: the latest)")

    model_config = ConfigDict(json_schema_extra={"examples": [{"codes": [[0.12, -0.4, 0.9], [0.3, -0.2, 0.7]]}]})


class MapPointOut(_Out):
    x: float = Field(description="along the map's first axis, code units")
    y: float = Field(description="along the map's second axis, code units")


class BankPointOut(MapPointOut):
    index: int = Field(description="1-based row of the bank")
    params: dict[str, float] = Field(description="the settings of the captured sample this code encodes")


class LatentMapOut(_Out):
    model: str
    version: int
    latent_dim: int
    explained: list[float] = Field(description="share of the bank's code variance along each map axis, [0, 1]")
    bank: list[BankPointOut] = Field(description="every bank code on the map, with its sample's settings")
    method: Literal["pca"] = Field("pca", description="principal components of the bank codes, fitted on the "
                                                      "bank alone")


class MapPointsOut(_Out):
    model: str
    version: int
    points: list[MapPointOut] = Field(description="the request's codes on the same map as GET .../map, in order")


# -- jobs ---------------------------------------------------------------------------------------
class ProgressOut(_Out):
    done: int
    total: int


class JobOut(_Out):
    id: str
    kind: Literal["fill", "training"]
    state: Literal["queued", "running", "done", "failed", "cancelled"]
    progress: ProgressOut
    created: str = Field(description="ISO-8601 UTC")
    started: str | None
    finished: str | None
    error: ErrorDetail | None
    model: str | None
    version: int | None
    result: str | None = Field(description="where the result is served once the job is done")


class TrainingRequest(_Request):
    scene: str = Field(description="path of a scene folder on the server")
    name: str = Field(description="model name to register the result under")
    steps: int | None = Field(None, ge=1, description="training steps (default: the full schedule)")
    budget_seconds: float | None = Field(None, gt=0, description="wall-clock cap on training, seconds")
    seed: int = Field(0, ge=0)
    resolution: Literal[16, 32, 64, 128, 256] = Field(64, description="pixels per side")
    max_size: int = Field(1024, ge=0, le=8192, description="keep the captures at their own size, long side capped "
                                                           "at this many pixels, for frames at full size (0: none)")
    tau: float = Field(0.90, gt=0.0, lt=1.0, description="the SSIM against the true view the model's confidence "
                                                        "will speak about (a frame is faithful at or above it)")

    model_config = ConfigDict(json_schema_extra={"examples": [
        {"scene": "/data/scenes/relief-tile", "name": "relief-tile", "budget_seconds": 600, "resolution": 64}]})


class TrainingOut(_Out):
    model: str
    version: int
    created: str
    hash: str
    metrics: dict
    warning: str | None = Field(None, description="plain words when the trained model's frames will be rejected "
                                                  "whatever they look like (too few held-out frames reached tau)")


# -- models -------------------------------------------------------------------------------------
class ModelSummaryOut(_Out):
    name: str
    latest_version: int
    versions: int
    latest_created: str


class ModelListOut(_Out):
    models: list[ModelSummaryOut]


class VersionOut(_Out):
    version: int
    created: str
    hash: str
    metrics: dict


class ParameterOut(_Out):
    name: str
    unit: str
    min: float
    max: float
    periodic: bool


class CurveOut(_Out):  # a curve fitted on one kind of held-out frames, as CalibrationOut's kind and method say
    kind: Literal["fitted", "bound"]
    method: str | None
    ece: float | None
    auroc: float | None
    rows: int | None = Field(description="held-out frames of its kind with a known truth")


class CalibrationOut(_Out):
    fitted: bool = Field(description="true when a confidence curve was fitted on held-out frames")
    kind: Literal["fitted", "bound", "none"] | None = Field(
        None, description="'fitted': a calibrated curve; 'bound': too few held-out frames of one kind to fit one, so "
                    "every frame gets one conservative rate (0 when none reached tau); 'none': no confidence, "
                    "every frame is rejected (null only from servers older than this field)")
    tau: float | None = Field(description="SSIM threshold the confidence refers to")
    method: str | None = Field(description="'platt' or 'isotonic'")
    signals: list[str]
    ece: float | None = Field(description="expected calibration error (15 bins) on held-out frames")
    auroc: float | None
    status: str | None
    ssim_quantiles: dict[str, float] = Field(default_factory=dict, description="p10, p50, p90 of the held-out geodesic frames' SSIM "
                                                         "against their truth: which tau this model can reach")
    warning: str | None = Field(None, description="plain words when this model's frames are rejected whatever they "
                                            "look like (no confidence, or one below most min_confidence values)")
    straight: CurveOut | None = Field(None, description="the straight route's own curve, which scores its frames; "
                                      "null: the curve above scores every frame (models trained before it)")


class ScoreOut(_Out):
    psnr: float | None = Field(description="mean PSNR against the held-out captures, dB")
    ssim: float | None = Field(description="mean SSIM against the held-out captures")


class RefinedScoreOut(ScoreOut):
    detail: float | None = Field(description="mean share of pixels carried over from real training images")


class RefineHoldoutOut(_Out):
    """Geodesic in-betweens whose truth is a held-out capture, scored both ways at training time."""
    decoded: ScoreOut = Field(description="the frames as decoded")
    refined: RefinedScoreOut = Field(description="the same frames after detail transfer")


class RefineOut(_Out):
    """Detail transfer: whether this model's frames take texture from its nearest training images
    (moved by an estimated optical flow, kept only where they agree with the decoded frame). Refined
    frames are still synthesized, not captured."""
    on: bool = Field(description="true: frames are refined and each carries a numeric `detail`; false: frames "
                                 "are decoded only and `detail` is null")
    chosen: bool = Field(description="true: the choice was made at training time on the held-out share (on only "
                                     "where refining won); false: the model was trained without one and never "
                                     "refines")
    config: dict | None = Field(description="the detail transfer settings chosen, used when on (neighbours: images "
                                            "warped per frame; match, spread: blur sigmas in px; tolerance: "
                                            "disagreement in [0, 1] intensity at which trust falls to 1/e; "
                                            "flow: how images are moved onto the frame, 'dis' or 'farneback' "
                                            "optical flow, or 'none' where camera and subject stand still; "
                                            "mode: absent or 'detail' for detail transfer onto the decoded frame, "
                                            "'pair' for frames made from the two (or three) captures around each, warped "
                                            "to it along the flow between them and blended, the decoded frame "
                                            "choosing where they disagree)")
    holdout: RefineHoldoutOut | None = Field(description="held-out figures behind the choice; null when there "
                                                         "were none")
    skippable: bool = Field(False, description="true: a request may send refine false and get the decoded frames "
                                               "(faster), scored by a confidence fitted on decoded frames")


class ModelOut(_Out):
    name: str
    latest_version: int
    version: int = Field(description="the version the parameter spec and calibration below describe")
    versions: list[VersionOut]
    parameters: list[ParameterOut]
    resolution: int
    channels: int
    metrics: dict
    calibration: CalibrationOut
    refine: RefineOut


class DeletedOut(_Out):
    model: str
    version: int
    deleted: Literal[True] = True


class HealthOut(_Out):
    status: str


class ReadyOut(_Out):
    status: str
    generation: int
