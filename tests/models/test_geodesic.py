"""Geodesic routes at every span, and a confidence that never lets an unjudged frame through."""
import dataclasses

import numpy as np
import pytest

from geotween.models.calibrate import calibrate_engine
from geotween.models.clearance import Clearance
from geotween.models.engine import Endpoint, Engine, ServingConfig
from geotween.models.geodesic import Planner, Route
from geotween.models.metrics import psnr_batch
from geotween.models.params import Parameter, ParamSpace
from geotween.models.render import DEMO_SPACE, render


def P(az, el):
    return Endpoint(params={"lamp_azimuth": az, "lamp_elevation": el})


def truth(az0, az1, el, count, size=16):
    """The renderer's true views at the frames' settings (short arc, equal steps)."""
    d = DEMO_SPACE.delta(np.array([az0, el]), np.array([az1, el]))[0]
    views = [render((az0 + i / (count + 1) * d) % 360, el, size) for i in range(1, count + 1)]
    return np.stack(views).astype(np.float32)[..., None]


@pytest.mark.parametrize("az0, az1", [(10.0, 160.0), (330.0, 135.0), (200.0, 40.0)])
def test_long_geodesic_follows_the_loop_and_beats_the_chord(small_engine, az0, az1):
    # 150, 165 (across the seam at 0) and 160 deg: the longest short arcs the service accepts
    geo = small_engine.between(P(az0, 40), P(az1, 40), frames=5)
    line = small_engine.between(P(az0, 40), P(az1, 40), frames=5, route="straight")
    want = truth(az0, az1, 40.0, 5)
    assert psnr_batch(np.stack([f.image for f in geo.frames]), want).mean() > \
        psnr_batch(np.stack([f.image for f in line.frames]), want).mean() + 1.0
    # every geodesic frame lies between real samples: its code within a local spacing of the bank
    clr = Clearance(small_engine.graph.warped, dims=2, tree=small_engine.graph.tree)
    assert clr(small_engine.graph.warp(geo.codes)).max() < 1.0
    assert clr(small_engine.graph.warp(line.codes)).max() > clr(small_engine.graph.warp(geo.codes)).max()


def test_geodesic_frames_are_paced_evenly_in_settings(small_engine):
    way = small_engine.route(*small_engine.end_code(P(10, 40)), *small_engine.end_code(P(160, 40)))
    t = np.linspace(0.0, 1.0, 11)[1:-1]
    shown = small_engine.settings_of(way.codes_at(t))
    want = DEMO_SPACE.lerp(np.array([10.0, 40.0]), np.array([160.0, 40.0]), t)
    err = np.abs(DEMO_SPACE.delta(want, shown))
    assert err[:, 0].max() < 15.0 and err[:, 1].max() < 10.0  # within half a sample step (30 deg, 10 deg)


def test_a_path_the_long_way_round_becomes_the_short_arc():
    space = ParamSpace([Parameter("turn", 0.0, 360.0, "deg", periodic=True), Parameter("height", 0.0, 10.0)])
    params = np.array([[a, h] for a in range(0, 360, 30) for h in (0.0, 5.0, 10.0)], dtype=float)
    planner = Planner(None, space, params, np.array([30.0, 5.0]), chart=lambda p: p)
    # 0 -> 150 deg by way of 330, 300, ... (210 deg): the short arc (150 deg the other way) is taken
    long_way = np.array([[0.0, 5.0], [330.0, 5.0], [270.0, 5.0], [210.0, 5.0], [150.0, 5.0]])
    u = planner.unwrapped(long_way)
    assert u[-1, 0] - u[0, 0] == pytest.approx(150.0 / 30.0) and len(u) == 2
    # the short way is kept as it is, unwrapped across the seam
    short = np.array([[300.0, 5.0], [330.0, 5.0], [0.0, 5.0], [30.0, 5.0]])
    assert np.allclose(np.diff(planner.unwrapped(short)[:, 0]), 1.0)
    # exactly half a turn: both arcs are short, the path's choice stands
    half = np.array([[0.0, 5.0], [330.0, 5.0], [270.0, 5.0], [210.0, 5.0], [180.0, 5.0]])
    assert planner.unwrapped(half)[-1, 0] - planner.unwrapped(half)[0, 0] == pytest.approx(-6.0)


def test_a_model_without_confidence_accepts_nothing(small_engine):
    manifest = dataclasses.replace(small_engine.manifest, confidence=None)
    bare = Engine(dataclasses.replace(small_engine.bundle, manifest=manifest))
    ans = bare.between(P(30, 40), P(90, 40), frames=4, min_confidence=0.0)
    assert all(f.confidence is None and not f.accepted for f in ans.frames)
    assert ans.rejected == 4


def test_a_tau_the_model_cannot_reach_rejects_every_frame(small_engine):
    b = small_engine.bundle
    holdout_params, holdout_images = b.arrays["holdout_params"], b.images("holdout_images")
    fitting = Engine(b, ServingConfig(holdout_captures=False))  # calibration never makes frames from its truth
    confidence, how = calibrate_engine(fitting, holdout_params, holdout_images, tau=0.9999)
    assert how.status.startswith("bound: 0 of ")
    assert set(how.ssim_quantiles) == {"p10", "p50", "p90"} and how.ssim_quantiles["p90"] < 0.9999
    manifest = dataclasses.replace(small_engine.manifest, confidence=confidence)
    strict = Engine(dataclasses.replace(b, manifest=manifest))
    ans = strict.between(P(30, 40), P(200, 50), frames=6)
    assert all(f.confidence == 0.0 and not f.accepted for f in ans.frames)


def test_ends_half_a_turn_apart_are_judged_along_the_way_the_route_goes(small_engine, monkeypatch):
    # 90 -> 270 deg: both ways round are short arcs. Force the way through 0 deg (the short-arc
    # interpolation of the ends goes through 180): the frames must be judged against the settings
    # along the way taken, or every one of them looks half a turn off and is rejected.
    planner = small_engine.planner
    u = planner.unwrapped(np.array([[90.0, 40.0], [0.0, 40.0], [270.0, 40.0]]))
    assert u[-1, 0] < u[0, 0]  # the path's own way (exactly half a turn: it stands)
    forced = Route("geodesic", u, np.zeros(0, dtype=np.int64), planner._charted, planner._settings)
    monkeypatch.setattr(small_engine, "route", lambda *args, **kw: forced)
    ans = small_engine.between(P(90, 40), P(270, 40), frames=5)
    shown = np.array([[f.params["lamp_azimuth"], f.params["lamp_elevation"]] for f in ans.frames])
    along = forced.settings_at([f.t for f in ans.frames])
    assert np.abs(DEMO_SPACE.delta(along, shown)[:, 0]).max() < 20.0   # the frames show the way taken
    assert max(f.signals["settings"] for f in ans.frames) < 1.0         # and are judged by it
    assert np.mean([f.confidence for f in ans.frames]) > 0.5
