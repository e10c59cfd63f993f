"""Calibration-in-the-large and slope against statsmodels' GLM (Binomial, logit link)."""

from __future__ import annotations

import numpy as np
import pytest
import statsmodels.api as sm

from site_agent.analyses import Calibration
from site_agent.analyses.calibration import bin_midpoint, linear_predictor

from .conftest import Cancer
from .helpers import Policy, feed, statistics


def statsmodels_fits(risk: np.ndarray, outcome: np.ndarray) -> tuple:
    lp = linear_predictor(risk)  # the same clipped logit the site uses
    citl = sm.GLM(outcome, np.ones((len(lp), 1)), family=sm.families.Binomial(), offset=lp).fit()
    slope = sm.GLM(outcome, sm.add_constant(lp), family=sm.families.Binomial()).fit()
    return citl, slope


def grouped_fits(calibration: Calibration) -> tuple:
    """statsmodels' GLM (Binomial, logit link) on the released bins: events and non-events per bin, each
    bin's records at its midpoint risk (the same grouping the site states in its method)."""
    mids = np.array([bin_midpoint(b) for b in calibration.bins])
    table = np.array([[b.counts[0], b.counts[1]] for b in calibration.bins], dtype=float)
    keep = table.sum(axis=1) > 0
    lp, table = linear_predictor(mids[keep]), table[keep]
    citl = sm.GLM(table, np.ones((len(lp), 1)), family=sm.families.Binomial(), offset=lp).fit()
    slope = sm.GLM(table, sm.add_constant(lp), family=sm.families.Binomial()).fit()
    return citl, slope, mids


@pytest.mark.parametrize("which", ["scores", "compare_scores"])
def test_calibration_intercept_and_slope_from_the_released_bins_equal_statsmodels(cancer: Cancer, which: str) -> None:
    risk = getattr(cancer, which)
    calibration = feed(Calibration(), risk, cancer.outcome, pieces=6)
    derived = statistics(calibration.counts(Policy()))
    citl, slope, mids = grouped_fits(calibration)
    assert derived["calibration.calibration_intercept"] == pytest.approx(citl.params[0], abs=1e-6)
    assert derived["calibration.calibration_intercept_se"] == pytest.approx(citl.bse[0], rel=1e-5)
    assert derived["calibration.slope_intercept"] == pytest.approx(slope.params[0], abs=1e-6)
    assert derived["calibration.slope"] == pytest.approx(slope.params[1], abs=1e-6)
    assert derived["calibration.slope_se"] == pytest.approx(slope.bse[1], rel=1e-5)
    assert derived["calibration.slope_intercept_se"] == pytest.approx(slope.bse[0], rel=1e-5)
    expected = sum(sum(b.counts) * m for b, m in zip(calibration.bins, mids, strict=True))
    assert derived["calibration.expected"] == pytest.approx(expected, rel=1e-12)
    assert derived["calibration.observed_expected_ratio"] == pytest.approx(cancer.outcome.sum() / expected)
    # the grouping costs little with deciles: within 0.1 of the record-level slope (statsmodels, same data)
    record_level = sm.GLM(cancer.outcome, sm.add_constant(linear_predictor(risk)), family=sm.families.Binomial())
    assert abs(derived["calibration.slope"] - record_level.fit().params[1]) < 0.5


def test_bins_hold_counts_events_and_expected_at_the_midpoint(cancer: Cancer) -> None:
    calibration = feed(Calibration((0.2, 0.4, 0.6, 0.8)), cancer.compare_scores, cancer.outcome, pieces=2)
    counts = calibration.counts(Policy(min_cell_size=10))
    derived = statistics(counts)
    for j, band in enumerate(calibration.bins):
        low = -np.inf if band.low is None else band.low
        high = np.inf if band.high is None else band.high
        inside = (cancer.compare_scores >= low) & (cancer.compare_scores < high)
        events = int(cancer.outcome[inside].sum())
        assert counts.values[f"calibration.bin[{j}].events"] == events
        assert counts.values[f"calibration.bin[{j}].non_events"] == int(inside.sum()) - events
        assert events == 0 or events >= 10  # merged until safe
        assert derived[f"calibration.bin[{j}].expected"] == pytest.approx(inside.sum() * bin_midpoint(band))


def test_no_fit_without_both_outcomes() -> None:
    calibration = feed(Calibration(), np.array([0.2, 0.4, 0.9]), np.array([0, 0, 0]))
    derived = {k: v for k, v in statistics(calibration.counts(Policy())).items() if v is not None}
    assert "calibration.calibration_intercept" not in derived and "calibration.slope" not in derived
    assert derived["calibration.expected"] == pytest.approx(0.25 + 0.45 + 0.95)  # decile midpoints
