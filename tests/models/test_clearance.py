"""Clearance in local spacings, and routes that keep it on a ring manifold."""
import numpy as np
import pytest

from geotween.models import route as lroute
from geotween.models.clearance import Clearance
from geotween.models.graph import build_graph
from geotween.models.search import path_with_ends

STEP_DEG = 15.0


def ring(radius=1.0, step_deg=STEP_DEG, lift=0.0):
    """Codes on a circle in 3-D (a periodic setting's loop), one every step_deg."""
    a = np.deg2rad(np.arange(0.0, 360.0, step_deg))
    return np.column_stack([radius * np.cos(a), radius * np.sin(a), lift * np.ones_like(a)])


def test_local_spacing_on_a_grid_is_the_coarser_step():
    # a 2-D grid with steps 1 (x) and 2 (y): the 4th nearest neighbour of an inner node is 2 away
    x, y = np.meshgrid(np.arange(6.0), 2.0 * np.arange(6.0), indexing="ij")
    bank = np.column_stack([x.ravel(), y.ravel()])
    c = Clearance(bank, dims=2)
    inner = (x.ravel() > 0) & (x.ravel() < 5) & (y.ravel() > 0) & (y.ravel() < 10)
    assert np.allclose(c.local[inner], 2.0)
    # a cell's centre is sqrt(0.5^2 + 1^2) = 1.118 from its corners: 0.559 local spacings
    assert c(np.array([[2.5, 5.0]]))[0] == pytest.approx(np.hypot(0.5, 1.0) / 2.0)


def test_clearance_takes_the_best_ratio_among_candidates():
    # dense codes 0.0..0.4 (0.1 apart) and a sparse code at 1.2: the point 0.8 is 0.4 from both
    # 0.4 and 1.2, which is 2 of the dense end's spacings (0.2) but 0.4 / 0.9 of the sparse code's
    # (its second nearest code, 0.3, is 0.9 away)
    bank = np.column_stack([np.r_[np.arange(5) * 0.1, 1.2, 3.2, 5.2], np.zeros(8)])
    c = Clearance(bank, dims=1)
    value, index = c.nearest(np.array([[0.8, 0.0]]))
    assert value[0] == pytest.approx(0.4 / 0.9)
    assert index[0] == 5


@pytest.mark.parametrize("span_deg", [150.0, 180.0 - STEP_DEG])
def test_ring_route_keeps_clearance_and_follows_the_arc(span_deg):
    codes = ring()
    c = Clearance(codes, dims=1)
    g = build_graph(codes, k=2)
    a, b = codes[0], codes[int(span_deg / STEP_DEG)]
    line, _ = path_with_ends(g, a, b, attach=1, return_nodes=True)
    limit = 0.5  # local spacings
    taut = line[lroute.taut(line, c, limit, step=c.step)]
    assert c.worst(taut) <= limit
    # the arc of a unit circle over span_deg is its angle in radians (elementary geometry)
    arc = np.deg2rad(span_deg)
    assert lroute.polyline_length(taut) == pytest.approx(arc, rel=0.02)
    # the chord cuts across the empty middle of the loop: refused
    assert not c.segment_within(a, b, limit)
    assert c.worst(np.vstack([a, b])) > 2.0


def test_ring_route_across_the_seam():
    # from 330 deg to 120 deg: 150 deg the short way, through 0
    codes = ring()
    c = Clearance(codes, dims=1)
    g = build_graph(codes, k=2)
    line, nodes = path_with_ends(g, codes[22], codes[8], attach=1, return_nodes=True)
    taut = line[lroute.taut(line, c, 0.5, step=c.step)]
    assert 0 in set(nodes.tolist())  # it passed the seam, not the long way round
    assert lroute.polyline_length(taut) == pytest.approx(np.deg2rad(150.0), rel=0.02)
