"""The typed bundle manifest: older bundles still load and serve, new ones round-trip, damage is named."""
import copy
import json
import re
import shutil
from pathlib import Path

import numpy as np
import pytest

from geotween.models.bundle import BundleError, load_bundle, read_manifest
from geotween.models.engine import FITTED_SIGNALS, Endpoint, Engine, ServingConfig
from geotween.models.manifest import DEFAULT_TUBE, FORMAT, LEGACY_FORMAT, LEGACY_SIGNALS, Manifest
from geotween.models.pipeline import train_bundle
from geotween.models.train import TrainConfig

# a bundle written by the code before the manifest was typed (format 1), kept as it was written:
# 16 px, narrow nets, a short training on the small lamp-tile grid, with detail transfer on
KEPT = Path(__file__).resolve().parents[1] / "data" / "bundle-v1"
START, END = ({"lamp_azimuth": 30.0, "lamp_elevation": 30.0}, {"lamp_azimuth": 120.0, "lamp_elevation": 50.0})


def kept_json() -> dict:
    return json.loads((KEPT / "manifest.json").read_text())


def copy_with(tmp_path: Path, change) -> Path:
    """The kept bundle copied to tmp_path with `change(manifest_json)` applied."""
    folder = tmp_path / "bundle"
    shutil.copytree(KEPT, folder)
    doc = kept_json()
    change(doc)
    (folder / "manifest.json").write_text(json.dumps(doc))
    return folder


def test_the_kept_format_1_bundle_loads_and_serves_with_confidence():
    manifest = read_manifest(KEPT)
    assert manifest.format == LEGACY_FORMAT != FORMAT
    assert manifest.route.chosen and manifest.refine.chosen and manifest.refine.on and manifest.refine.skippable
    engine = Engine.load(KEPT)
    assert engine.tube == manifest.route.tube and engine.refine == manifest.refine.config
    ans = engine.between(Endpoint(params=START), Endpoint(params=END), frames=4)
    assert len(ans.frames) == 4
    sig = np.array([[f.signals[n] for n in manifest.confidence.signals] for f in ans.frames])
    want = manifest.confidence.predictor().predict(sig)
    for f, c in zip(ans.frames, want):
        assert f.detail is not None and 0.0 <= f.confidence <= 1.0 and f.confidence == pytest.approx(c)
    # a request that skips detail transfer is scored by the confidence fitted on decoded frames
    fast = engine.between(Endpoint(params=START), Endpoint(params=END), frames=4, refine=False)
    assert all(f.detail is None and set(f.signals) == set(FITTED_SIGNALS) for f in fast.frames)
    sig = np.array([[f.signals[n] for n in FITTED_SIGNALS] for f in fast.frames])
    assert [f.confidence for f in fast.frames] == pytest.approx(
        list(manifest.refine.decoded_confidence.predictor().predict(sig)))


def test_the_kept_manifest_round_trips_to_the_json_it_was_read_from():
    assert Manifest.from_dict(kept_json()).to_dict() == kept_json()


def test_sections_a_format_1_bundle_lacks_get_the_old_defaults(tmp_path):
    def strip(doc):
        for key in ("route", "refine", "scene"):
            del doc[key]
        del doc["confidence"]["signals"]

    manifest = read_manifest(copy_with(tmp_path, strip))
    assert manifest.route.tube == DEFAULT_TUBE and not manifest.route.chosen
    assert not manifest.refine.chosen and not manifest.refine.on and manifest.refine.decoded_confidence is None
    assert manifest.refine.config.flow == "farneback"  # chosen with Farneback before the flow choice existed
    assert manifest.confidence.signals == LEGACY_SIGNALS and manifest.scene is None
    assert manifest.refine.summary() == {"on": False, "chosen": False, "config": None, "holdout": None,
                                         "skippable": False}


def test_a_format_1_bundle_without_route_or_refine_serves_as_before(tmp_path):
    def strip(doc):
        del doc["route"], doc["refine"]

    engine = Engine.load(copy_with(tmp_path, strip))
    assert engine.tube == DEFAULT_TUBE and engine.refine is None and engine.decoded_confidence is None
    ans = engine.between(Endpoint(params=START), Endpoint(params=END), frames=3)
    assert all(f.detail is None and 0.0 <= f.confidence <= 1.0 for f in ans.frames)


def test_a_format_2_manifest_must_hold_every_section():
    doc = kept_json()
    doc["format"] = FORMAT
    Manifest.from_dict(doc)  # complete: reads
    for key in ("route", "refine", "confidence", "scene"):
        broken = copy.deepcopy(doc)
        del broken[key]
        with pytest.raises(BundleError, match=f"^{key}: missing"):
            Manifest.from_dict(broken)
    broken = copy.deepcopy(doc)
    del broken["refine"]["config"]["flow"]
    with pytest.raises(BundleError, match=re.escape("refine.config.flow: missing")):
        Manifest.from_dict(broken)


@pytest.fixture(scope="module")
def fresh(tiny_scene, tmp_path_factory) -> tuple[Path, Manifest]:
    out = tmp_path_factory.mktemp("fresh-bundle")
    # tau 0.5: forty steps leave frames blurred, and a fitted confidence needs faithful ones too
    manifest = train_bundle(tiny_scene, out, name="fresh", progress=None,
                            train_config=TrainConfig(steps=40, batch_triplets=6, extra_images=4, confidence_tau=0.5))
    return out, manifest


def test_a_fresh_bundle_round_trips(fresh):
    folder, manifest = fresh
    on_disk = json.loads((folder / "manifest.json").read_text())
    assert on_disk["format"] == FORMAT and manifest.format == FORMAT
    # the JSON written is the manifest's own, and reads back into the same object
    assert json.dumps(on_disk, sort_keys=True) == json.dumps(manifest.to_dict(), sort_keys=True)
    again = read_manifest(folder)
    assert json.dumps(again.to_dict(), sort_keys=True) == json.dumps(on_disk, sort_keys=True)
    assert set(on_disk) == set(Manifest.FIELDS)  # every section written, null where no choice was made
    assert again.route.chosen and again.refine.chosen and again.hash == manifest.hash
    assert again.confidence is not None and again.confidence.tau == 0.5
    assert load_bundle(folder).manifest.name == "fresh"


def test_an_uncalibrated_bundle_writes_its_sections_as_null(tiny_scene, tmp_path):
    train_bundle(tiny_scene, tmp_path, name="bare", progress=None, calibrate=False,
                 train_config=TrainConfig(steps=3, batch_triplets=6, extra_images=4))
    on_disk = json.loads((tmp_path / "manifest.json").read_text())
    assert on_disk["route"] is None and on_disk["refine"] is None and on_disk["confidence"] is None
    manifest = read_manifest(tmp_path)
    assert not manifest.route.chosen and not manifest.refine.chosen and manifest.metrics.calibration is None
    summary = manifest.calibration_summary()
    warning = summary.pop("warning")
    assert summary == {"fitted": False, "kind": "none", "tau": None, "method": None, "signals": [], "ece": None,
                       "auroc": None, "status": "not calibrated", "ssim_quantiles": {}, "straight": None}
    assert "every frame it serves is rejected" in warning


def _set(path: str, value):
    """A change setting one field of the manifest JSON, named by its dotted path."""
    def change(doc):
        *head, last = path.split(".")
        for key in head:
            doc = doc[key]
        doc[last] = value
    return change


@pytest.mark.parametrize("change, field", [
    (_set("format", "geotween-bundle/9"), "format"),
    (_set("route.tube", "wide"), "route.tube"),
    (_set("route.tube", -1.0), "route.tube"),
    (_set("refine.on", "yes"), "refine.on"),
    (_set("refine.config.flow", "sideways"), "refine.config"),
    (_set("refine.holdout.decoded.psnr", "high"), "refine.holdout.decoded.psnr"),
    (_set("confidence.tau", 1.5), "confidence.tau"),
    (_set("confidence.signals", "cycle"), "confidence.signals"),
    (_set("confidence.model.calibrator.method", "guess"), "confidence.model"),
    (_set("confidence.straight", "steep"), "confidence.straight"),
    (_set("confidence.straight", {"kind": "bound"}), "confidence.straight"),
    (_set("metrics.confidence.straight", {"rows": "many"}), "metrics.confidence.straight"),
    (_set("refine.decoded_confidence.model.combiner", None), "refine.decoded_confidence.model"),
    (_set("metrics.holdout_psnr", "good"), "metrics.holdout_psnr"),
    (_set("metrics.confidence.rows", -3), "metrics.confidence.rows"),
    (_set("scale", [30.0]), "scale"),
    (_set("resolution", 32), "resolution"),
    (_set("model_config.channels", 2), "model_config"),
    (_set("space", [{"min": 0, "max": 1}]), "space"),
    (_set("route.radius", 1.0), "route"),
    (_set("wobble", 1), "wobble"),
])
def test_a_malformed_field_gives_a_bundle_error_naming_it(tmp_path, change, field):
    folder = copy_with(tmp_path, change)
    with pytest.raises(BundleError, match=re.escape(field)) as err:
        load_bundle(folder)
    assert "manifest.json" in str(err.value)  # and the file it is in
    assert isinstance(err.value, ValueError)


def test_serving_config_overrides_the_bundles_choices_and_checks_its_values():
    engine = Engine.load(KEPT, ServingConfig(tube=2.0, refine=False))
    assert engine.tube == 2.0 and engine.refine is None
    ans = engine.between(Endpoint(params=START), Endpoint(params=END), frames=2)
    assert all(f.detail is None for f in ans.frames)
    for bad, name in ((dict(refine_threads=0), "refine_threads"), (dict(tube=0.0), "tube"),
                      (dict(refine="bundle"), "refine"), (dict(attach=0), "attach"),
                      (dict(graph_k=2.5), "graph_k")):
        with pytest.raises(ValueError, match=name):
            ServingConfig(**bad)


def test_a_confidence_without_a_straight_curve_scores_chords_with_its_one_model():
    # bundles written before the straight route had its own curve: one model for every frame
    from geotween.models.manifest import Confidence

    model = {"kind": "bound", "names": ["cycle"], "successes": 3, "trials": 10, "level": 0.95}
    chord = {**model, "successes": 0}
    old = Confidence.from_dict({"tau": 0.9, "signals": ["cycle"], "model": model}, "confidence")
    assert old.straight is None and "straight" not in old.to_dict()
    assert old.predictor("straight").rate == old.predictor().rate > 0
    new = Confidence.from_dict({**old.to_dict(), "straight": chord}, "confidence")
    assert new.to_dict()["straight"] == chord
    assert new.predictor("straight").rate == 0.0 < new.predictor("geodesic").rate
