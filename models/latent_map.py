"""The latent map: bank codes projected to two dimensions by PCA, and a PNG of it with routes.

The projection is fitted on the bank codes alone (numpy SVD of the centred codes), so the same
bank always gives the same map, and any code (a route's frames, its ends) is placed on it by the
same affine map. Each axis' sign is fixed so that its largest-magnitude loading is positive; the
map is therefore deterministic, not just defined up to a reflection. The HTTP map endpoint and
the command line's PNGs both use this module.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path
from typing import Sequence

import numpy as np
from PIL import Image, ImageDraw, ImageFont

MAP_AXES = 2


@dataclass(frozen=True)
class LatentMap:
    """PCA of the bank codes: project(z) = (z - mean) @ axes.T, padded with zeros to 2 columns."""
    mean: np.ndarray        # (d,)
    axes: np.ndarray        # (k, d) unit principal directions, k <= 2
    explained: np.ndarray   # (2,) share of the bank's variance along each map axis, in [0, 1]

    @property
    def latent_dim(self) -> int:
        return int(self.mean.shape[0])

    def project(self, codes: np.ndarray) -> np.ndarray:
        """(N, d) codes -> (N, 2) map coordinates (in code units)."""
        codes = np.asarray(codes, dtype=np.float64)
        if codes.ndim != 2 or codes.shape[1] != self.latent_dim:
            raise ValueError(f"codes: shape {codes.shape} not allowed; expected (N, {self.latent_dim})")
        xy = (codes - self.mean) @ self.axes.T
        return np.pad(xy, ((0, 0), (0, MAP_AXES - xy.shape[1])))


def fit_map(codes: np.ndarray) -> LatentMap:
    """Fit the map on (N, d) bank codes: the top two principal directions of the centred codes."""
    codes = np.asarray(codes, dtype=np.float64)
    if codes.ndim != 2 or len(codes) == 0 or codes.shape[1] == 0:
        raise ValueError(f"codes: shape {codes.shape} not allowed; expected (N, d) with N, d >= 1")
    if not np.all(np.isfinite(codes)):
        raise ValueError("codes: not all finite")
    mean = codes.mean(axis=0)
    _, s, vt = np.linalg.svd(codes - mean, full_matrices=False)
    k = min(MAP_AXES, len(s))
    axes = vt[:k].copy()
    pick = np.argmax(np.abs(axes), axis=1)
    axes *= np.sign(axes[np.arange(k), pick])[:, None]  # largest loading positive: one answer, not two
    total = float(np.sum(s ** 2))
    explained = np.zeros(MAP_AXES)
    if total > 0:
        explained[:k] = s[:k] ** 2 / total
    return LatentMap(mean=mean, axes=axes, explained=explained)


# -- the picture -----------------------------------------------------------------------------
@dataclass
class RouteMarks:
    """One route on the map: its frames in order (N, 2), its two ends (2, 2), which frames passed."""
    frames: np.ndarray
    ends: np.ndarray
    accepted: Sequence[bool] = field(default_factory=list)


INK, GRID, ROUTE, PAPER = (30, 30, 40), (225, 225, 230), (20, 70, 160), (255, 255, 255)


def hue_colour(u: float, periodic: bool) -> tuple[int, int, int]:
    """A colour for a setting at fraction u of its range: a hue circle when periodic, else a ramp."""
    if not periodic:
        u = 0.72 * float(np.clip(u, 0.0, 1.0))  # red to violet, so both ends differ
    h = 6.0 * (float(u) % 1.0)
    x = 1.0 - abs(h % 2.0 - 1.0)
    r, g, b = [(1, x, 0), (x, 1, 0), (0, 1, x), (0, x, 1), (x, 0, 1), (1, 0, x)][int(h) % 6]
    # a light, muted tone: bank points are background, the route is the subject
    return tuple(int(round(255 * (0.35 + 0.5 * c))) for c in (r, g, b))


def _font(size: int):
    try:
        return ImageFont.load_default(size=size)
    except TypeError:  # Pillow without FreeType: the fixed bitmap font
        return ImageFont.load_default()


def _cross(draw: ImageDraw.ImageDraw, x: float, y: float, r: float, width: int = 2) -> None:
    draw.line([(x - r, y - r), (x + r, y + r)], fill=INK, width=width)
    draw.line([(x - r, y + r), (x + r, y - r)], fill=INK, width=width)


def draw_map(lmap: LatentMap, bank_codes: np.ndarray, bank_colour: np.ndarray, routes: Sequence[RouteMarks],
             out: str | Path, *, colour_name: str = "", periodic: bool = False, size: tuple[int, int] = (720, 560),
             title: str = "latent map") -> Path:
    """Write a PNG: bank codes as dots (coloured by `bank_colour`, fractions in [0, 1] of one
    setting named `colour_name`), each route as a line through its frames, ends marked by shape
    (start square, end triangle) and rejected frames by a cross. Sizes in pixels."""
    width, height = size
    bank_xy = lmap.project(bank_codes)
    every = [bank_xy] + [np.vstack([r.frames, r.ends]) for r in routes]
    pts = np.vstack(every)
    lo, hi = pts.min(axis=0), pts.max(axis=0)
    extent = max(float(np.max(hi - lo)), 1e-9)
    left, top, right, bottom = 56, 40, width - 20, height - 78
    scale = min((right - left), (bottom - top)) / (extent * 1.08)  # one scale for both axes
    cx, cy = (left + right) / 2.0, (top + bottom) / 2.0
    mid = (lo + hi) / 2.0

    def at(p: np.ndarray) -> tuple[float, float]:
        return cx + (p[0] - mid[0]) * scale, cy - (p[1] - mid[1]) * scale  # map y grows upward

    img = Image.new("RGB", size, PAPER)
    draw = ImageDraw.Draw(img)
    font, small = _font(15), _font(12)
    draw.rectangle([left, top, right, bottom], outline=GRID, width=1)
    ox, oy = at(np.zeros(2))
    if left < ox < right:
        draw.line([(ox, top), (ox, bottom)], fill=GRID)
    if top < oy < bottom:
        draw.line([(left, oy), (right, oy)], fill=GRID)
    for p, u in zip(bank_xy, np.asarray(bank_colour, dtype=np.float64)):
        x, y = at(p)
        draw.ellipse([x - 4, y - 4, x + 4, y + 4], fill=hue_colour(u, periodic), outline=(150, 150, 160))
    for route in routes:
        line = [at(p) for p in np.vstack([route.ends[:1], route.frames, route.ends[1:]])]
        draw.line(line, fill=ROUTE, width=2)
        accepted = list(route.accepted) or [True] * len(route.frames)
        for p, ok in zip(route.frames, accepted):
            x, y = at(p)
            if ok:
                draw.ellipse([x - 4, y - 4, x + 4, y + 4], fill=ROUTE, outline=PAPER)
            else:
                _cross(draw, x, y, 5)
        (sx, sy), (ex, ey) = at(route.ends[0]), at(route.ends[1])
        draw.rectangle([sx - 6, sy - 6, sx + 6, sy + 6], fill=PAPER, outline=INK, width=2)
        draw.polygon([(ex, ey - 8), (ex - 7, ey + 6), (ex + 7, ey + 6)], fill=PAPER, outline=INK, width=2)
    ex1, ex2 = (100.0 * lmap.explained).round(0)
    draw.text((left, 12), title, fill=INK, font=font)
    draw.text((left, bottom + 6), f"map axis 1 ({ex1:.0f}% of the bank's variance)", fill=INK, font=small)
    draw.text((left + 5, top + 4), f"map axis 2 ({ex2:.0f}%)", fill=INK, font=small)
    # legend: shapes, not colour alone
    y = height - 44
    x = left
    draw.ellipse([x, y + 2, x + 8, y + 10], fill=hue_colour(0.3, periodic), outline=(150, 150, 160))
    label = "bank sample" + (f" (colour: {colour_name})" if colour_name else "")
    draw.text((x + 14, y), label, fill=INK, font=small)
    x += 24 + draw.textlength(label, font=small)
    draw.rectangle([x, y, x + 10, y + 10], fill=PAPER, outline=INK, width=2)
    draw.text((x + 16, y), "start", fill=INK, font=small)
    x += 60
    draw.polygon([(x + 5, y - 1), (x, y + 10), (x + 10, y + 10)], fill=PAPER, outline=INK, width=2)
    draw.text((x + 16, y), "end", fill=INK, font=small)
    x += 52
    draw.ellipse([x, y + 1, x + 9, y + 10], fill=ROUTE)
    draw.text((x + 15, y), "accepted frame", fill=INK, font=small)
    x += 28 + draw.textlength("accepted frame", font=small)
    _cross(draw, x + 5, y + 5, 5)
    draw.text((x + 16, y), "rejected frame", fill=INK, font=small)
    draw.text((left, height - 22), "frames are synthesized by a learned model, not captured", fill=(90, 90, 100),
              font=small)
    out = Path(out)
    out.parent.mkdir(parents=True, exist_ok=True)
    img.save(out)
    return out


def colour_fraction(params: np.ndarray, lo: float, span: float) -> np.ndarray:
    """Settings of one parameter to fractions of its range, for `draw_map`'s bank colours."""
    return (np.asarray(params, dtype=np.float64) - lo) / (span if span else 1.0)


def engine_map_png(engine, answers: Sequence, out: str | Path, *, title: str = "latent map") -> Path:
    """The map PNG of an engine's bank with the routes of between answers (their `codes`, `ends`
    and frames' `accepted`); bank dots coloured by the first parameter."""
    bundle, space = engine.bundle, engine.space
    lmap = engine.latent_map
    routes = [RouteMarks(frames=lmap.project(a.codes), ends=lmap.project(a.ends),
                         accepted=[f.accepted for f in a.frames]) for a in answers]
    first = space.parameters[0]
    colour = colour_fraction(bundle.params[:, 0], first.min, first.span)
    return draw_map(lmap, bundle.codes, colour, routes, out, colour_name=first.name, periodic=first.periodic,
                    title=title)
