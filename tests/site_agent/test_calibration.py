"""Calibration-in-the-large and slope against statsmodels' GLM (Binomial, logit link)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from site_agent.analyses import Calibration
from site_agent.analyses.calibration import linear_predictor

from .conftest import Cancer
from .helpers import Policy, feed


def statsmodels_fits(risk: np.ndarray, outcome: np.ndarray) -> tuple:
    lp = linear_predictor(risk)  # the same clipped logit the site uses
    citl = sm.GLM(outcome, np.ones((len(lp), 1)), family=sm.families.Binomial(), offset=lp).fit()
    slope = sm.GLM(outcome, sm.add_constant(lp), family=sm.families.Binomial()).fit()
    return citl, slope


@pytest.mark.parametrize("which", ["scores", "compare_scores"])
def test_citl_and_slope_equal_statsmodels(cancer: Cancer, which: str) -> None:
    risk = getattr(cancer, which)
    calibration = feed(Calibration(), risk, cancer.outcome, pieces=6)
    derived = {name: value for name, (value, _) in calibration.counts(Policy()).derived.items()}
    citl, slope = statsmodels_fits(risk, cancer.outcome)
    assert derived["calibration.citl"] == pytest.approx(citl.params[0], abs=1e-7)
    assert derived["calibration.citl_se"] == pytest.approx(citl.bse[0], rel=1e-6)
    assert derived["calibration.slope_intercept"] == pytest.approx(slope.params[0], abs=1e-7)
    assert derived["calibration.slope"] == pytest.approx(slope.params[1], abs=1e-7)
    assert derived["calibration.slope_se"] == pytest.approx(slope.bse[1], rel=1e-6)
    assert derived["calibration.slope_intercept_se"] == pytest.approx(slope.bse[0], rel=1e-6)
    assert derived["calibration.expected"] == pytest.approx(risk.sum(), rel=1e-12)
    assert derived["calibration.observed_expected_ratio"] == pytest.approx(cancer.outcome.sum() / risk.sum())


def test_bins_hold_counts_events_and_sum_of_risk(cancer: Cancer) -> None:
    calibration = feed(Calibration((0.2, 0.4, 0.6, 0.8)), cancer.compare_scores, cancer.outcome, pieces=2)
    counts = calibration.counts(Policy(min_cell_size=10))
    derived = {name: value for name, (value, _) in counts.derived.items()}
    for j, band in enumerate(calibration.bins):
        low = -np.inf if band.low is None else band.low
        high = np.inf if band.high is None else band.high
        inside = (cancer.compare_scores >= low) & (cancer.compare_scores < high)
        events = int(cancer.outcome[inside].sum())
        assert counts.values[f"calibration.bin[{j}].events"] == events
        assert counts.values[f"calibration.bin[{j}].non_events"] == int(inside.sum()) - events
        assert events == 0 or events >= 10  # merged until safe
        assert derived[f"calibration.bin[{j}].expected"] == pytest.approx(cancer.compare_scores[inside].sum())


def test_no_fit_without_both_outcomes() -> None:
    calibration = feed(Calibration(), np.array([0.2, 0.4, 0.9]), np.array([0, 0, 0]))
    derived = calibration.counts(Policy()).derived
    assert "calibration.citl" not in derived and "calibration.slope" not in derived
    assert derived["calibration.expected"][0] == pytest.approx(1.5)
