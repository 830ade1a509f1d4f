import numpy as np
import pytest
import torch

from geotween.models.bundle import BundleError, load_bundle, read_manifest
from geotween.models.nets import ModelConfig
from geotween.models.pipeline import train_bundle
from geotween.models.train import TrainConfig, default_model_config, encode, split_holdout, train

FAST = dict(batch_triplets=6, extra_images=4)


def test_training_lowers_reconstruction_and_the_collinearity_term_lowers_collinearity(tiny_scene):
    shaped = train(tiny_scene, train_config=TrainConfig(steps=120, lr=3e-3, w_collinear=2.0, **FAST), progress=None)
    plain = train(tiny_scene, train_config=TrainConfig(steps=120, lr=3e-3, w_collinear=0.0, **FAST), progress=None)
    first, last = shaped.history[0], shaped.history[-1]
    assert last["rec"] < 0.5 * first["rec"]
    # an untrained encoder is nearly linear, so collinearity starts low; the term is what keeps it low
    assert shaped.metrics["collinearity"] < plain.metrics["collinearity"]
    assert shaped.metrics["holdout_psnr"] > 15.0
    # the split by whether a triplet moves along the periodic azimuth averages back to the whole
    from geotween.models.triplets import mine_triplets

    cfg, params = TrainConfig(), tiny_scene.params[shaped.train_idx]
    trip = mine_triplets(params, tiny_scene.space, scale=tiny_scene.space.spacing(tiny_scene.params),
                         span=cfg.triplet_span, tolerance=cfg.triplet_tolerance)
    loop = np.abs(tiny_scene.space.delta(params[trip.s], params[trip.t])[:, 0]) > 1e-9
    assert 0 < loop.sum() < len(loop)
    m = shaped.metrics
    whole = (loop.sum() * m["collinearity_periodic"] + (~loop).sum() * m["collinearity_other"]) / len(loop)
    assert whole == pytest.approx(m["collinearity"], rel=1e-3, abs=2e-6)
    assert set(shaped.train_idx).isdisjoint(shaped.holdout_idx)
    assert len(shaped.train_idx) + len(shaped.holdout_idx) == len(tiny_scene)


def test_same_seed_same_weights(tiny_scene):
    runs = [train(tiny_scene, train_config=TrainConfig(steps=8, seed=5, **FAST), progress=None) for _ in range(2)]
    other = train(tiny_scene, train_config=TrainConfig(steps=8, seed=6, **FAST), progress=None)
    a, b, c = (r.model.state_dict() for r in (*runs, other))
    assert all(torch.equal(a[k], b[k]) for k in a)
    assert not all(torch.equal(a[k], c[k]) for k in a)


def test_default_latent_dim_counts_periodic_axes_twice(tiny_scene):
    cfg = default_model_config(tiny_scene)
    assert cfg.latent_dim == 3 and cfg.feature_dim == 3  # azimuth (cos, sin) + elevation
    assert default_model_config(tiny_scene, latent_dim=6).latent_dim == 6


def test_holdout_split_is_seeded_and_bounded():
    tr, ho = split_holdout(100, 0.15, seed=1)
    assert len(ho) == 15 and len(tr) == 85
    assert np.array_equal(ho, split_holdout(100, 0.15, seed=1)[1])
    with pytest.raises(ValueError, match="holdout"):
        split_holdout(10, 0.95, seed=0)


def test_model_config_refuses_bad_values():
    with pytest.raises(ValueError, match="resolution"):
        ModelConfig(resolution=48)
    with pytest.raises(ValueError, match="channels"):
        ModelConfig(channels=2)


def test_budget_caps_wall_time(tiny_scene):
    res = train(tiny_scene, train_config=TrainConfig(steps=100000, budget_seconds=1.0, **FAST), progress=None)
    assert res.metrics["steps"] < 100000
    assert res.metrics["train_seconds"] < 3.0


def test_bundle_round_trip(tiny_scene, tmp_path):
    manifest = train_bundle(tiny_scene, tmp_path / "b", name="tiny", train_config=TrainConfig(steps=10, **FAST),
                            progress=None)
    bundle = load_bundle(tmp_path / "b")
    assert bundle.manifest.hash == manifest.hash == read_manifest(tmp_path / "b").hash
    assert bundle.space == tiny_scene.space
    assert bundle.manifest.resolution == 16 and bundle.manifest.channels == 1
    # identical codes from the reloaded model, and the bank holds exactly the training samples
    codes = encode(bundle.model, bundle.images())
    assert np.allclose(codes, bundle.codes, atol=1e-4)
    # pixels stay on disk until asked for: a served bank holds codes, not images
    assert "images" not in bundle.arrays and bundle.pixels().dtype == np.uint8
    assert bundle.pixels("holdout_images").shape[0] == len(bundle.arrays["holdout_codes"])
    with pytest.raises(KeyError, match="codes"):
        bundle.pixels("codes")
    n_bank, n_hold = len(bundle.codes), len(bundle.arrays["holdout_codes"])
    assert n_bank + n_hold == len(tiny_scene)
    assert manifest.metrics.fit["holdout_psnr"] > 0
    # the hash names the content: retraining with the same seed reproduces it
    again = train_bundle(tiny_scene, tmp_path / "c", name="tiny", train_config=TrainConfig(steps=10, **FAST),
                         progress=None)
    assert again.hash == manifest.hash


def test_broken_bundles_are_refused(tmp_path):
    with pytest.raises(BundleError, match="manifest"):
        load_bundle(tmp_path)
    (tmp_path / "manifest.json").write_text('{"format": "something-else"}')
    with pytest.raises(BundleError, match="format"):
        load_bundle(tmp_path)


def test_ssim_loss_equals_scikit_image():
    # scikit-image's structural_similarity with Gaussian weights (sigma 1.5) and population
    # statistics is the reference the training term must match (Wang et al. 2004)
    from skimage.metrics import structural_similarity

    from geotween.models.losses import ssim

    rng = np.random.default_rng(3)
    a = rng.random((3, 3, 24, 24)).astype(np.float32)
    b = np.clip(a + 0.15 * rng.standard_normal(a.shape), 0, 1).astype(np.float32)
    got = float(ssim(torch.from_numpy(a), torch.from_numpy(b)))
    want = np.mean([structural_similarity(x.transpose(1, 2, 0), y.transpose(1, 2, 0), gaussian_weights=True,
                                          use_sample_covariance=False, data_range=1.0, channel_axis=2)
                    for x, y in zip(a, b)])
    assert got == pytest.approx(want, abs=1e-5)
    assert float(ssim(torch.from_numpy(a), torch.from_numpy(a))) == pytest.approx(1.0, abs=1e-6)


def test_ssim_term_trains(tiny_scene):
    res = train(tiny_scene, train_config=TrainConfig(steps=12, w_ssim=0.5, batch_triplets=4, extra_images=4),
                progress=None)
    assert np.isfinite(res.metrics["train_psnr"])


def test_bank_pixels_are_memory_mapped_and_equal_the_stored_ones(tiny_scene, tmp_path):
    import shutil
    import zipfile

    train_bundle(tiny_scene, tmp_path / "b", name="t", train_config=TrainConfig(steps=3), progress=None,
                 calibrate=False)
    bundle = load_bundle(tmp_path / "b")
    for which in ("images", "holdout_images"):
        mapped = bundle.mapped_pixels(which)
        assert isinstance(mapped, np.memmap) and np.array_equal(mapped, bundle.pixels(which))
    # a compressed bank cannot be mapped: the stored array is read instead
    shutil.copytree(tmp_path / "b", tmp_path / "c")
    with np.load(tmp_path / "b" / "bank.npz") as z:
        np.savez_compressed(tmp_path / "c" / "bank.npz", **{k: z[k] for k in z.files})
    with zipfile.ZipFile(tmp_path / "c" / "bank.npz") as zf:
        assert all(i.compress_type == zipfile.ZIP_DEFLATED for i in zf.infolist())
    other = load_bundle(tmp_path / "c")
    got = other.mapped_pixels()
    assert not isinstance(got, np.memmap) and np.array_equal(got, bundle.pixels())
