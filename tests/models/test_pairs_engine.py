"""Frames made from the captures around them, served by the engine on a tiny turntable model:
they beat the decoded frames, use the held-out captures only when serving, and the training-time
choice records them beside detail transfer."""
from pathlib import Path

import numpy as np
import pytest

from geotween.models.calibrate import choose_refine
from geotween.models.engine import Endpoint, Engine, ServingConfig, fitted_signals
from geotween.models.metrics import ssim_batch
from geotween.models.pipeline import train_bundle
from geotween.models.refine import RefineConfig
from geotween.models.scene import Scene
from geotween.models.train import TrainConfig, default_model_config
from geotween.models.turntable import TURNTABLE_SPACE, render_views

SIZE = 32
PAIR = RefineConfig(mode="pair", flow="dis-fine", tolerance=0.1)


@pytest.fixture(scope="module")
def turntable_bundle(tmp_path_factory):
    root = tmp_path_factory.mktemp("tiny-turntable")
    yaw, height = np.meshgrid(np.arange(0.0, 360.0, 15.0), [15.0, 35.0, 55.0], indexing="ij")
    params = np.stack([yaw.ravel(), height.ravel()], axis=-1)
    scene = Scene(name="tiny-turntable", space=TURNTABLE_SPACE, images=render_views(params, SIZE), params=params,
                  files=[f"{i:04d}.png" for i in range(len(params))], root=Path("."))
    train_bundle(scene, root / "bundle", name="tiny-turntable", progress=None, calibrate=False,
                 model_config=default_model_config(scene, latent_dim=4),
                 train_config=TrainConfig(steps=300, batch_triplets=8, extra_images=6, lr=3e-3))
    return root / "bundle"


def between_captures(engine: Engine, count: int = 12, seed: int = 0) -> np.ndarray:
    """Settings halfway (in yaw) between neighbouring captures of the bank, at a bank camera height."""
    rng = np.random.default_rng(seed)
    bank = engine.bundle.params
    picks = bank[rng.choice(len(bank), size=count, replace=False)]
    return np.stack([np.mod(picks[:, 0] + 7.5, 360.0), picks[:, 1]], axis=-1)


def test_frames_from_the_captures_around_them_beat_decoded_frames(turntable_bundle):
    engine = Engine.load(turntable_bundle, ServingConfig(refine=False))
    place = between_captures(engine)
    truth = render_views(place, SIZE)  # the scene's own renderer: the true views
    codes = engine.code_of_settings(place)
    decoded = engine.decode(codes)
    made, fig = engine.refined(codes, decoded, PAIR, place=place)
    got, base = ssim_batch(made, truth), ssim_batch(decoded, truth)
    assert got.mean() > base.mean() + 0.05, (got.mean(), base.mean())
    assert np.all((fig["detail"] >= 0) & (fig["detail"] <= 1)) and np.all(fig["pair_span"] > 0)
    # each frame is made from a pair through its settings (15 deg apart, or across a held-out gap)
    assert np.all(fig["pair_off"] < 0.05) and np.all(fig["pair_span"] <= 2.0 + 1e-9)


def test_held_out_captures_serve_frames_but_never_the_training_time_choices(turntable_bundle):
    served = Engine.load(turntable_bundle)
    fitting = Engine.load(turntable_bundle, ServingConfig(holdout_captures=False))
    held = served.bundle.arrays["holdout_params"]
    assert len(served.capture_params) == len(served.bundle.params) + len(held)
    assert len(fitting.capture_params) == len(fitting.bundle.params)
    # at a held-out capture's own settings the serving engine gives that capture, exactly
    codes = served.code_of_settings(held[:3])
    made, fig = served.refined(codes, served.decode(codes), PAIR, place=held[:3])
    want = served.bundle.images("holdout_images")[:3]
    assert np.allclose(made, want, atol=1e-6) and np.all(fig["pair_span"] == 0.0)
    # while the engine that fits the choices has to make it from the bank's captures around it
    other, _ = fitting.refined(codes, fitting.decode(codes), PAIR, place=held[:3])
    assert not np.allclose(other, want, atol=1e-3)


def test_the_choice_scores_frames_from_captures_beside_detail_transfer(turntable_bundle):
    # on this tiny grid the held-out gaps are 30 deg of yaw or 40 deg of camera height, where flow
    # between the captures around a gap often fails: either mode may win, by the rule
    engine = Engine.load(turntable_bundle, ServingConfig(refine=False, holdout_captures=False))
    arrays = engine.bundle.arrays
    choice = choose_refine(engine, arrays["holdout_params"], engine.bundle.images("holdout_images"))
    pair = choice.holdout.by_flow["pair"]
    assert set(pair) == {"0.05", "0.1"} and all(0.0 < r["ssim"] <= 1.0 for r in pair.values())
    detail = choice.holdout.by_flow[choice.config.flow] if choice.config.mode == "detail" else None
    best_pair = max((r["ssim"], r["psnr"]) for r in pair.values())
    if choice.config.mode == "pair":
        assert (choice.holdout.refined.ssim, choice.holdout.refined.psnr) == best_pair
    else:  # the detail candidate it kept scored at least as well as the best pair candidate
        assert (detail[str(choice.config.tolerance)]["ssim"], detail[str(choice.config.tolerance)]["psnr"]) >= best_pair
    # a between answer with frames made from captures carries the pair figures as signals
    engine.refine, engine.signal_names = PAIR, fitted_signals(PAIR)
    ans = engine.between(Endpoint(params={"yaw": 10.0, "camera_height": 35.0}),
                         Endpoint(params={"yaw": 70.0, "camera_height": 35.0}), frames=3)
    assert all({"pair_flow", "pair_span", "pair_off", "pair_gap"} <= set(f.signals) for f in ans.frames)
    assert all(f.detail is not None for f in ans.frames)


def test_flows_estimated_at_load_serve_the_first_answers(turntable_bundle):
    engine = Engine.load(turntable_bundle, ServingConfig(refine=True))
    if engine.refine is None or engine.refine.mode != "pair":
        engine = Engine(engine.bundle, ServingConfig(refine=True))
        engine.refine = PAIR
    added = engine.warm_flows()
    assert added == len(engine.flow_cache) > 0
    codes = engine.code_of_settings(between_captures(engine, seed=1))
    engine.refined(codes, engine.decode(codes), PAIR)
    assert len(engine.flow_cache) == added  # every pair those frames needed was already there


def test_a_frame_made_from_captures_reports_where_it_was_made(turntable_bundle):
    # the frames of a settings fill are made from the captures at the asked settings: they say so, whatever
    # the small code-to-settings head reads from their codes; decoded frames report that read
    place = between_captures(Engine.load(turntable_bundle), count=6, seed=1)
    targets = [TURNTABLE_SPACE.named(p) for p in place]
    made = Engine.load(turntable_bundle)
    made.refine = PAIR
    for frame, p in zip(made.fill(targets), place):
        assert np.allclose(TURNTABLE_SPACE.vector(frame.params), p)
    decoded = Engine.load(turntable_bundle, ServingConfig(refine=False))
    read = decoded.settings_of(decoded.code_of_settings(place))
    for frame, p in zip(decoded.fill(targets), read):
        assert np.allclose(TURNTABLE_SPACE.vector(frame.params), p)
    assert not np.allclose(read, place, atol=1e-3)  # the head's read is not the asked settings
