"""The conservative confidence used when held-out frames are too few of one kind to fit a curve."""
import numpy as np
import pytest
from scipy.stats import beta

from geotween.models.confidence import BoundConfidence, ConfidenceModel, conservative_rate


@pytest.mark.parametrize("k,n", [(1, 1), (3, 40), (20, 20), (57, 60), (199, 400)])
@pytest.mark.parametrize("level", [0.9, 0.95, 0.99])
def test_rate_is_the_jeffreys_lower_bound(k, n, level):
    # reference: scipy.stats.beta.ppf, the quantile of the Beta(k + 1/2, n - k + 1/2) posterior
    # of a binomial rate under the Jeffreys prior (a standard interval for a proportion)
    assert conservative_rate(k, n, level=level) == pytest.approx(beta.ppf(1 - level, k + 0.5, n - k + 0.5), rel=1e-9)


def test_rate_is_below_the_observed_share_and_zero_without_successes():
    assert conservative_rate(0, 500) == 0.0
    assert conservative_rate(0, 0) == 0.0
    for k, n in [(5, 10), (30, 31), (400, 400)]:
        assert 0.0 < conservative_rate(k, n) < k / n or (k == n and conservative_rate(k, n) < 1.0)
    # more evidence for the same share tightens the bound towards it
    assert conservative_rate(9, 10) < conservative_rate(90, 100) < conservative_rate(900, 1000) < 0.9


def test_bad_counts_are_refused():
    with pytest.raises(ValueError, match="successes"):
        conservative_rate(5, 4)
    with pytest.raises(ValueError, match="level"):
        conservative_rate(1, 4, level=1.0)


def test_bound_model_predicts_its_rate_and_round_trips():
    m = BoundConfidence(["cycle", "settings"], successes=0, trials=120)
    x = np.array([[0.1, 0.2], [5.0, 9.0], [0.0, 0.0]])
    assert np.all(m.predict(x) == 0.0)
    back = ConfidenceModel.from_dict(m.to_dict())
    assert isinstance(back, BoundConfidence) and back.names == ("cycle", "settings")
    assert np.all(back.predict({"cycle": [1.0], "settings": [2.0]}) == 0.0)
    some = BoundConfidence(["cycle"], successes=118, trials=120)
    assert 0.9 < some.predict(np.ones((2, 1)))[0] < 118 / 120
