import numpy as np
import pytest
from scipy.spatial import cKDTree

from geotween.models.engine import Endpoint, ServingConfig
from geotween.models.render import DEMO_SPACE


def P(az, el):
    return Endpoint(params={"lamp_azimuth": az, "lamp_elevation": el})


def test_frames_follow_the_contract(small_engine):
    ans = small_engine.between(P(30, 30), P(150, 60), frames=7)
    assert len(ans.frames) == 7
    assert [f.t for f in ans.frames] == pytest.approx([i / 8 for i in range(1, 8)])
    assert [f.index for f in ans.frames] == list(range(1, 8))
    assert ans.accepted + ans.rejected == 7
    for f in ans.frames:
        assert f.image.shape == (16, 16, 1) and 0 <= f.image.min() <= f.image.max() <= 1
        assert set(f.params) == {"lamp_azimuth", "lamp_elevation"}
        assert 0.0 <= f.confidence <= 1.0
        assert f.accepted == (f.confidence >= 0.5)


def test_settings_end_at_a_bank_sample_is_its_code(small_engine):
    bundle = small_engine.bundle
    for i in (0, 7, 20):
        z = small_engine.code_of_settings(bundle.params[i][None])[0]
        assert np.allclose(z, bundle.codes[i])


def test_periodic_wrap_route_passes_through_zero(small_engine):
    # 330 deg -> 30 deg: the short arc crosses 0 deg; a route through 180 deg would be wrong
    ans = small_engine.between(P(330, 40), P(30, 40), frames=5)
    az = np.array([f.params["lamp_azimuth"] for f in ans.frames])  # the settings each frame shows
    off_zero = np.abs(DEMO_SPACE.delta(np.zeros((len(az), 2)), np.stack([az, np.full_like(az, 40)], 1))[:, 0])
    assert off_zero.max() <= 60.0, az
    # bank nodes the route passes (none when the chord keeps within the tube) sit near 0 deg too
    nodes = ans.path_nodes
    node_az = small_engine.bundle.params[nodes, 0]
    assert np.all(np.abs(DEMO_SPACE.delta(np.zeros((len(nodes), 2)),
                                          np.stack([node_az, np.full_like(node_az, 40)], 1))[:, 0]) <= 60.0)


def test_straight_line_across_the_cylinder_leaves_the_manifold(small_engine):
    # A chord between opposite azimuths cuts through the inside of the learned cylinder: its frames
    # are far from every bank code and have a larger cycle residual than the geodesic's.
    geo = small_engine.between(P(0, 40), P(150, 40), frames=9, route="geodesic")
    line = small_engine.between(P(0, 40), P(150, 40), frames=9, route="straight")
    mid = slice(3, 6)
    bank = cKDTree(small_engine.graph.warp(small_engine.bundle.codes))  # scipy's k-d tree, in the graph metric
    geo_near = bank.query(small_engine.graph.warp(geo.codes[mid]))[0].mean()
    line_near = bank.query(small_engine.graph.warp(line.codes[mid]))[0].mean()
    assert line_near > 1.5 * geo_near
    assert np.mean([f.signals["cycle"] for f in line.frames[mid]]) > np.mean([f.signals["cycle"] for f in geo.frames[mid]])
    assert np.mean([f.confidence for f in line.frames[mid]]) < np.mean([f.confidence for f in geo.frames[mid]])


@pytest.mark.parametrize("params, match", [
    ({"lamp_azimuth": 10}, "missing parameter 'lamp_elevation'"),
    ({"lamp_azimuth": 10, "lamp_elevation": 40, "zoom": 2}, "unknown parameter 'zoom'"),
    ({"lamp_azimuth": float("nan"), "lamp_elevation": 40}, "finite"),
    ({"lamp_azimuth": 10, "lamp_elevation": 85}, "outside"),
    ({"lamp_azimuth": "ten", "lamp_elevation": 40}, "not a number"),
])
def test_bad_settings_are_refused_by_name(small_engine, params, match):
    with pytest.raises(ValueError, match=match):
        small_engine.between(Endpoint(params=params), P(10, 40), frames=3)


def test_bad_request_values(small_engine):
    with pytest.raises(ValueError, match="frames"):
        small_engine.between(P(0, 30), P(60, 30), frames=0)
    with pytest.raises(ValueError, match="route"):
        small_engine.between(P(0, 30), P(60, 30), frames=2, route="zigzag")
    with pytest.raises(ValueError, match="min_confidence"):
        small_engine.between(P(0, 30), P(60, 30), frames=2, min_confidence=1.5)
    with pytest.raises(ValueError, match="shape"):
        small_engine.between(Endpoint(image=np.zeros((16, 16, 3))), P(60, 30), frames=2)
    with pytest.raises(ValueError, match="exactly one"):
        Endpoint()


def test_image_ends_and_fill(small_engine, small_scene):
    a, b = small_scene.images[0], small_scene.images[2]
    ans = small_engine.between(Endpoint(image=a), Endpoint(image=b), frames=3)
    assert len(ans.frames) == 3
    frames = small_engine.fill([{"lamp_azimuth": 45, "lamp_elevation": 35}, {"lamp_azimuth": 300, "lamp_elevation": 65}])
    assert len(frames) == 2
    shown = np.array([[f.params["lamp_azimuth"], f.params["lamp_elevation"]] for f in frames])
    # the settings head reads back roughly what was asked (coarse: a few seconds of training)
    err = np.abs(DEMO_SPACE.delta(shown, np.array([[45, 35], [300, 65]])))
    assert np.all(err[:, 0] < 45) and np.all(err[:, 1] < 20)


def test_calibration_is_stored_with_held_out_metrics(small_engine):
    assert small_engine.manifest.confidence.tau == 0.85
    report = small_engine.manifest.metrics.calibration
    assert report.status == "fitted"
    assert report.rows >= 50
    assert 0.0 <= report.ece <= 1.0 and 0.5 <= report.auroc <= 1.0


def test_tube_is_chosen_on_the_held_out_share(small_engine):
    from geotween.models.calibrate import TUBES

    route = small_engine.manifest.route
    scores = {float(k): v for k, v in route.holdout_psnr_by_tube.items()}
    assert sorted(scores) == sorted(TUBES)
    assert route.tube == max(scores, key=lambda c: (scores[c], -c))
    assert small_engine.tube == route.tube


def test_a_new_model_computes_only_the_signals_it_was_fitted_on(small_engine):
    from geotween.models.engine import FITTED_SIGNALS, REFINED_SIGNALS

    want = REFINED_SIGNALS if small_engine.manifest.refine.on else FITTED_SIGNALS
    assert small_engine.manifest.confidence.signals == want
    ans = small_engine.between(P(30, 30), P(120, 50), frames=3)
    assert all(set(f.signals) == set(want) for f in ans.frames)


def test_a_refining_model_scores_how_much_detail_it_took(small_bundle):
    # the detail signal is 1 - the frame's detail share; an unrefined frame scores 1 (nothing taken)
    from geotween.models.engine import REFINED_SIGNALS, Engine

    on = Engine.load(small_bundle, ServingConfig(refine=True))
    off = Engine.load(small_bundle, ServingConfig(refine=False))
    for engine in (on, off):  # the signals alone: no confidence model fitted on them here
        engine.signal_names, engine.confidence = REFINED_SIGNALS, None
    for engine in (on, off):
        ans = engine.between(P(30, 30), P(120, 50), frames=4)
        for f in ans.frames:
            assert f.signals["detail"] == pytest.approx(1.0 - (f.detail or 0.0))
    assert all(f.detail is None for f in off.between(P(30, 30), P(120, 50), frames=2).frames)


def test_older_bundles_with_four_signals_still_score(small_bundle):
    from dataclasses import replace

    from geotween.models.bundle import load_bundle
    from geotween.models.confidence import fit_confidence
    from geotween.models.engine import LEGACY_SIGNALS as SIGNALS
    from geotween.models.engine import Engine
    from geotween.models.manifest import Confidence

    bundle = load_bundle(small_bundle)
    rng = np.random.default_rng(0)
    sig = rng.random((300, len(SIGNALS)))
    model, _ = fit_confidence(sig, (sig.sum(1) < 2).astype(float), names=list(SIGNALS), seed=0)
    conf = Confidence(tau=0.9, signals=SIGNALS, model=model.to_dict())
    bundle.manifest = replace(bundle.manifest, confidence=conf)
    engine = Engine(bundle)
    ans = engine.between(P(30, 30), P(120, 50), frames=3)
    assert all(set(f.signals) == set(SIGNALS) and 0 <= f.confidence <= 1 for f in ans.frames)
    bundle.manifest = replace(bundle.manifest, confidence=replace(conf, signals=("cycle", "wobble")))
    with pytest.raises(ValueError, match="wobble"):
        Engine(bundle)


def test_a_refining_model_keeps_a_confidence_for_its_decoded_frames(small_engine):
    # fitted at training time only when the model refines: what refine=False requests are scored by
    refine = small_engine.manifest.refine
    assert (refine.decoded_confidence is not None) == refine.on
    if refine.on:
        from geotween.models.engine import FITTED_SIGNALS

        assert refine.decoded_confidence.signals == FITTED_SIGNALS
        assert small_engine.manifest.metrics.calibration.decoded_frames.status == "fitted"


@pytest.fixture(scope="module")
def skippable(small_bundle):
    """The small model forced to refine, with a confidence fitted on its decoded frames."""
    from geotween.models.calibrate import calibrate_decoded
    from geotween.models.engine import Engine

    engine = Engine.load(small_bundle, ServingConfig(refine=True, holdout_captures=False))
    before = engine.refine, engine.signal_names
    held = engine.bundle.pixels("holdout_images").astype(np.float32) / 255.0
    entry, report = calibrate_decoded(engine, engine.bundle.arrays["holdout_params"], held, tau=0.85)
    assert report.status == "fitted" and entry.signals == ("cycle", "settings")
    assert (engine.refine, engine.signal_names) == before  # restored after fitting
    engine.decoded_confidence = entry.predictor()
    engine.decoded_signal_names = entry.signals
    return engine


def test_refine_false_serves_the_decoded_frames_scored_by_their_own_confidence(skippable):
    engine = skippable
    fast = engine.between(P(30, 30), P(150, 60), frames=5, refine=False)
    full = engine.between(P(30, 30), P(150, 60), frames=5)
    assert np.allclose(fast.codes, full.codes)  # the same route
    assert np.array_equal(np.stack([f.image for f in fast.frames]), engine.decode(fast.codes))
    assert all(f.detail is None and set(f.signals) == {"cycle", "settings"} for f in fast.frames)
    assert all(f.detail is not None for f in full.frames)  # refined by default
    sig = np.array([[f.signals["cycle"], f.signals["settings"]] for f in fast.frames])
    assert np.allclose([f.confidence for f in fast.frames], engine.decoded_confidence.predict(sig))
    filled = engine.fill([{"lamp_azimuth": 95.0, "lamp_elevation": 35.0}], refine=False)
    assert filled[0].detail is None and set(filled[0].signals) == {"cycle", "settings"}


def test_refine_false_is_refused_when_no_decoded_frame_confidence_was_fitted(small_bundle):
    from geotween.models.engine import Engine

    engine = Engine.load(small_bundle, ServingConfig(refine=True, holdout_captures=False))
    engine.decoded_confidence = None
    if engine.confidence is None:
        pytest.skip("the small model has no confidence")
    with pytest.raises(ValueError, match="refine: this model version has no confidence"):
        engine.between(P(30, 30), P(150, 60), frames=3, refine=False)
    plain = Engine.load(small_bundle, ServingConfig(refine=False))  # not refining: refine=False changes nothing
    a, b = plain.between(P(30, 30), P(150, 60), frames=3), plain.between(P(30, 30), P(150, 60), frames=3, refine=False)
    assert [f.confidence for f in a.frames] == [f.confidence for f in b.frames]


def test_training_a_refining_model_stores_both_confidences(small_scene, tmp_path, monkeypatch):
    # the small model does not win with refinement on its own; force the choice on to see what
    # training then stores: the confidence of refined frames and the one of decoded frames
    from dataclasses import replace

    from tiny_scenes import SMALL_TRAIN

    from geotween.models import calibrate
    from geotween.models.engine import REFINED_SIGNALS, Engine
    from geotween.models.pipeline import train_bundle
    from geotween.models.train import TrainConfig

    real = calibrate.choose_refine

    def forced(engine, *args, **kw):
        entry = replace(real(engine, *args, **kw), on=True)
        engine.refine, engine.signal_names = entry.config, REFINED_SIGNALS
        return entry

    monkeypatch.setattr(calibrate, "choose_refine", forced)
    manifest = train_bundle(small_scene, tmp_path, name="forced", train_config=TrainConfig(**SMALL_TRAIN),
                            progress=None)
    assert manifest.confidence.signals == REFINED_SIGNALS
    assert manifest.refine.decoded_confidence.signals == ("cycle", "settings")
    engine = Engine.load(tmp_path)
    assert engine.refine is not None and engine.decoded_confidence is not None
    fast = engine.between(P(30, 30), P(150, 60), frames=3, refine=False)
    assert all(f.detail is None and f.confidence is not None for f in fast.frames)


def test_an_image_end_the_model_cannot_place_leaves_every_frame_unjudged(small_engine):
    bank = small_engine.bundle.images()
    params = small_engine.bundle.params
    # a captured image is placed: it reads back to its own settings, where the capture itself is made
    ans = small_engine.between(Endpoint(image=bank[0]), Endpoint(image=bank[5]), frames=3)
    assert ans.ends_placed
    assert float(small_engine.space.distance(small_engine.space.vector(ans.start_params), params[0])) < 1e-6
    assert all(f.confidence is not None for f in ans.frames)
    # an image of something else (the capture turned upside down) matches nothing made at the
    # settings read for it: the route rests on an end nobody can vouch for
    odd = np.ascontiguousarray(bank[5][::-1, ::-1])
    code = small_engine.encode(odd[None])[0]
    _, placed = small_engine.place_end(Endpoint(image=odd), code, small_engine.settings_of(code[None])[0])
    assert not placed
    ans = small_engine.between(Endpoint(image=bank[0]), Endpoint(image=odd), frames=3, min_confidence=0.0)
    assert not ans.ends_placed and ans.accepted == 0
    assert all(f.confidence is None and not f.accepted for f in ans.frames)
    # settings ends are always placed
    assert small_engine.between(P(30, 40), P(90, 40), frames=2).ends_placed


def test_a_misread_image_end_is_searched_back_to_its_settings(small_engine):
    from geotween.models import placing

    # a captured image with a wrong first read (two spacings off on the first setting): the search
    # over the captures nearest its code finds its own settings again, where it is given back exactly
    bank, params = small_engine.bundle.images(), small_engine.bundle.params
    code = small_engine.bundle.codes[7]
    wrong = small_engine.space.wrap(params[7] + np.array([2.0, 0.0]) * small_engine.scale)
    assert placing.agreement(small_engine, bank[7], wrong[None])[0] < small_engine.tau  # the first read fails
    found, placed = placing.place(small_engine, bank[7], code, wrong, tau=small_engine.tau)
    assert placed and float(small_engine.space.distance(found, params[7], small_engine.scale)) < 0.05
    assert placing.agreement(small_engine, bank[7], found[None])[0] >= placing.FOUND


def test_the_straight_route_is_scored_by_its_own_curve(small_engine):
    # calibration fits the chord's frames apart from the geodesic's and the fills': each curve on
    # its own kind of held-out frames, both stored with the model
    conf = small_engine.manifest.confidence
    report = small_engine.manifest.metrics.calibration
    assert conf.straight is not None and conf.straight != conf.model
    assert report.straight.rows == report.rows_by_kind["straight"] > 0
    shown = small_engine.manifest.calibration_summary()["straight"]  # as the describe answer shows it
    assert shown["rows"] == report.straight.rows and shown["kind"] in ("fitted", "bound")
    ans = small_engine.between(P(0, 40), P(150, 40), frames=5, route="straight")
    names = small_engine.signal_names
    sig = np.array([[f.signals[n] for n in names] for f in ans.frames])
    assert [f.confidence for f in ans.frames] == pytest.approx(list(conf.predictor("straight").predict(sig)))
    geo = small_engine.between(P(0, 40), P(150, 40), frames=5)
    sig = np.array([[f.signals[n] for n in names] for f in geo.frames])
    assert [f.confidence for f in geo.frames] == pytest.approx(list(conf.predictor().predict(sig)))


def test_a_straight_curve_with_nothing_to_fit_on_rejects_every_chord_frame():
    # no straight frame among the held-out rows: the chord's curve is the conservative bound of zero
    # faithful in zero (0.0; scipy.stats.beta is the reference in test_confidence_bound), while the
    # other kinds still get a fitted curve
    from geotween.models.calibrate import _fit_kind

    rng = np.random.default_rng(1)
    sig = rng.random((200, 2))
    model, how = _fit_kind(sig, (sig.sum(1) < 1).astype(float), ["cycle", "settings"], 0.9, 0)
    assert how.status == "fitted" and "calibrator" in model
    none, how = _fit_kind(sig[:0], np.zeros(0), ["cycle", "settings"], 0.9, 0)
    assert none["kind"] == "bound" and none["rate"] == 0.0 and how.rows == 0
    assert how.status.startswith("bound: 0 of 0")
