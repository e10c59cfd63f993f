"""Checks of decision-curve analysis: net benefit against an independent computation from scikit-learn's
confusion matrix on its bundled breast-cancer data, the properties of the reference strategies stated by
Vickers & Elkin (2006), the multinomial variance against a Monte Carlo estimate, and the pooling against
statsmodels' combine_effects."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import confusion_matrix
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler
from statsmodels.stats.meta_analysis import combine_effects

from federation.stats import PoolingError, ReleasedTable
from federation.stats.net_benefit import (
    DecisionCurve,
    decision_curve,
    net_benefit,
    net_benefit_variance,
    site_net_benefit,
)
from federation.stats.planning import withhold_table

THRESHOLDS = (0.05, 0.1, 0.2, 0.3, 0.5)


def _data() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    data = load_breast_cancer()
    x, y = data.data[:, :4], 1 - data.target
    risk = make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000)).fit(x, y).predict_proba(x)[:, 1]
    site = np.random.default_rng(9).permutation(len(y)) % 4
    return risk, y, site


def _independent_net_benefit(y: np.ndarray, risk: np.ndarray, pt: float) -> float:
    # Net benefit = TP/n - FP/n * pt/(1 - pt) (Vickers & Elkin 2006, from memory), with the counts from
    # scikit-learn's confusion_matrix.
    tn, fp, fn, tp = confusion_matrix(y, (risk >= pt).astype(int), labels=[0, 1]).ravel()
    n = len(y)
    return tp / n - fp / n * pt / (1 - pt)


def _tables() -> dict[float, list[ReleasedTable]]:
    risk, y, site = _data()
    out = {}
    for pt in THRESHOLDS:
        rows = []
        for s in range(4):
            tn, fp, fn, tp = confusion_matrix(y[site == s], (risk[site == s] >= pt).astype(int), labels=[0, 1]).ravel()
            rows.append(ReleasedTable.complete(f"site-{s}", int(tp), int(fp), int(fn), int(tn)))
        out[pt] = rows
    return out


def test_site_net_benefit_matches_an_independent_computation() -> None:
    risk, y, site = _data()
    curve = decision_curve(_tables(), 0.01, 0.99)
    assert [p.threshold_probability for p in curve.points] == list(THRESHOLDS)
    for point in curve.points:
        pt = point.threshold_probability
        for s, result in enumerate(point.sites):
            mask = site == s
            assert result.model == pytest.approx(_independent_net_benefit(y[mask], risk[mask], pt), abs=1e-12)
            prevalence = y[mask].mean()
            # Assessing everyone: prevalence - (1 - prevalence) pt / (1 - pt) (Vickers & Elkin 2006, from memory).
            assert result.screen_all == pytest.approx(prevalence - (1 - prevalence) * pt / (1 - pt), abs=1e-12)
            assert result.advantage_over_all == pytest.approx(result.model - result.screen_all, abs=1e-12)
        assert point.screen_none == 0.0
    assert DecisionCurve.from_dict(curve.to_dict()) == curve


def test_reference_strategies_behave_as_vickers_and_elkin_describe() -> None:
    # Vickers & Elkin (2006), from memory: assessing everyone has net benefit equal to the prevalence at a
    # threshold probability of 0 and crosses zero where the threshold probability equals the prevalence; a
    # perfect model has net benefit equal to the prevalence at every threshold probability.
    table = ReleasedTable.complete("s", 30, 0, 0, 70)  # prevalence 0.3, perfect classification
    at_prevalence = site_net_benefit(table, 0.3)
    assert at_prevalence.screen_all == pytest.approx(0.0, abs=1e-12)
    assert site_net_benefit(table, 1e-9).screen_all == pytest.approx(0.3, abs=1e-8)
    assert at_prevalence.model == pytest.approx(0.3)
    assert site_net_benefit(table, 0.8).model == pytest.approx(0.3)
    # A model calling everyone positive equals assessing everyone.
    everyone = site_net_benefit(ReleasedTable.complete("s", 30, 70, 0, 0), 0.2)
    assert everyone.model == pytest.approx(everyone.screen_all)
    assert net_benefit(30, 70, 100, 0.2) == pytest.approx(0.3 - 0.7 * 0.25)


def test_variance_matches_monte_carlo() -> None:
    # Multinomial (TP, FP, rest) with n = 400: the variance of TP/n - w FP/n by simulation (numpy) against the
    # closed form (evaluated at the expected counts, so the 1/2 smoothing shifts it by well under 1%).
    rng = np.random.default_rng(0)
    n, probabilities, pt = 400, np.array([0.2, 0.15, 0.65]), 0.25
    w = pt / (1 - pt)
    draws = rng.multinomial(n, probabilities, size=200_000)
    simulated = np.var(draws[:, 0] / n - w * draws[:, 1] / n)
    closed = net_benefit_variance(int(0.2 * n), int(0.15 * n), n, pt)
    assert closed == pytest.approx(simulated, rel=0.02)


def test_pooled_net_benefit_matches_statsmodels() -> None:
    # DerSimonian-Laird pooling of the sites' net benefits against statsmodels' combine_effects (method_re="dl"):
    # same estimate and tau^2; our Hartung-Knapp interval is truncated (never narrower than the random-effects
    # Wald interval), so it holds statsmodels' untruncated one (use_t=True, its "random effect wls" row).
    curve = decision_curve(_tables(), 0.01, 0.99, method="DL")
    for point in curve.points:
        values = np.array([s.model for s in point.sites])
        variances = np.array([s.model_se**2 for s in point.sites])
        reference = combine_effects(values, variances, method_re="dl", use_t=True)
        frame = reference.summary_frame()
        assert point.model.estimate == pytest.approx(reference.mean_effect_re, abs=1e-10)
        assert point.model.tau2 == pytest.approx(reference.tau2, abs=1e-10)
        assert point.model.ci_low <= frame.loc["random effect wls", "ci_low"] + 1e-8
        assert point.model.ci_high >= frame.loc["random effect wls", "ci_upp"] - 1e-8


def test_withheld_counts_leave_a_site_out_and_range_filters_thresholds() -> None:
    small = withhold_table("small", 3, 1, 12, 40, 10)  # TP and FP below 10: withheld, with FN and TN
    assert small.tp is None and small.fp is None
    big = ReleasedTable.complete("big", 40, 30, 20, 300)
    other = ReleasedTable.complete("other", 50, 20, 10, 250)
    curve = decision_curve({0.1: [small, big, other], 0.6: [big, other]}, 0.05, 0.5)
    assert [p.threshold_probability for p in curve.points] == [0.1]
    point = curve.points[0]
    assert [e.site_id for e in point.sites_not_pooled] == ["small"]
    assert point.sites[0].model is None and point.sites[0].screen_all is not None
    assert point.model is not None and point.model.n_studies == 2
    empty = decision_curve({0.9: [big, other]}, 0.05, 0.5)
    assert empty.points == () and "no released threshold" in empty.notes[0]
    with pytest.raises(PoolingError, match="threshold probability"):
        decision_curve({0.1: [big]}, 0.0, 0.5)
