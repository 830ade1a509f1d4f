"""The eval report by span bucket: pairs land in the bucket their reach names, the per-bucket
confidence numbers follow their definitions, and the buckets add up to the overall report."""
import numpy as np
import pytest
from PIL import Image
from skimage.metrics import peak_signal_noise_ratio

from geotween.models.evaluate import (
    METHODS,
    contact_sheet,
    evaluate,
    format_table,
    load_truth,
    long_map_path,
    nearest_captures,
    pair_spans,
    span_report,
)
from geotween.models.params import SPAN_BUCKETS
from geotween.models.render import DEMO_SPACE, long_truth_pairs, truth_pairs, write_truth


def _pair(az0, el0, az1, el1) -> dict:
    return {"start": {"params": {"lamp_azimuth": az0, "lamp_elevation": el0}},
            "end": {"params": {"lamp_azimuth": az1, "lamp_elevation": el1}}}


# (start, end, reach, bucket), reach worked by hand: azimuth |short arc| / 180 deg, elevation
# |delta| / 50 deg, the larger of the two
HAND_PAIRS = [((0, 40), (90, 40), 0.5, "short"),        # a quarter turn: the short bucket's top, inclusive
              ((350, 40), (80, 40), 0.5, "short"),      # the same arc across 0 deg
              ((0, 20), (0, 30), 0.2, "short"),
              ((0, 40), (135, 40), 0.75, "medium"),     # the medium bucket's top, inclusive
              ((0, 20), (105, 40), 105 / 180, "medium"),
              ((10, 50), (175, 50), 165 / 180, "long"),
              ((200, 50), (35, 50), 165 / 180, "long"),  # up through 360: 165 deg, not 195
              ((0, 20), (30, 60), 0.8, "long"),          # elevation decides
              ((45, 20), (45, 70), 1.0, "long"),
              ((0, 40), (180, 40), 1.0, "long")]         # half a turn: the farthest two azimuths can be


def test_hand_made_pairs_land_in_the_bucket_their_reach_names():
    reach, buckets = pair_spans(DEMO_SPACE, [_pair(*a, *b) for a, b, _, _ in HAND_PAIRS])
    assert reach == pytest.approx([r for _, _, r, _ in HAND_PAIRS], abs=1e-12)
    assert buckets == [b for _, _, _, b in HAND_PAIRS]


def test_per_bucket_confidence_follows_the_definitions():
    # short: 4 frames, medium: none, long: 2 frames, all below tau
    frame_bucket = np.array(["short"] * 4 + ["long"] * 2)
    prob = np.array([0.9, 0.9, 0.25, 0.62, 0.3, 0.8])
    faithful = np.array([1.0, 0.0, 0.0, 1.0, 0.0, 0.0])
    psnr = np.array([30.0, 20.0, 25.0, 120.0, 10.0, 14.0])  # 120 (near-identical frames) counts as 99
    ssim = np.array([0.95, 0.7, 0.8, 0.99, 0.3, 0.5])
    rep = span_report({"geodesic": (psnr, ssim), "dissolve": (psnr - 1, ssim)}, {"geodesic": (prob, faithful)},
                      frame_bucket, ["short", "long"], min_confidence=0.5)
    assert list(rep) == [name for name, _ in SPAN_BUCKETS]
    assert [rep[b]["reach"] for b in rep] == [[0.0, 0.5], [0.5, 0.75], [0.75, 1.0]]
    assert (rep["medium"]["pairs"], rep["medium"]["frames"], rep["medium"]["methods"]) == (0, 0, {})
    short, long = rep["short"]["methods"]["geodesic"], rep["long"]["methods"]["geodesic"]
    assert short["psnr"] == pytest.approx((30 + 20 + 25 + 99) / 4) and short["frames"] == 4
    assert short["ssim"] == pytest.approx(0.86) and long["psnr"] == pytest.approx(12.0)
    assert short["psnr_p10"] == pytest.approx(np.percentile([30, 20, 25, 99], 10))
    assert "confidence" not in rep["short"]["methods"]["dissolve"]
    c = short["confidence"]
    # ECE with 15 equal-width bins, sum_b n_b / N |accuracy_b - mean confidence_b| (Guo et al. 2017,
    # "On Calibration of Modern Neural Networks", eq. 3; from memory), worked by hand: 0.9 and 0.9 share
    # bin 13 (accuracy 1/2), 0.25 is alone in bin 3, 0.62 alone in bin 9:
    # 2/4 |0.5 - 0.9| + 1/4 |0 - 0.25| + 1/4 |1 - 0.62| = 0.2 + 0.0625 + 0.095
    assert c["ece"] == pytest.approx(0.3575, abs=1e-4)
    # AUROC against scikit-learn's roc_auc_score
    sk = pytest.importorskip("sklearn.metrics")
    assert c["auroc"] == pytest.approx(sk.roc_auc_score(faithful[:4], prob[:4]), abs=1e-4)
    # accepted at 0.5: 0.9, 0.9, 0.62; one of those three is below tau; neither good frame was rejected
    assert (c["frames"], c["accepted"], c["accept_rate"]) == (4, 3, 0.75)
    assert c["below_tau_share_of_accepted"] == pytest.approx(1 / 3, abs=1e-4)
    assert c["reject_rate_above_tau"] == 0.0
    c = long["confidence"]
    assert c["auroc"] is None and c["reject_rate_above_tau"] is None  # no frame reached tau
    assert (c["accept_rate"], c["below_tau_share_of_accepted"]) == (0.5, 1.0)
    assert c["ece"] == pytest.approx((0.3 + 0.8) / 2, abs=1e-4)  # each alone in its bin, outcome 0


# a hand-made bank of four captures (lamp azimuth deg, lamp elevation deg)
BANK = np.array([[350.0, 40.0], [20.0, 40.0], [180.0, 20.0], [90.0, 70.0]])


def test_the_nearest_capture_is_the_bank_sample_with_the_closest_settings():
    targets = np.array([[3.0, 40.0],     # 13 deg from 350 across 0 deg, 17 from 20: the wrap decides
                        [100.0, 25.0],   # unscaled: (90, 70) at 46.1 beats (180, 20) at 80.2
                        [179.0, 21.0],
                        [5.0, 40.0]])    # 15 deg from both 350 and 20: the first of equals
    assert list(nearest_captures(DEMO_SPACE, None, BANK, targets)) == [0, 3, 2, 0]
    # scaled by (15 deg, 1 deg) elevation weighs 15 times more: (180, 20) at (5.33, 5) beats (90, 70) at (0.67, 45)
    assert list(nearest_captures(DEMO_SPACE, np.array([15.0, 1.0]), BANK, targets)) == [0, 2, 2, 0]
    # brute force over the bank with plain Python arithmetic (short arc worked by hand)
    rng = np.random.default_rng(0)
    many = np.stack([rng.uniform(0, 360, 200), rng.uniform(20, 70, 200)], axis=-1)
    for target, got in zip(many, nearest_captures(DEMO_SPACE, np.array([15.0, 10.0]), BANK, many)):
        dists = []
        for az, el in BANK:
            arc = abs(target[0] - az) % 360.0
            arc = min(arc, 360.0 - arc)
            dists.append(((arc / 15.0) ** 2 + ((target[1] - el) / 10.0) ** 2) ** 0.5)
        assert got == int(np.argmin(dists))
    with pytest.raises(ValueError, match="empty"):
        nearest_captures(DEMO_SPACE, None, np.zeros((0, 2)), targets)


def test_the_contact_sheet_has_a_row_per_method_shown(tmp_path):
    truth = np.zeros((3, 8, 8, 3), dtype=np.float32)
    outs = {m: np.full_like(truth, 20 * (k + 1) / 255) for k, m in enumerate(METHODS)}  # grey 20, 40, ...
    with Image.open(contact_sheet([(truth, outs), (truth, outs)], tmp_path / "sheet.png", gap=2)) as img:
        sheet = np.asarray(img)
    # per pair: truth, dissolve, flow, nearest, straight, geodesic (12 px tall each) and a 6 px gap
    assert sheet.shape == (2 * (6 * 12 + 6), 3 * 12, 3)
    nearest_row = sheet[3 * 12 + 2:3 * 12 + 10, 2:10]
    assert (nearest_row == 20 * (METHODS.index("nearest") + 1)).all()


@pytest.fixture(scope="module")
def span_eval(small_engine, tmp_path_factory):
    root = tmp_path_factory.mktemp("span-eval")
    pairs = truth_pairs(4, seed=2) + long_truth_pairs(4, seed=0)  # 3 along azimuth, 1 across elevation
    truth = write_truth(root / "truth", pairs, size=small_engine.resolution)
    report = evaluate(small_engine, truth, latent_map=root / "latent_map.png", sheet_pairs=2)
    return pairs, report, truth


def test_the_nearest_method_scores_the_capture_at_the_closest_settings(span_eval, small_engine):
    _, report, truth_dir = span_eval
    assert "nearest" in report["methods"] and all("nearest" in b["methods"] for b in report["by_span"].values()
                                                  if b["methods"])
    # every capture the engine makes frames from: the bank, then the held-out share
    bank = np.concatenate([small_engine.bundle.images(), small_engine.bundle.images("holdout_images")])
    params = small_engine.capture_params
    assert len(params) == len(bank) == len(small_engine.bundle.params) + len(small_engine.bundle.arrays["holdout_params"])
    psnr = []
    for pair in load_truth(truth_dir, small_engine.resolution, small_engine.channels):
        for frame, named in zip(pair["truth"], pair["truth_params"]):
            want = DEMO_SPACE.vector(named)
            dist = [float(DEMO_SPACE.distance(p, want, small_engine.scale)) for p in params]
            # PSNR against scikit-image's implementation (capped at 99 dB as the report caps it)
            with np.errstate(divide="ignore"):  # a frame at a captured setting is that capture: infinite PSNR
                psnr.append(min(99.0, peak_signal_noise_ratio(frame, bank[int(np.argmin(dist))], data_range=1.0)))
    assert report["methods"]["nearest"]["psnr"] == pytest.approx(np.mean(psnr), abs=2e-3)
    assert "confidence" not in report["methods"]["nearest"] and "pacing_error" not in report["methods"]["nearest"]


def test_the_buckets_add_up_to_the_overall_report(span_eval):
    pairs, report, _ = span_eval
    by_span = report["by_span"]
    reach = [float(DEMO_SPACE.reach(p["start"], p["end"])) for p in pairs]
    for name, (low, high) in zip(by_span, [b["reach"] for b in by_span.values()]):
        want = sum(low < r <= high + 1e-9 or (low == 0.0 and r == 0.0) for r in reach)
        assert by_span[name]["pairs"] == want, name
    assert sum(b["pairs"] for b in by_span.values()) == report["pairs"] == 8
    assert by_span["long"]["pairs"] >= 1  # the full-range elevation pair at least
    for m, overall in report["methods"].items():
        parts = [b["methods"][m] for b in by_span.values() if b["methods"]]
        frames = np.array([p["frames"] for p in parts])
        assert frames.sum() == overall["frames"] == 8 * report["frames_per_pair"], m
        # the overall means are the frame-weighted means of the buckets' (up to their rounding)
        assert np.dot(frames, [p["psnr"] for p in parts]) / frames.sum() == pytest.approx(overall["psnr"], abs=2e-3)
        assert np.dot(frames, [p["ssim"] for p in parts]) / frames.sum() == pytest.approx(overall["ssim"], abs=2e-4)
        if "confidence" not in overall:
            assert all("confidence" not in p for p in parts)
            continue
        whole = overall["confidence"]
        for key in ("frames", "accepted", "below_tau", "at_or_above_tau", "rejected_below_tau",
                    "accepted_below_tau", "accepted_above_tau", "rejected_above_tau"):
            assert sum(p["confidence"][key] for p in parts) == whole[key], (m, key)
        assert whole["accept_rate"] == pytest.approx(whole["accepted"] / whole["frames"], abs=1e-4)
    assert "confidence" in report["methods"]["geodesic"]  # the small model is calibrated


def test_the_longest_pair_gets_its_own_latent_map_and_the_table_shows_every_bucket(span_eval, tmp_path):
    pairs, report, _ = span_eval
    reach = [float(DEMO_SPACE.reach(p["start"], p["end"])) for p in pairs]
    longest = report["longest_pair"]
    assert longest["index"] == int(np.argmax(reach)) and longest["reach"] == pytest.approx(max(reach), abs=1e-4)
    assert longest["bucket"] == "long" and longest["steps"] == pairs[longest["index"]]["steps"]
    assert report["latent_map_long"] == str(long_map_path(report["latent_map"]))
    assert report["latent_map_long"].endswith("latent_map_long.png")
    with Image.open(report["latent_map"]) as a, Image.open(report["latent_map_long"]) as b:
        assert a.size == b.size and not np.array_equal(np.asarray(a), np.asarray(b))
    table = format_table(report)
    assert "by span" in table
    for name, b in report["by_span"].items():
        rows = [line for line in table.splitlines() if line.startswith(f"{name} ")]
        assert len(rows) == (len(b["methods"]) or 1), name
    # the overall table keeps its shape: one row per method, before the span section
    head = table.split("\n\n")[0].splitlines()
    assert [line.split()[0] for line in head[1:]] == list(report["methods"])


def test_settings_ends_ask_for_routes_between_the_true_settings(span_eval, small_engine, monkeypatch):
    pairs, _, truth = span_eval
    asked = []
    real = small_engine.between

    def spy(start, end, **kw):
        asked.append((start, end))
        return real(start, end, **kw)

    monkeypatch.setattr(small_engine, "between", spy)
    report = evaluate(small_engine, truth, sheet_pairs=0, ends="settings")
    assert report["ends"] == "settings" and format_table(report).startswith("routes asked between the pairs' true")
    first = load_truth(truth, small_engine.resolution, small_engine.channels)[0]
    start, end = asked[0]
    assert start.image is None and start.params == first["start"]["params"] and end.params == first["end"]["params"]
    assert len(asked) == 2 * len(pairs)  # both routes of every pair
    with pytest.raises(ValueError, match="ends"):
        evaluate(small_engine, truth, ends="codes")
