"""The summary ROC from each site's own score bands (federation.stats.multiple_threshold).

Checked on scikit-learn's breast-cancer data split into five sites (tests/stats/prediction_example.py), each
releasing bands with its own edges and no edge shared by every site (the case where a curve from bands summed
across sites has nothing left): against scikit-learn's AUC and operating points of all records, against
statsmodels' GLS at the fitted between-site covariance, and the within-site covariance against the
multinomial covariance written out by matrix algebra.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import special
from sklearn.metrics import roc_auc_score

from federation.stats import (
    MultipleThresholdRoc,
    PoolingError,
    SiteBands,
    cumulative_points,
    multiple_threshold_roc,
    pool_auc,
)
from tests.stats.prediction_example import sites

SITES = sites()
# Each site's own released edges (as if merged differently by disclosure control); no edge is common to all.
EDGES = (
    (0.1, 0.3, 0.5, 0.7, 0.9),
    (0.2, 0.4, 0.6, 0.8),
    (0.15, 0.5, 0.85),
    (0.05, 0.25, 0.45, 0.65),
    (0.35, 0.55, 0.75, 0.95),
)


def _bands(site, inner: tuple[float, ...]) -> SiteBands:
    band = np.searchsorted(np.array(inner), site.risk, side="right")
    k = len(inner) + 1
    pos = np.bincount(band[site.outcome == 1], minlength=k)
    neg = np.bincount(band[site.outcome == 0], minlength=k)
    return SiteBands(
        site.site_id, (-math.inf, *inner, math.inf), tuple(int(c) for c in pos), tuple(int(c) for c in neg)
    )


BANDS = [_bands(s, e) for s, e in zip(SITES, EDGES, strict=True)]


def test_no_edge_is_shared_by_every_site() -> None:
    assert not set.intersection(*(set(e) for e in EDGES))


def test_within_site_covariance_is_the_multinomial_one() -> None:
    # Multinomial band shares p: Cov(p) = (diag p - p p')/n; the shares below the inner edges are L p with L
    # lower-triangular ones; the delta method divides by F(1 - F) on both sides.
    counts = np.array([3, 0, 12, 20, 7])
    y, cov = cumulative_points(counts)
    n = counts.sum()
    p = counts / n
    lower = np.tril(np.ones((4, 5)))
    shares = lower @ p
    share_cov = lower @ ((np.diag(p) - np.outer(p, p)) / n) @ lower.T
    jacobian = np.diag(1 / (shares * (1 - shares)))
    assert y == pytest.approx(special.logit(shares), rel=1e-12)
    assert cov == pytest.approx(jacobian @ share_cov @ jacobian, rel=1e-10)
    # A share of 0 gets 0.5 added below and above, as a single proportion would (Hamza et al. 2008).
    y, cov = cumulative_points([0, 4, 6])
    assert y[0] == pytest.approx(math.log(0.5 / 10.5)) and cov[0, 0] == pytest.approx(1 / 0.5 + 1 / 10.5)


def test_fixed_effects_are_statsmodels_gls_at_the_fitted_between_site_covariance() -> None:
    # Given Psi, the coefficients are generalised least squares with V_i = Z Psi Z' + C_i (statsmodels GLS with
    # that block-diagonal sigma), C_i the binomial variances of the logit shares.
    fit = multiple_threshold_roc(BANDS)
    rho = fit.between_site_correlation or 0.0
    s1, s0 = math.sqrt(fit.between_site_variance_with), math.sqrt(fit.between_site_variance_without)
    psi = np.array([[s1 * s1, rho * s1 * s0], [rho * s1 * s0, s0 * s0]])
    rows, ys, blocks = [], [], []
    for bands in BANDS:
        inner = special.logit(np.array(bands.edges[1:-1])) - fit.centre
        design, random, values = [], [], []
        for klass, counts in ((1, bands.positives), (0, bands.negatives)):
            below = np.cumsum(counts)[:-1].astype(float)
            above = sum(counts) - below
            zero = (below == 0) | (above == 0)
            below, above = below + 0.5 * zero, above + 0.5 * zero
            values += list(np.log(below / above))
            variances = 1 / below + 1 / above
            for x in inner:
                design.append([klass, klass * x, 1 - klass, (1 - klass) * x])
                random.append([klass, 1 - klass])
            blocks.append(np.diag(variances))
        z = np.array(random, dtype=float)
        within = np.zeros((len(values), len(values)))
        half = len(values) // 2
        within[:half, :half], within[half:, half:] = blocks[-2], blocks[-1]
        rows.append((np.array(design, dtype=float), z @ psi @ z.T + within))
        ys.append(np.array(values))
    x = np.vstack([r[0] for r in rows])
    size = x.shape[0]
    sigma = np.zeros((size, size))
    start = 0
    for design, v in rows:
        end = start + design.shape[0]
        sigma[start:end, start:end] = v
        start = end
    reference = sm.GLS(np.concatenate(ys), x, sigma=sigma).fit()
    coefficients = [fit.coefficients[k] for k in ("intercept_with", "slope_with", "intercept_without", "slope_without")]
    assert coefficients == pytest.approx(list(reference.params), rel=1e-6)


def test_summary_auc_and_operating_points_on_breast_cancer_sites() -> None:
    outcome = np.concatenate([s.outcome for s in SITES])
    risk = np.concatenate([s.risk for s in SITES])
    fit = multiple_threshold_roc(BANDS)
    assert fit.threshold_scale == "logit" and len(fit.sites_pooled) == 5
    # scikit-learn's AUC of all records pooled (what no site can send): 0.965. The model's curve is parametric
    # (straight in logit-logit space) and extrapolates past the sites' points (here 0.943, 95% CI 0.904-0.967).
    everyone = roc_auc_score(outcome, risk)
    assert abs(fit.area_under_curve - everyone) < 0.03
    assert fit.area_under_curve_ci_low < everyone < fit.area_under_curve_ci_high
    assert fit.area_under_curve_ci_low < fit.area_under_curve < fit.area_under_curve_ci_high
    assert 0.0 < fit.observed_fpr_low < fit.observed_fpr_high < 1.0
    assert (
        "over false-positive rates 0 to 1" in fit.area_under_curve_described
        and f"{fit.observed_fpr_high:.2f}" in fit.area_under_curve_described
    )
    # Pooled per-site AUCs on the logit scale (the discrimination figure) agree with the summary curve's area.
    per_site = pool_auc([s.site_id for s in SITES], [s.auc for s in SITES], [s.auc_se for s in SITES])
    assert abs(per_site.estimate - fit.area_under_curve) < 0.05
    # At 0.5 (an edge of three sites) the summary operating point covers scikit-learn's sensitivity and
    # specificity of all records at that threshold.
    point = next(p for p in fit.operating_points if p.threshold == 0.5)
    sensitivity = float(np.mean(risk[outcome == 1] >= 0.5))
    specificity = float(np.mean(risk[outcome == 0] < 0.5))
    assert point.sensitivity_ci_low < sensitivity < point.sensitivity_ci_high
    assert point.specificity_ci_low < specificity < point.specificity_ci_high
    assert MultipleThresholdRoc.from_dict(json.loads(json.dumps(fit.to_dict(), allow_nan=False))) == fit


def test_a_withheld_band_keeps_the_edges_the_release_still_determines() -> None:
    # Site 0 withholds the counts of people with the condition in bands 0.5-0.7 and 0.7-0.9 but releases the
    # class total: the shares below 0.1, 0.3 and 0.5 (from below) and 0.9 (from the total) are still known.
    full = BANDS[0]
    positives = list(full.positives)
    positives[3] = positives[4] = None
    withheld = SiteBands(full.site_id, full.edges, tuple(positives), full.negatives, sum(full.positives), None)
    fit = multiple_threshold_roc([withheld, *BANDS[1:]])
    complete = multiple_threshold_roc(BANDS)
    assert fit.n_points == complete.n_points - 1
    assert abs(fit.area_under_curve - complete.area_under_curve) < 0.02
    alone = SiteBands("lonely", (-math.inf, 0.5, math.inf), (None, 12), (40, 11))
    fit = multiple_threshold_roc([alone, *BANDS[1:]])
    assert [e.site_id for e in fit.sites_not_pooled] == ["lonely"]


def test_too_few_sites_raise() -> None:
    with pytest.raises(PoolingError, match="at least 2 sites"):
        multiple_threshold_roc(BANDS[:1])


def test_a_single_shared_edge_is_not_estimable() -> None:
    # Every site merged its bands down to one cut at 0.5: one threshold cannot give a slope (nor a curve).
    sites = [_bands(s, (0.5,)) for s in SITES]
    with pytest.raises(PoolingError, match="single band edge"):
        multiple_threshold_roc(sites)
