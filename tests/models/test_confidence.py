import json

import numpy as np
import pytest
from scipy.optimize import isotonic_regression
from scipy.special import expit
from sklearn.isotonic import IsotonicRegression
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import roc_auc_score
from sklearn.preprocessing import StandardScaler

from geotween.models.confidence import (
    Calibrator,
    ConfidenceModel,
    SignalCombiner,
    _pav,
    auroc,
    combine_signals,
    ece,
    fit_confidence,
    reliability_table,
)


def _json_round_trip(d: dict) -> dict:
    return json.loads(json.dumps(d))


# ---------------------------------------------------------------- ECE and the reliability table

def test_ece_hand_example():
    # 15 bins of width 1/15. 0.10 and 0.12 share bin 1 [0.0667, 0.1333): mean prob 0.11, frequency 0.5,
    # gap 0.39, weight 2/4. 0.90 sits in bin 13 [0.8667, 0.9333): gap |1 - 0.9| = 0.1, weight 1/4.
    # 1.0 sits in the last bin, which includes 1.0: gap |0 - 1| = 1, weight 1/4.
    # ECE = 0.5 * 0.39 + 0.25 * 0.1 + 0.25 * 1 = 0.195 + 0.025 + 0.25 = 0.47.
    assert ece([0.10, 0.12, 0.90, 1.0], [0, 1, 1, 0]) == pytest.approx(0.47, abs=1e-12)


def test_ece_bin_edges_are_closed_on_the_left():
    # 2/15 opens bin 2, so it does not share bin 1 with 0.1:
    # ECE = 0.5 |1 - 2/15| + 0.5 |0 - 0.1| = 0.5 * 13/15 + 0.05 = 0.48333...
    # (had they shared a bin: |0.5 - (2/15 + 0.1) / 2| = 0.38333...).
    assert ece([2 / 15, 0.1], [1, 0]) == pytest.approx(0.5 * 13 / 15 + 0.05, abs=1e-12)
    table = reliability_table([2 / 15, 0.1, 1.0], [1, 0, 1])
    assert [row["count"] for row in table] == [0, 1, 1] + [0] * 11 + [1]
    assert table[2]["mean_prob"] == pytest.approx(2 / 15) and table[2]["frequency"] == 1.0
    assert table[0]["mean_prob"] is None and table[14]["hi"] == 1.0


def test_ece_small_when_calibrated_and_large_when_not():
    rng = np.random.default_rng(0)
    p = rng.uniform(0, 1, 20000)
    calibrated = rng.uniform(0, 1, p.size) < p
    assert ece(p, calibrated) < 0.02
    # Outcomes drawn with probability p^2: the expected gap is mean(p - p^2) = 1/2 - 1/3 = 1/6.
    overconfident = rng.uniform(0, 1, p.size) < p ** 2
    assert ece(p, overconfident) == pytest.approx(1 / 6, abs=0.02)


def test_ece_rejects_bad_input():
    with pytest.raises(ValueError, match=r"prob must lie in \[0, 1\]"):
        ece([0.5, 1.2], [0, 1])
    with pytest.raises(ValueError, match="outcome must be 0 or 1"):
        ece([0.5, 0.2], [0, 2])
    with pytest.raises(ValueError, match="bins"):
        ece([0.5], [1], bins=0)


# ---------------------------------------------------------------- AUROC

def test_auroc_matches_sklearn_with_ties():
    # Reference: sklearn.metrics.roc_auc_score; rounding the scores makes many ties.
    rng = np.random.default_rng(1)
    label = rng.integers(0, 2, 400)
    score = np.round(label * 0.5 + rng.normal(0, 1, label.size), 1)
    assert len(np.unique(score)) < label.size / 4
    assert auroc(score, label) == pytest.approx(roc_auc_score(label, score), abs=1e-12)


def test_auroc_edge_cases():
    # Mann-Whitney: every positive above every negative gives 1; all scores tied gives 1/2.
    assert auroc([0.1, 0.2, 0.8, 0.9], [0, 0, 1, 1]) == 1.0
    assert auroc([0.3, 0.3, 0.3], [0, 1, 1]) == 0.5
    assert np.isnan(auroc([0.1, 0.2], [1, 1]))


# ---------------------------------------------------------------- Calibrator

def _logistic_data(n, slope=1.5, intercept=-0.5, seed=2):
    rng = np.random.default_rng(seed)
    s = rng.normal(0.0, 2.0, n)
    y = (rng.uniform(0, 1, n) < expit(slope * s + intercept)).astype(float)
    return s, y


def test_platt_matches_sklearn_and_recovers_truth():
    s, y = _logistic_data(4000)
    cal = Calibrator().fit(s, y, method="platt")
    # Reference: sklearn.linear_model.LogisticRegression with a huge C (practically unpenalised).
    ref = LogisticRegression(C=1e8, tol=1e-10, max_iter=1000).fit(s[:, None], y)
    assert cal.params["slope"] == pytest.approx(ref.coef_[0, 0], rel=1e-3)
    assert cal.params["intercept"] == pytest.approx(ref.intercept_[0], rel=1e-3, abs=1e-3)
    # The generating slope 1.5 and intercept -0.5, within a few standard errors for n = 4000.
    assert cal.params["slope"] == pytest.approx(1.5, abs=0.15)
    assert cal.params["intercept"] == pytest.approx(-0.5, abs=0.15)
    grid = np.linspace(-3, 3, 7)
    np.testing.assert_allclose(cal.predict(grid), np.clip(ref.predict_proba(grid[:, None])[:, 1], 1e-3, 1 - 1e-3),
                               atol=1e-4)


def test_platt_slope_is_never_negative():
    # A signal that falls as faithfulness rises: the best non-negative slope is 0, leaving the base rate.
    s, y = _logistic_data(1000, slope=-1.0, intercept=0.3)
    cal = Calibrator().fit(s, y, method="platt")
    assert cal.params["slope"] == 0.0
    np.testing.assert_allclose(cal.predict([-5.0, 0.0, 5.0]), y.mean(), atol=1e-9)


def test_isotonic_matches_sklearn():
    # Reference: sklearn.isotonic.IsotonicRegression(out_of_bounds="clip"), which also pools tied signals
    # and interpolates linearly between its fitted points; we additionally clip to [1e-3, 1 - 1e-3].
    s, y = _logistic_data(600, seed=3)
    s = np.round(s, 1)  # ties
    cal = Calibrator().fit(s, y, method="isotonic")
    ref = IsotonicRegression(out_of_bounds="clip").fit(s, y)
    query = np.r_[s, np.linspace(-9, 9, 101)]
    np.testing.assert_allclose(cal.predict(query), np.clip(ref.predict(query), 1e-3, 1 - 1e-3), atol=1e-12)


def test_pav_fallback_matches_scipy():
    # Reference: scipy.optimize.isotonic_regression (weighted pool-adjacent-violators).
    rng = np.random.default_rng(4)
    y, w = rng.normal(size=200) + np.linspace(0, 2, 200), rng.uniform(0.5, 3, 200)
    np.testing.assert_allclose(_pav(y, w), isotonic_regression(y, weights=w).x, atol=1e-12)


@pytest.mark.parametrize("method", ["platt", "isotonic"])
def test_calibrator_is_monotone_and_in_range(method):
    s, y = _logistic_data(500, seed=5)
    cal = Calibrator().fit(s, y, method=method)
    p = cal.predict(np.linspace(-20, 20, 2001))
    assert np.all(np.diff(p) >= 0)
    assert p.min() >= 1e-3 and p.max() <= 1 - 1e-3
    assert cal.predict(np.zeros((2, 3))).shape == (2, 3)


def test_auto_picks_by_count():
    s, y = _logistic_data(400, slope=0.5, intercept=0.0, seed=6)
    assert Calibrator().fit(s[:199], y[:199]).method == "platt"
    assert Calibrator().fit(s[:200], y[:200]).method == "isotonic"
    rare = np.zeros(400)
    rare[:19] = 1  # 19 of one class is below min_class=20
    assert Calibrator().fit(s, rare).method == "platt"
    assert Calibrator().fit(s[:100], y[:100], min_isotonic=100).method == "isotonic"


@pytest.mark.parametrize("method", ["platt", "isotonic"])
def test_calibrator_round_trip(method):
    s, y = _logistic_data(300, seed=7)
    cal = Calibrator().fit(s, y, method=method)
    back = Calibrator.from_dict(_json_round_trip(cal.to_dict()))
    grid = np.linspace(-8, 8, 333)
    assert back.method == method
    np.testing.assert_array_equal(back.predict(grid), cal.predict(grid))


def test_calibrator_errors():
    with pytest.raises(ValueError, match="not fitted"):
        Calibrator().predict([0.0])
    with pytest.raises(ValueError, match="method must be one of"):
        Calibrator().fit([0.0, 1.0], [0, 1], method="beta")
    with pytest.raises(ValueError, match="'platt' or 'isotonic'"):
        Calibrator.from_dict({"method": "spline"})
    with pytest.raises(LookupError, match="slope"):
        Calibrator.from_dict({"method": "platt", "intercept": 0.0, "prob_floor": 1e-3})


# ---------------------------------------------------------------- combiner and the whole model

def _signals(n, seed=8):
    """Raw signals where larger = worse; outcome 1 (faithful) falls with the first two."""
    rng = np.random.default_rng(seed)
    residual = np.abs(rng.normal(0, 1, n))
    distance = rng.exponential(1.0, n)
    noise = rng.normal(0, 1, n)
    y = (rng.uniform(0, 1, n) < expit(3.0 - 2.0 * residual - 1.5 * distance)).astype(float)
    return np.c_[residual, distance, noise], y


def test_combiner_matches_sklearn():
    # Reference: sklearn StandardScaler + LogisticRegression(C=1/l2): the same penalised log-loss.
    x, y = _signals(1500)
    comb = combine_signals(x, y, l2=2.0)
    ref = LogisticRegression(C=0.5, tol=1e-10, max_iter=1000).fit(StandardScaler().fit_transform(x), y)
    np.testing.assert_allclose(comb.weights, ref.coef_[0], rtol=1e-4, atol=1e-6)
    assert comb.intercept == pytest.approx(ref.intercept_[0], rel=1e-4)
    assert comb.weights[0] < 0 and comb.weights[1] < 0  # larger residual or distance = less faithful
    back = SignalCombiner.from_dict(_json_round_trip(comb.to_dict()))
    np.testing.assert_array_equal(back.score(x), comb.score(x))


def test_combiner_errors():
    with pytest.raises(ValueError, match="both 0 and 1"):
        combine_signals(np.ones((5, 2)), np.ones(5))
    comb = combine_signals(*_signals(100))
    with pytest.raises(ValueError, match="3 columns"):
        comb.score(np.ones((4, 2)))


def test_fit_confidence_held_out_quality():
    x, y = _signals(2000)
    model, report = fit_confidence(x, y, names=["cycle_residual", "bank_distance", "noise"], seed=0)
    assert report["n_fit"] + report["n_eval"] == 2000
    assert abs(report["n_fit"] - 1000) <= 1
    assert report["auroc"] > 0.8
    assert report["ece"] < 0.08
    assert report["method"] == "isotonic" and report["deployed_method"] == "isotonic"
    assert sum(row["count"] for row in report["reliability"]) == report["n_eval"]
    json.dumps(report)  # a report must be storable as JSON
    # The deployed model, refitted on all rows, still ranks fresh data well.
    x_new, y_new = _signals(2000, seed=9)
    p_new = model.predict(x_new)
    assert auroc(p_new, y_new) > 0.8 and ece(p_new, y_new) < 0.08
    assert model.names == ("cycle_residual", "bank_distance", "noise")


def test_confidence_model_round_trip_and_named_columns():
    x, y = _signals(300, seed=10)
    assert min(y.sum(), (1 - y).sum()) >= 20
    model, report = fit_confidence(x, y, names=["a", "b", "c"], seed=1)
    # 150 fit rows are below min_isotonic=200, so the held-out model is Platt; all 300 rows deploy isotonic.
    assert report["method"] == "platt" and model.calibrator.method == "isotonic"
    back = ConfidenceModel.from_dict(_json_round_trip(model.to_dict()))
    np.testing.assert_array_equal(back.predict(x), model.predict(x))
    by_name = {"c": x[:, 2], "a": x[:, 0], "b": x[:, 1]}
    np.testing.assert_array_equal(model.predict(by_name), model.predict(x))
    with pytest.raises(LookupError, match="'b'"):
        model.predict({"a": x[:, 0], "c": x[:, 2]})


def test_fit_confidence_rejects_bad_input():
    x, y = _signals(50, seed=11)
    with pytest.raises(ValueError, match="fit_share"):
        fit_confidence(x, y, fit_share=1.0)
    with pytest.raises(ValueError, match="at least 3 rows of each class"):
        fit_confidence(x, np.r_[np.ones(48), np.zeros(2)])
    with pytest.raises(ValueError, match="2 names"):
        fit_confidence(x, y, names=["a", "b"])


def test_detail_transfer_takes_the_cheapest_flow_that_does_as_well_as_the_best():
    from geotween.models.calibrate import REFINE_TIE_DB, pick_refine

    def scores(psnr, ssim):
        return {"psnr": psnr, "ssim": ssim}

    # "none" (listed first, the cheaper) within the tie margin of DIS: taken, with its better tolerance
    tie = {"none": {0.05: scores(31.90, 0.9620), 0.03: scores(31.80, 0.9621)},
           "dis": {0.05: scores(31.90 + REFINE_TIE_DB / 2, 0.9625), 0.03: scores(31.70, 0.9600)}}
    assert pick_refine(tie) == ("none", 0.05)
    # beyond the margin in PSNR, or in SSIM: the estimator that wins is taken
    lost = {"none": {0.05: scores(23.84, 0.79)}, "dis": {0.05: scores(25.69, 0.906), 0.03: scores(25.70, 0.905)}}
    assert pick_refine(lost) == ("dis", 0.03)
    blurrier = {"none": {0.05: scores(31.99, 0.9500)}, "dis": {0.05: scores(32.00, 0.9600)}}
    assert pick_refine(blurrier) == ("dis", 0.05)
    # equal scores: the smaller tolerance, as before the flow choice existed
    assert pick_refine({"dis": {0.05: scores(30.0, 0.9), 0.03: scores(30.0, 0.9)}}) == ("dis", 0.03)
    with pytest.raises(ValueError, match="no candidates"):
        pick_refine({"none": {}, "dis": {}})
