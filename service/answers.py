"""Frame answers on the wire: the one place where an engine's frames become the contract's models.

    engine.Answer / engine frames --between_answer / fill_frames--> Answer (PNG-encoded, in memory)
    a FillOut the client parsed  --from_wire---------------------> Answer
    Answer --to_wire--> BetweenOut / FillOut                   (the JSON answer: each frame's `image`,
                                                                base64 PNG)
                    --> BetweenManifestOut / FillManifestOut   (the ZIP answer's manifest.json, the
                                                                manifest.json of `between --out` and the
                                                                report.json of `fill --out`: each
                                                                frame's `file`)

Every answer a caller sees, whatever its form, is validated once by the model it is sent as, so
the JSON answer, the ZIP manifest and the command line's manifests cannot drift apart. Frame files
are named by `frame_file` everywhere (frame_0001.png, target_0001.png).
"""
from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Literal, Mapping, Sequence

from ..models.engine import FrameCounts
from ..models.fullsize import sized
from .imaging import encode_frame, png_base64
from .schemas import BetweenManifestOut, BetweenOut, FillManifestOut, FillOut

if TYPE_CHECKING:
    from .cache import ModelCache
    from .registry import ModelVersion

Kind = Literal["between", "fill"]
_PREFIX = {"between": "frame", "fill": "target"}
_BODY = {("between", False): BetweenOut, ("between", True): BetweenManifestOut,
         ("fill", False): FillOut, ("fill", True): FillManifestOut}


def frame_file(kind: Kind, index: int, fmt: str = "png") -> str:
    """The file name of frame `index` (1-based) of a between or fill answer in format `fmt`."""
    return f"{_PREFIX[kind]}_{index:04d}.{'jpg' if fmt == 'jpeg' else 'png'}"


@dataclass
class EncodedFrame:
    """One answered frame: its wire fields except the picture (keys as in FrameOut / FillFrameOut),
    and the picture's file bytes (PNG, or JPEG when asked) with its width and height."""
    fields: dict
    png: bytes
    size: tuple[int, int] = (0, 0)

    @property
    def accepted(self) -> bool:
        return bool(self.fields["accepted"])


@dataclass
class Answer(FrameCounts):
    """A between or fill answer, independent of how it is sent (JSON, ZIP, a folder)."""
    kind: Kind
    model: str
    version: int
    frames: list[EncodedFrame]
    route: str | None = None                       # between only, as are the fields below
    start_params: dict[str, float] = field(default_factory=dict)
    end_params: dict[str, float] = field(default_factory=dict)
    start_code: list[float] | None = None
    end_code: list[float] | None = None
    tau: float | None = None                       # the SSIM threshold the confidences speak about
    format: str = "png"                            # of every frame's picture: "png" or "jpeg"
    ends_placed: bool | None = None                # between only: False when an image end could not be placed


def _floats(values) -> list[float]:
    return [float(v) for v in values]


def _frame(f, index: int, extra: dict, fmt: str = "png", quality: int = 90) -> EncodedFrame:
    fields = {"index": index, **extra,
              "confidence": None if f.confidence is None else float(f.confidence), "accepted": bool(f.accepted),
              "params": {str(n): float(v) for n, v in f.params.items()},
              "detail": None if f.detail is None else float(f.detail)}
    height, width = f.image.shape[:2]
    return EncodedFrame(fields, encode_frame(f.image, fmt, quality), (int(width), int(height)))


def between_answer(ans, model: str, version: int, fmt: str = "png", quality: int = 90) -> Answer:
    """An engine.Answer as an Answer (encoding is CPU work: call it on the inference pool)."""
    frames = [_frame(f, k + 1, {"t": float(f.t), "code": _floats(code)}, fmt, quality)
              for k, (f, code) in enumerate(zip(ans.frames, ans.codes))]
    ends = getattr(ans, "ends", None)
    return Answer(kind="between", model=model, version=version, frames=frames, route=ans.route,
                  start_params=dict(ans.start_params), end_params=dict(ans.end_params),
                  start_code=None if ends is None else _floats(ends[0]),
                  end_code=None if ends is None else _floats(ends[1]), tau=getattr(ans, "tau", None),
                  ends_placed=bool(getattr(ans, "ends_placed", True)), format=fmt)


def fill_frames(frames: Sequence, targets: Sequence[dict], *, offset: int = 0, fmt: str = "png",
                quality: int = 90) -> list[EncodedFrame]:
    """Engine frames answering targets[offset:offset + len(frames)] (targets are that slice)."""
    return [_frame(f, offset + k + 1, {"target": {str(n): float(v) for n, v in targets[k].items()}}, fmt, quality)
            for k, f in enumerate(frames)]


def fill_chunk(cache: "ModelCache", entry: "ModelVersion", targets: Sequence[Mapping[str, float]],
               min_confidence: float, offset: int = 0, refine: bool = True, size: str | int = "full",
               fmt: str = "png", quality: int = 90) -> list[EncodedFrame]:
    """Frames for targets[offset:offset+len] at `size`, encoded; runs on the inference pool."""
    engine = cache.engine(entry)
    frames = sized(engine, engine.fill(targets, min_confidence=min_confidence, refine=refine), size)
    return fill_frames(frames, targets, offset=offset, fmt=fmt, quality=quality)


def fill_answer(frames: list[EncodedFrame], model: str, version: int, tau: float | None = None,
                fmt: str = "png") -> Answer:
    return Answer(kind="fill", model=model, version=version, frames=frames, tau=tau, format=fmt)


def from_wire(body: FillOut) -> Answer:
    """A fill's JSON answer (as the client parses it) back into an Answer, its pictures byte for byte."""
    frames = []
    for f in body.frames:
        data = f.png()
        # a service from before frames at full size sends no `size`: the picture's own header says it
        size = tuple(body.size) if body.size is not None else _picture_size(data)
        frames.append(EncodedFrame(f.model_dump(exclude={"image"}), data, size))
    return fill_answer(frames, body.model, body.version, body.tau, body.format)


def _picture_size(data: bytes) -> tuple[int, int]:
    """(width, height) of a PNG or JPEG file, from its header (PIL opens lazily: nothing is decoded)."""
    import io

    from PIL import Image

    with Image.open(io.BytesIO(data)) as img:
        return int(img.width), int(img.height)


def to_wire(answer: Answer, files: Sequence[str | None] | None = None, *, latent_map: str | None = None
            ) -> BetweenOut | FillOut | BetweenManifestOut | FillManifestOut:
    """The answer as the contract's model, validated once: without `files` the JSON answer (each
    frame's `image` a base64 PNG); with them the manifest (each frame's `file`, None where a frame
    was not written). `latent_map` names the latent map picture of a between manifest."""
    if files is None:
        frames = [{**f.fields, "image": png_base64(f.png)} for f in answer.frames]
    else:
        if len(files) != len(answer.frames):
            raise ValueError(f"files: {len(files)} names for {len(answer.frames)} frames")
        frames = [{**f.fields, "file": name} for f, name in zip(answer.frames, files)]
    size = answer.frames[0].size if answer.frames else (0, 0)
    body = {"model": answer.model, "version": answer.version, "tau": answer.tau, "frames": frames,
            "accepted": answer.accepted, "rejected": answer.rejected, "size": size, "format": answer.format}
    if answer.kind == "between":
        body.update(route=answer.route, start_params=answer.start_params, end_params=answer.end_params,
                    start_code=answer.start_code, end_code=answer.end_code,
                    ends_placed=True if answer.ends_placed is None else answer.ends_placed)
        if latent_map is not None:
            body["latent_map"] = latent_map
    return _BODY[answer.kind, files is not None].model_validate(body)


def manifest_json(model: BetweenManifestOut | FillManifestOut) -> str:
    """A manifest's text, indented; one without a latent map leaves the field out (the ZIP answer)."""
    return model.model_dump_json(indent=1, exclude={"latent_map"} if getattr(model, "latent_map", None) is None
                                 else None)
