"""Which calibration frames the main confidence curve is fitted on (models.calibrate.calibrate_engine):
the chord's frames join it where frames are decoded from codes, and are left to the straight curve
alone where frames are made from the captures around them (made where a chord's code shows, not
where the frame should show)."""
from types import SimpleNamespace

import numpy as np
import pytest

from geotween.models import calibrate
from geotween.models.refine import RefineConfig

KINDS = ["geodesic"] * 40 + ["straight"] * 40 + ["fill"] * 20


def fitted_rows(monkeypatch, refine) -> list[int]:
    rng = np.random.default_rng(0)
    sig = rng.random((len(KINDS), 2))
    ssim = np.where(rng.random(len(KINDS)) < 0.5, 0.95, 0.5)
    monkeypatch.setattr(calibrate, "calibration_frames", lambda *a, **k: (sig, ssim, list(KINDS)))
    seen = []
    real = calibrate._fit_kind

    def spy(s, outcome, names, tau, seed):
        seen.append(len(outcome))
        return real(s, outcome, names, tau, seed)

    monkeypatch.setattr(calibrate, "_fit_kind", spy)
    engine = SimpleNamespace(refine=refine, scoring=lambda refine=True: (("a", "b"), None))
    confidence, summary = calibrate.calibrate_engine(engine, np.zeros((1, 2)), np.zeros((1, 4, 4, 3)))
    assert summary.rows == len(KINDS) and summary.rows_by_kind["straight"] == 40
    return seen


@pytest.mark.parametrize("refine", [None, RefineConfig(tolerance=0.05)])
def test_decoded_or_detail_frames_fit_the_main_curve_on_every_kind(monkeypatch, refine):
    assert fitted_rows(monkeypatch, refine) == [100, 40]  # main curve, then the straight route's


def test_frames_from_captures_fit_the_main_curve_without_the_chords(monkeypatch):
    assert fitted_rows(monkeypatch, RefineConfig(tolerance=0.1, flow="dis-fine", mode="pair")) == [60, 40]
