"""A turntable test scene: a painted drum with a box-shaped knob, turning under a fixed camera.

The subject stands on a turntable disc: an upright drum (vertical colour bands, a belt of checks,
a row of dots, a zigzag skirt and one thin black seam) with a box knob stuck out on one side, so
it hides part of the drum as it turns. The disc top carries polar checks and its edge stripes.
Everything is ray cast in numpy (no 3-D library) and anti-aliased by SUPERSAMPLE x SUPERSAMPLE
samples per pixel. Shading is Lambert from a lamp fixed to the camera plus ambient:
albedo * (ambient + diffuse * max(0, n . l)); there are no cast shadows.

World units: z is up, the turntable axis is the z axis, the disc top is at z = 0. `yaw`
(degrees, periodic) turns the object counter-clockwise seen from above; the orthographic camera
looks along +y, tipped down by `camera_height` (degrees above the horizontal), at the drum's
centre (0, 0, drum_height / 2), which lands on the image's centre. Image column c spans world
x in [-W + c * 2W / S, -W + (c + 1) * 2W / S] (W = half_width, S = size); columns run with +x.
A point at surface angle theta on a radius r (theta = 0 faces the camera at yaw 0, theta grows
counter-clockwise from above) sits at x = r * sin(theta + yaw), so raising yaw moves the front
to the right. Views are truth frames: they are rendered, not captured.
"""
from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .params import Parameter, ParamSpace
from .render import grid_pairs, write_truth_set

TURNTABLE_SPACE = ParamSpace([
    Parameter("yaw", 0.0, 360.0, unit="deg", periodic=True),
    Parameter("camera_height", 10.0, 60.0, unit="deg"),
])
TURNTABLE_NAME = "turntable"
TURNTABLE_SCATTERED_NAME = "turntable-scattered"
GRID_YAW = np.arange(0, 360, 15.0)     # 24 values
GRID_HEIGHT = np.linspace(10, 60, 6)   # 6 values
TURNTABLE_DIRECTIONS = {"yaw": (1, 0), "height": (0, 1), "rising": (1, 1), "falling": (1, -1)}
LONG_YAW_STEPS = (7, 11)  # 105-165 deg: up to the longest short arc the 15 deg grid holds below half a turn
SUPERSAMPLE = 3           # samples per pixel along each image axis

RGB = tuple[float, float, float]
# Paint colours, each with a channel >= 0.7; the seam alone is painted black, so it alone reads exactly 0.
PALETTE: tuple[RGB, ...] = (
    (0.86, 0.20, 0.18), (0.95, 0.60, 0.15), (0.95, 0.85, 0.25), (0.25, 0.70, 0.30), (0.15, 0.65, 0.70),
    (0.22, 0.38, 0.85), (0.58, 0.30, 0.80), (0.92, 0.45, 0.65), (0.95, 0.92, 0.82),
)
RED, ORANGE, YELLOW, GREEN, TEAL, BLUE, VIOLET, PINK, CREAM = range(len(PALETTE))


@dataclass(frozen=True)
class Turntable:
    """Geometry (world units), paint and light of the scene."""
    drum_radius: float = 0.45
    drum_height: float = 0.55
    disc_radius: float = 0.90
    disc_thickness: float = 0.08
    knob_lo: tuple[float, float, float] = (0.40, -0.08, 0.12)  # box corners in the object's frame,
    knob_hi: tuple[float, float, float] = (0.68, 0.16, 0.40)   # on the +x side (surface angle 90 deg)
    seam_deg: float = 300.0       # surface angle of the black seam's centre line
    seam_half_width: float = 4.0  # degrees
    half_width: float = 1.0       # W: the image spans [-W, W] in both screen axes
    ambient: float = 0.3
    diffuse: float = 0.7          # ambient + diffuse = 1, so nothing clips
    lamp: tuple[float, float, float] = (-0.45, 0.35, 0.85)  # towards the lamp: (right, up, towards camera)
    background: RGB = (0.90, 0.91, 0.93)


def camera_axes(camera_height: float) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """World unit vectors (right, up, towards the camera) of the image for a camera height in degrees."""
    e = np.radians(camera_height)
    return (np.array([1.0, 0.0, 0.0]), np.array([0.0, np.sin(e), np.cos(e)]),
            np.array([0.0, -np.cos(e), np.sin(e)]))


def _turn(deg: float) -> np.ndarray:
    """Rotation matrix by deg about +z (counter-clockwise seen from above)."""
    a = np.radians(deg)
    return np.array([[np.cos(a), -np.sin(a), 0.0], [np.sin(a), np.cos(a), 0.0], [0.0, 0.0, 1.0]])


def _cylinder(o: np.ndarray, d: np.ndarray, radius: float, z0: float, z1: float) -> tuple[np.ndarray, np.ndarray]:
    """Entry distance (inf on a miss) of rays o + t d (o (N, 3), d (3,) pointing down) into an
    upright cylinder closed at z1, and whether they enter through the top."""
    a = d[0] ** 2 + d[1] ** 2
    b = 2.0 * (o[:, 0] * d[0] + o[:, 1] * d[1])
    disc = b * b - 4.0 * a * (o[:, 0] ** 2 + o[:, 1] ** 2 - radius ** 2)
    t_side = (-b - np.sqrt(np.maximum(disc, 0.0))) / (2.0 * a)
    z = o[:, 2] + t_side * d[2]
    t_side = np.where((disc >= 0) & (z >= z0) & (z <= z1), t_side, np.inf)
    t_top = (z1 - o[:, 2]) / d[2]
    x, y = o[:, 0] + t_top * d[0], o[:, 1] + t_top * d[1]
    t_top = np.where(x * x + y * y <= radius ** 2, t_top, np.inf)
    return np.minimum(t_side, t_top), t_top < t_side


def _box(o: np.ndarray, d: np.ndarray, lo, hi) -> tuple[np.ndarray, np.ndarray]:
    """Entry distance (inf on a miss) into an axis-aligned box and the axis of the entry face (slabs)."""
    near, far = np.full(len(o), -np.inf), np.full(len(o), np.inf)
    axis = np.zeros(len(o), dtype=int)
    for k in range(3):
        if abs(d[k]) < 1e-12:  # parallel to this slab: inside it or a miss
            far = np.where((o[:, k] >= lo[k]) & (o[:, k] <= hi[k]), far, -np.inf)
            continue
        t1, t2 = (lo[k] - o[:, k]) / d[k], (hi[k] - o[:, k]) / d[k]
        entry = np.minimum(t1, t2)
        axis = np.where(entry > near, k, axis)
        near, far = np.maximum(near, entry), np.minimum(far, np.maximum(t1, t2))
    return np.where((near <= far) & (near > 0), near, np.inf), axis


def _angle(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """Surface angle in [0, 360) degrees: 0 towards -y (the camera at yaw 0), counter-clockwise from above."""
    return np.mod(np.degrees(np.arctan2(x, -y)), 360.0)


def _paint_drum_side(theta: np.ndarray, z: np.ndarray, tt: Turntable) -> np.ndarray:
    """Palette index: 12 bands of 30 deg, a belt of checks, a row of dots, a zigzag skirt, the seam (-1)."""
    h = z / tt.drum_height
    band = np.floor(theta / 30.0).astype(int)
    paint = (band * 5) % len(PALETTE)
    checks = (np.floor(theta / 15.0).astype(int) + np.floor(h / 0.12).astype(int)) % 2
    paint = np.where((h > 0.36) & (h < 0.60), np.where(checks == 1, BLUE, CREAM), paint)
    centre = (np.floor(theta / 20.0) + 0.5) * 20.0  # dots every 20 deg
    arc = np.radians(theta - centre) * tt.drum_radius
    dot = np.hypot(arc, z - 0.82 * tt.drum_height) < 0.04
    paint = np.where(dot, (band + 3) % len(PALETTE), paint)
    zigzag = 0.10 + 0.08 * np.abs(np.mod(theta / 10.0, 2.0) - 1.0)  # a triangle wave, 20 deg period
    paint = np.where(h < zigzag, TEAL, paint)
    off = np.abs(np.mod(theta - tt.seam_deg + 180.0, 360.0) - 180.0)
    return np.where(off <= tt.seam_half_width, -1, paint)


def _paint_polar(rho: np.ndarray, theta: np.ndarray, tt: Turntable, top: bool) -> np.ndarray:
    """Palette index on the drum's top (top=True) or the disc's top: checks by sector and ring."""
    if top:
        inner = rho < 0.45 * tt.drum_radius
        sector = np.floor((theta + np.where(inner, 0.0, 22.5)) / 45.0).astype(int) % 2
        paint = np.where(inner, np.where(sector == 1, YELLOW, VIOLET), np.where(sector == 1, TEAL, PINK))
        return np.where(rho < 0.12, RED, paint)
    ring = np.floor((rho - tt.drum_radius) / 0.15).astype(int)
    sector = np.floor(theta / 15.0).astype(int)
    pairs = np.array([[CREAM, ORANGE], [GREEN, YELLOW], [BLUE, CREAM]])
    return pairs[np.clip(ring, 0, 2), (sector + ring) % 2]


def _paint_knob(axis: np.ndarray, p: np.ndarray, tt: Turntable) -> np.ndarray:
    """Palette index on the knob: checks on the outer face, a dot on the top, stripes on the sides."""
    lo, hi = np.asarray(tt.knob_lo), np.asarray(tt.knob_hi)
    u = (p - lo) / (hi - lo)  # (N, 3) in [0, 1] across the box
    checks = (np.floor(u[:, 1] * 3).astype(int) + np.floor(u[:, 2] * 3).astype(int)) % 2
    outer = np.where(checks == 1, PINK, BLUE)
    top = np.where(np.hypot(u[:, 0] - 0.6, u[:, 1] - 0.5) < 0.3, GREEN, YELLOW)
    sides = np.where(np.floor(u[:, 0] * 4).astype(int) % 2 == 1, ORANGE, RED)
    return np.choose(axis, [outer, sides, top])


def _shade(size: int, yaw: float, camera_height: float, tt: Turntable, ss: int) -> np.ndarray:
    """(size * ss, size * ss, 3) samples of the scene, before anti-aliasing."""
    n = size * ss
    right, up, back = camera_axes(camera_height)
    s = tt.half_width * (1.0 - 2.0 * (np.arange(n) + 0.5) / n)  # sample centres, from +W down to -W
    sy, sx = np.meshgrid(s, -s, indexing="ij")  # rows run down the image, columns run with +x
    centre = np.array([0.0, 0.0, tt.drum_height / 2.0])
    world = centre + sx.reshape(-1, 1) * right + sy.reshape(-1, 1) * up + 10.0 * back  # (N, 3) ray origins
    turn = _turn(-yaw)  # into the object's frame, where the scene stands still
    o, d = world @ turn.T, turn @ -back
    lamp = turn @ (np.asarray(tt.lamp) @ np.stack([right, up, back]))
    lamp /= np.linalg.norm(lamp)
    t_disc, disc_top = _cylinder(o, d, tt.disc_radius, -tt.disc_thickness, 0.0)
    t_drum, drum_top = _cylinder(o, d, tt.drum_radius, 0.0, tt.drum_height)
    t_knob, axis = _box(o, d, tt.knob_lo, tt.knob_hi)
    ts = np.stack([t_disc, t_drum, t_knob])  # (3, N)
    t = np.min(ts, axis=0)
    found = np.flatnonzero(np.isfinite(t))  # only rays that hit something are painted and lit
    hit, t, disc_top, drum_top, axis = (v[found] for v in (np.argmin(ts, axis=0), t, disc_top, drum_top, axis))
    p = o[found] + t[:, None] * d  # (M, 3) hit points
    theta = _angle(p[:, 0], p[:, 1])
    paint, normal = np.empty(len(p), dtype=int), np.empty((len(p), 3))
    for m, top in (((hit == 0) & disc_top, False), ((hit == 1) & drum_top, True)):
        paint[m] = _paint_polar(np.hypot(p[m, 0], p[m, 1]), theta[m], tt, top=top)
        normal[m] = (0.0, 0.0, 1.0)
    edge, side, knob = (hit == 0) & ~disc_top, (hit == 1) & ~drum_top, hit == 2
    paint[edge] = np.where(np.floor(theta[edge] / 10.0).astype(int) % 2 == 1, RED, CREAM)
    paint[side] = _paint_drum_side(theta[side], p[side, 2], tt)
    curved = edge | side
    normal[curved] = np.stack([p[curved, 0], p[curved, 1], np.zeros(curved.sum())], axis=-1)
    normal[curved] /= np.linalg.norm(normal[curved], axis=-1, keepdims=True)
    paint[knob] = _paint_knob(axis[knob], p[knob], tt)
    normal[knob] = np.eye(3)[axis[knob]] * -np.sign(d[axis[knob]])[:, None]
    albedo = np.vstack([PALETTE, [(0.0, 0.0, 0.0)]])[paint]  # index -1 is the black seam
    light = tt.ambient + tt.diffuse * np.clip(normal @ lamp, 0.0, None)
    rgb = np.tile(np.asarray(tt.background), (n * n, 1))
    rgb[found] = albedo * light[:, None]
    return rgb.reshape(n, n, 3)


def view(yaw: float, camera_height: float, size: int = 64, *, turntable: Turntable = Turntable(),
         supersample: int = SUPERSAMPLE) -> np.ndarray:
    """(size, size, 3) float32 in [0, 1]: the scene at yaw and camera_height (degrees)."""
    yaw, camera_height = float(yaw), float(camera_height)
    if not np.isfinite(yaw):
        raise ValueError(f"yaw must be a finite number of degrees, got {yaw!r}")
    lo, hi = TURNTABLE_SPACE.lo[1], TURNTABLE_SPACE.hi[1]
    if not lo <= camera_height <= hi:
        raise ValueError(f"camera_height must be in [{lo:g}, {hi:g}] deg, got {camera_height!r}")
    for name, v in (("size", size), ("supersample", supersample)):
        if not isinstance(v, (int, np.integer)) or v < 1:
            raise ValueError(f"{name} must be a positive integer, got {v!r}")
    yaw = float(TURNTABLE_SPACE.wrap(np.array([yaw, lo]))[0])  # yaw and yaw + 360 are one setting
    img = _shade(size, yaw, camera_height, turntable, supersample)
    img = img.reshape(size, supersample, size, supersample, 3).mean(axis=(1, 3))  # box anti-aliasing
    return np.clip(img, 0.0, 1.0).astype(np.float32)


def render_views(params: np.ndarray, size: int = 64) -> np.ndarray:
    """(N, 2) settings (yaw, camera_height) to (N, size, size, 3) views."""
    return np.stack([view(y, h, size) for y, h in np.asarray(params, dtype=np.float64)])


def turntable_grid() -> np.ndarray:
    """(144, 2) grid settings (yaw, camera_height): yaw every 15 deg x camera height every 10 deg."""
    yaw, height = np.meshgrid(GRID_YAW, GRID_HEIGHT, indexing="ij")
    return np.stack([yaw.ravel(), height.ravel()], axis=-1)


def turntable_scattered(count: int = 220, seed: int = 0) -> np.ndarray:
    """(count, 2) settings drawn uniformly over the whole space (yaw in [0, 360), height in [10, 60])."""
    if count < 1:
        raise ValueError(f"count must be >= 1, got {count}")
    u = np.random.default_rng(seed).random((count, 2))
    return TURNTABLE_SPACE.wrap(TURNTABLE_SPACE.lo + u * TURNTABLE_SPACE.span)


def turntable_pairs(count: int = 90, seed: int = 0, min_steps: int = 2, max_steps: int = 5) -> list[dict]:
    """Pairs of grid settings `steps` grid steps apart along yaw, height or a diagonal (short arc)."""
    return grid_pairs(TURNTABLE_SPACE, (GRID_YAW, GRID_HEIGHT), TURNTABLE_DIRECTIONS, count, seed=seed,
                      min_steps=min_steps, max_steps=max_steps)


def turntable_long_pairs(count: int = 24, seed: int = 0) -> list[dict]:
    """Long pairs along yaw only, LONG_YAW_STEPS grid steps (105-165 deg) apart on the short arc."""
    lo, hi = LONG_YAW_STEPS
    return grid_pairs(TURNTABLE_SPACE, (GRID_YAW, GRID_HEIGHT), {"yaw": TURNTABLE_DIRECTIONS["yaw"]}, count,
                      seed=seed, min_steps=lo, max_steps=hi)


def write_turntable_scene(out: str | Path, *, size: int = 64, pairs: int = 90, long_pairs: int = 24,
                          scattered: bool = False, seed: int = 0) -> tuple[Path, Path]:
    """Write OUT/scene (RGB PNGs: the 144 grid views, or `turntable_scattered` samples with
    scattered=True) and OUT/truth (in-betweens at t = 1/6 ... 5/6, always between grid settings):
    `pairs` pairs from `turntable_pairs`, then `long_pairs` from `turntable_long_pairs`."""
    from .scene import save_scene

    out = Path(out)
    settings = turntable_scattered(seed=seed) if scattered else turntable_grid()
    name = TURNTABLE_SCATTERED_NAME if scattered else TURNTABLE_NAME
    scene_dir = save_scene(out / "scene", name, TURNTABLE_SPACE, render_views(settings, size), settings)
    chosen = turntable_pairs(pairs, seed=seed) + turntable_long_pairs(long_pairs, seed=seed)
    truth_dir = write_truth_set(out / "truth", chosen, lambda p: view(p[0], p[1], size), TURNTABLE_SPACE)
    return scene_dir, truth_dir
