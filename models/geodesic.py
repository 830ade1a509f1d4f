"""Routes between two ends: the geodesic that follows the bank, and the straight chord.

The geodesic is found on the latent graph and drawn in the settings chart:
1. the shortest path over the pruned kNN graph of bank codes (`search.path_with_ends`) says
   which way the route goes: round a periodic setting, around holes in the sampling, along the
   manifold rather than across it;
2. the settings of its nodes (known exactly: they are captured samples), with the ends' settings,
   unwrapped on periodic axes, give the route as a polyline in settings space, in sample-spacing
   units; where a periodic setting's path went the long way round although the short arc is
   shorter, the short arc is taken (in-betweens take the short arc);
3. that polyline is pulled taut (`route.taut`) where every point of a chord keeps within `tube`
   local sample spacings of real samples (`Clearance`): on a fully sampled region the route is the
   straight line in settings, across a gap it keeps the bend the graph found;
4. a frame at fraction t sits at fraction t of that polyline's length, and its code is the local
   affine chart of the bank codes around those settings (`chart.SettingsChart`).
Frames are therefore paced evenly in settings, and every frame code lies on the bank's own
manifold, between real samples, at every span: the chord across a periodic setting's loop, which
leaves the manifold, is what the straight route shows for comparison.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np

from . import route as lroute
from . import search as lsearch
from .clearance import Clearance
from .graph import LatentGraph
from .params import ParamSpace
from .triplets import normalised_coords

ROUTES = ("geodesic", "straight")


@dataclass
class Route:
    """One route. kind "geodesic": `line` is the taut settings polyline (M, P) in spacing units
    (unwrapped) and `codes_at` charts points of it; kind "straight": `line` is the chord (2, d)
    between the end codes. `nodes`: the bank indices the graph path passed (empty for straight)."""
    kind: str
    line: np.ndarray
    nodes: np.ndarray
    _to_codes: Callable[[np.ndarray], np.ndarray] | None = None
    _to_settings: Callable[[np.ndarray], np.ndarray] | None = None

    def codes_at(self, t) -> np.ndarray:
        """(K, d) codes at fractions t (K,) of the route's length (settings length for the geodesic)."""
        points = lroute.at_t(self.line, t)
        return points if self._to_codes is None else self._to_codes(points)

    def settings_at(self, t) -> np.ndarray | None:
        """(K, P) the settings the frames at fractions t should show, along the way the route goes
        (for ends half a period apart on a periodic setting, either way is a short arc); None for
        the straight route, whose frames should show the short-arc interpolation of the ends."""
        return None if self._to_settings is None else self._to_settings(lroute.at_t(self.line, t))


class Planner:
    """Routes over one bank: the latent graph, the settings of its samples and their chart."""

    def __init__(self, graph: LatentGraph, space: ParamSpace, params: np.ndarray, scale: np.ndarray,
                 chart: Callable[[np.ndarray], np.ndarray], *, attach: int = 3):
        self.graph, self.space, self.params, self.chart = graph, space, np.asarray(params, float), chart
        self.scale = np.asarray(scale, dtype=np.float64)
        self.attach = attach
        u, box = normalised_coords(self.params, space, self.scale)
        self.clearance = Clearance(u, dims=len(space), box=box)
        self._half = np.where(space.periodic, 0.5 * space.span / self.scale, np.inf)  # half a period, spacings

    def straight(self, z_start: np.ndarray, z_end: np.ndarray) -> Route:
        return Route("straight", np.vstack([z_start, z_end]), np.zeros(0, dtype=np.int64))

    def geodesic(self, z_start: np.ndarray, p_start: np.ndarray, z_end: np.ndarray, p_end: np.ndarray,
                 tube: float) -> Route:
        """The geodesic between two ends given by their codes and settings (P,), pulled taut within
        `tube` local sample spacings (> 0)."""
        # where the short-arc line in settings already keeps within the tube, pulling any path taut
        # ends in it (taut tries the whole chord first): no graph search is needed
        chord = self.unwrapped(np.vstack([p_start, p_end]))
        if tube > 0 and lroute.segment_within(chord[0], chord[1], self.clearance, tube, step=self.clearance.step):
            return Route("geodesic", chord, np.zeros(0, dtype=np.int64), self._charted, self._settings)
        return self.pulled(*self.path(z_start, p_start, z_end, p_end), tube)

    def path(self, z_start: np.ndarray, p_start: np.ndarray, z_end: np.ndarray, p_end: np.ndarray
             ) -> tuple[np.ndarray, np.ndarray]:
        """The graph's shortest path between the ends as a settings polyline (M, P) in spacing
        units (`unwrapped`), and the bank nodes it passes. It does not depend on the tube."""
        _, nodes = lsearch.path_with_ends(self.graph, z_start, z_end, attach=self.attach, return_nodes=True)
        return self.unwrapped(np.vstack([p_start, self.params[nodes], p_end])), nodes

    def pulled(self, u: np.ndarray, nodes: np.ndarray, tube: float) -> Route:
        """The geodesic along the settings polyline `u` (from `path`), pulled taut within `tube`
        local sample spacings (> 0)."""
        if not tube > 0:
            raise ValueError(f"tube: {tube!r} is out of range; allowed > 0 local sample spacings")
        keep = lroute.taut(u, self.clearance, tube, step=self.clearance.step)
        return Route("geodesic", u[keep], nodes, self._charted, self._settings)

    def unwrapped(self, settings: np.ndarray) -> np.ndarray:
        """(M, P) settings along a path -> (M, P) points in spacing units, continuous across the
        periodic seam; a path that went the long way round a periodic setting becomes the short
        arc between its ends (unless the two arcs are equally long)."""
        start = (self.space.wrap(settings[0]) - self.space.lo) / self.scale
        steps = self.space.delta(settings[:-1], settings[1:]) / self.scale
        u = np.vstack([start, start + np.cumsum(steps, axis=0)])
        short = self.space.delta(settings[0], settings[-1]) / self.scale
        went = u[-1] - u[0]
        long_way = self.space.periodic & (np.abs(went - short) > 1e-6) & (np.abs(short) < self._half - 1e-6)
        if np.any(long_way):
            return np.vstack([start, start + short])
        return u

    def _settings(self, points: np.ndarray) -> np.ndarray:
        return self.space.wrap(points * self.scale + self.space.lo)

    def _charted(self, points: np.ndarray) -> np.ndarray:
        return self.chart(self._settings(points))
