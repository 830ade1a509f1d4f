"""Settings space: named continuous parameters, some periodic.

Every function here is pure numpy over arrays of shape (..., P), P = number of parameters, in the
parameters' own units (degrees, millimetres, ...). A periodic parameter lives in [min, max) with
period max - min; differences and interpolation take the short arc.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Mapping, Sequence

import numpy as np


@dataclass(frozen=True)
class Parameter:
    name: str
    min: float
    max: float
    unit: str = ""
    periodic: bool = False

    @property
    def span(self) -> float:
        return float(self.max - self.min)

    def to_dict(self) -> dict:
        return {"name": self.name, "unit": self.unit, "min": self.min, "max": self.max,
                "periodic": self.periodic}

    @classmethod
    def from_dict(cls, d: Mapping) -> "Parameter":
        return cls(name=str(d["name"]), min=float(d["min"]), max=float(d["max"]),
                   unit=str(d.get("unit", "")), periodic=bool(d.get("periodic", False)))


# Span buckets by `ParamSpace.reach`: up to a quarter of a periodic setting's period (or half the
# range of another), up to three eighths (three quarters of the range), and beyond.
SPAN_BUCKETS = (("short", 0.5), ("medium", 0.75), ("long", 1.0))


def span_bucket(reach: float) -> str:
    """The name of the SPAN_BUCKETS bucket a reach in [0, 1] falls in."""
    return next((name for name, top in SPAN_BUCKETS if reach <= top + 1e-9), SPAN_BUCKETS[-1][0])


class ParamSpace:
    """The ordered parameters of one scene, with periodic-aware geometry."""

    def __init__(self, parameters: Sequence[Parameter]):
        self.parameters = tuple(parameters)
        self.names = tuple(p.name for p in self.parameters)
        self.lo = np.array([p.min for p in self.parameters], dtype=np.float64)
        self.hi = np.array([p.max for p in self.parameters], dtype=np.float64)
        self.span = self.hi - self.lo
        self.periodic = np.array([p.periodic for p in self.parameters], dtype=bool)

    def __len__(self) -> int:
        return len(self.parameters)

    def __eq__(self, other: object) -> bool:
        return isinstance(other, ParamSpace) and self.parameters == other.parameters

    @property
    def feature_dim(self) -> int:
        """Length of the feature vector: 2 per periodic parameter (cos, sin), 1 otherwise."""
        return len(self) + int(self.periodic.sum())

    def to_list(self) -> list[dict]:
        return [p.to_dict() for p in self.parameters]

    @classmethod
    def from_list(cls, items: Sequence[Mapping]) -> "ParamSpace":
        return cls([Parameter.from_dict(d) for d in items])

    # -- geometry ---------------------------------------------------------------------------
    def wrap(self, p: np.ndarray) -> np.ndarray:
        """Bring periodic coordinates into [min, max); others unchanged."""
        p = np.array(p, dtype=np.float64, copy=True)
        wrapped = self.lo + np.mod(p - self.lo, self.span)
        return np.where(self.periodic, wrapped, p)

    def delta(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """Signed difference b - a, on the short arc for periodic parameters."""
        d = np.asarray(b, dtype=np.float64) - np.asarray(a, dtype=np.float64)
        short = d - self.span * np.round(d / self.span)
        return np.where(self.periodic, short, d)

    def reach(self, a: np.ndarray, b: np.ndarray) -> np.ndarray:
        """How far apart a and b are, as a share in [0, 1] of the farthest two settings can be: per
        axis |delta| over half the period (periodic: the longest short arc) or over the whole range
        (others), the largest over the axes. Routes are bucketed by it (SPAN_BUCKETS)."""
        farthest = np.where(self.periodic, 0.5 * self.span, self.span)
        return np.max(np.abs(self.delta(a, b)) / farthest, axis=-1)

    def lerp(self, a: np.ndarray, b: np.ndarray, t: np.ndarray | float) -> np.ndarray:
        """Point at fraction t from a to b (short arc); t broadcasts against a trailing axis."""
        a = np.asarray(a, dtype=np.float64)
        t = np.asarray(t, dtype=np.float64)[..., None] if np.ndim(t) else float(t)
        return self.wrap(a + t * self.delta(a, b))

    def distance(self, a: np.ndarray, b: np.ndarray, scale: np.ndarray | None = None) -> np.ndarray:
        """Euclidean distance with each axis divided by `scale` (default: no scaling)."""
        d = self.delta(a, b)
        if scale is not None:
            d = d / scale
        return np.sqrt(np.sum(d * d, axis=-1))

    def gridlike(self, params: np.ndarray) -> np.ndarray:
        """(P,) bool: the axes whose samples take few distinct values (at most one in two samples)."""
        params = np.asarray(params, dtype=np.float64)
        n = len(params)
        return np.array([1 < len(np.unique(np.round(params[:, k], 9))) <= max(2, n // 2)
                         for k in range(params.shape[1])])

    def spacing(self, params: np.ndarray) -> np.ndarray:
        """Typical sample spacing per axis, in the axis' units.

        On a grid this is the grid step (the median gap between distinct values, the wrap-around
        gap included on periodic axes); on scattered samples, span / N^(1/P) (models.spacing
        rebalances scattered axes by how fast the images change along each).
        """
        params = np.asarray(params, dtype=np.float64)
        n, n_axes = params.shape
        out = np.empty(n_axes)
        for k, grid in enumerate(self.gridlike(params)):
            if grid:
                values = np.unique(np.round(params[:, k], 9))
                gaps = np.diff(values)
                if self.periodic[k]:
                    gaps = np.append(gaps, values[0] + self.span[k] - values[-1])
                out[k] = float(np.median(gaps))
            else:
                extent = self.span[k] if self.periodic[k] else max(np.ptp(params[:, k]), 1e-12)
                out[k] = extent / max(n, 2) ** (1.0 / n_axes)
        return out

    # -- features for the heads --------------------------------------------------------------
    def features(self, p: np.ndarray) -> np.ndarray:
        """(..., P) settings to (..., F) features: cos/sin for periodic axes, [-1, 1] otherwise."""
        p = np.asarray(p, dtype=np.float64)
        cols = []
        for k in range(len(self)):
            u = (p[..., k] - self.lo[k]) / self.span[k]
            if self.periodic[k]:
                cols += [np.cos(2 * np.pi * u), np.sin(2 * np.pi * u)]
            else:
                cols.append(2.0 * u - 1.0)
        return np.stack(cols, axis=-1)

    def from_features(self, f: np.ndarray) -> np.ndarray:
        """Inverse of `features` (angles by atan2, so any (cos, sin) pair maps to a setting)."""
        f = np.asarray(f, dtype=np.float64)
        cols, j = [], 0
        for k in range(len(self)):
            if self.periodic[k]:
                u = np.mod(np.arctan2(f[..., j + 1], f[..., j]) / (2 * np.pi), 1.0)
                j += 2
            else:
                u = (np.clip(f[..., j], -1.0, 1.0) + 1.0) / 2.0
                j += 1
            cols.append(self.lo[k] + u * self.span[k])
        return self.wrap(np.stack(cols, axis=-1))

    # -- named settings ----------------------------------------------------------------------
    def vector(self, values: Mapping[str, float]) -> np.ndarray:
        """Named settings to a vector; raises ValueError naming the unknown, missing or bad one."""
        unknown = sorted(set(values) - set(self.names))
        if unknown:
            raise ValueError(f"unknown parameter {unknown[0]!r}; expected {list(self.names)}")
        out = np.empty(len(self))
        for k, prm in enumerate(self.parameters):
            if prm.name not in values:
                raise ValueError(f"missing parameter {prm.name!r}; expected {list(self.names)}")
            try:
                v = float(values[prm.name])
            except (TypeError, ValueError):
                raise ValueError(f"parameter {prm.name!r}: {values[prm.name]!r} is not a number") from None
            if not np.isfinite(v):
                raise ValueError(f"parameter {prm.name!r}: {v!r} is not a finite number")
            if prm.periodic:
                v = float(self.wrap(np.where(np.arange(len(self)) == k, v, self.lo))[k])
            elif not (prm.min <= v <= prm.max):
                raise ValueError(f"parameter {prm.name!r}: {v:g} is outside [{prm.min:g}, {prm.max:g}]")
            out[k] = v
        return out

    def named(self, p: np.ndarray) -> dict[str, float]:
        return {name: float(v) for name, v in zip(self.names, np.asarray(p, dtype=np.float64))}
