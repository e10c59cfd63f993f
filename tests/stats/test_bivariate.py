"""Checks of federation.stats.bivariate against mada's published reitsma() fit, metafor-checked univariate REML
and the defining geometry of the SROC curve and regions."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import special, stats

from federation.protocol.words import withheld_cells
from federation.stats import (
    BivariateFit,
    PoolingError,
    ReleasedTable,
    bivariate_random_effects,
    hsroc_parameters,
    random_effects,
    reitsma,
    sroc_auc_grid,
)

# AuditC (R package mada, data(AuditC); Doebler 2020): 14 studies of a three-item alcohol screening
# questionnaire. Counts as listed, in mada's row order, by a public test file that checks a re-implementation
# against mada::reitsma(method = "ml"); the first four rows also appear in a second public script that quotes
# mada's AuditC. Their ML estimates reproduce below to 8 digits, which is the check on the transcription.
AUDITC_TP = [47, 126, 19, 36, 130, 84, 68, 752, 59, 142, 137, 57, 34, 152]
AUDITC_FN = [9, 51, 10, 3, 19, 2, 0, 0, 5, 50, 24, 3, 1, 51]
AUDITC_FP = [101, 272, 12, 78, 211, 68, 112, 3226, 55, 571, 107, 103, 21, 88]
AUDITC_TN = [738, 1543, 192, 276, 959, 89, 423, 2977, 136, 2788, 358, 437, 56, 264]
AUDITC = [
    ReleasedTable.complete(f"study-{i + 1:02d}", tp, fp, fn, tn)
    for i, (tp, fp, fn, tn) in enumerate(zip(AUDITC_TP, AUDITC_FP, AUDITC_FN, AUDITC_TN, strict=True))
]
HALF_3DP, HALF_4DP = 0.5e-3 + 1e-12, 0.5e-4 + 1e-12


@pytest.fixture(scope="module")
def auditc_reml() -> BivariateFit:
    # mada adds 0.5 to every cell of every study when any cell is 0 (correction.control = "all").
    return reitsma(AUDITC, correction_scope="all")


def test_reml_matches_mada_reitsma_auditc(auditc_reml: BivariateFit) -> None:
    # mada reitsma(AuditC) summary (values quoted in issue 5 from mada's documentation): tsens 2.0997 (SE 0.338),
    # tfpr -1.2637 (SE 0.174), sensitivity 0.891 (0.808-0.941), false-positive rate -> specificity 0.780
    # (0.715-0.833), between-study correlation 0.854.
    fit = auditc_reml
    assert abs(fit.mean_logit_sensitivity - 2.0997) <= HALF_4DP
    assert abs(fit.se_logit_sensitivity - 0.338) <= HALF_3DP
    assert abs(fit.mean_logit_fpr - -1.2637) <= HALF_4DP
    assert abs(fit.se_logit_fpr - 0.174) <= HALF_3DP
    assert abs(fit.sensitivity.estimate - 0.891) <= HALF_3DP
    assert abs(fit.sensitivity.ci_low - 0.808) <= HALF_3DP
    assert abs(fit.sensitivity.ci_high - 0.941) <= HALF_3DP
    assert abs(fit.specificity.estimate - 0.780) <= HALF_3DP
    assert abs(fit.specificity.ci_low - 0.715) <= HALF_3DP
    assert abs(fit.specificity.ci_high - 0.833) <= HALF_3DP
    assert abs(fit.correlation - 0.854) <= HALF_3DP
    assert fit.n_sites == 14 and not fit.sites_not_pooled


def test_sroc_auc_matches_mada_grid_rule(auditc_reml: BivariateFit) -> None:
    # mada AUC(reitsma(AuditC)) prints AUC 0.887 (issue 5): mada's AUC.default on FPR = 1:99/100.
    assert auditc_reml.sroc is not None
    assert abs(sroc_auc_grid(auditc_reml.sroc.sensitivity) - 0.887) <= HALF_3DP
    # The grid rule is a trapezoid sum divided by the number of points; the integral over (0, 1) differs a little.
    assert auditc_reml.sroc.area_under_curve == pytest.approx(0.8879, abs=1e-4)
    s = np.array(auditc_reml.sroc.sensitivity)
    assert sroc_auc_grid(s) == pytest.approx((s[0] / 2 + s[1:-1].sum() + s[-1] / 2) / 99, rel=1e-15)


def test_ml_matches_mada_reitsma_ml_auditc() -> None:
    # mada reitsma(AuditC, method = "ml") as quoted by the public test file above: mu = (2.07625908,
    # -1.26244709), Psi = [[1.22384177, 0.58323292], [., 0.37488242]], vcov(mu) = [0.1023137907, 0.0418040658,
    # 0.0280711745]; the 95% confidence region's box FPR [0.1580839996, 0.2989420350], Se [0.7847068954,
    # 0.9457926820]; prediction region box (Psi + vcov; mada 0.5.12) FPR [0.0564527122, 0.5723263518],
    # Se [0.3224495182, 0.9925720938].
    fit = reitsma(AUDITC, correction_scope="all", method="ML")
    assert fit.mean_logit_sensitivity == pytest.approx(2.07625908, abs=1e-7)
    assert fit.mean_logit_fpr == pytest.approx(-1.26244709, abs=1e-7)
    cov = fit.correlation * math.sqrt(fit.tau2_logit_sensitivity * fit.tau2_logit_fpr)
    assert (fit.tau2_logit_sensitivity, cov, fit.tau2_logit_fpr) == pytest.approx(
        (1.22384177, 0.58323292, 0.37488242), abs=1e-6
    )
    assert (fit.se_logit_sensitivity**2, fit.covariance_of_means, fit.se_logit_fpr**2) == pytest.approx(
        (0.1023137907, 0.0418040658, 0.0280711745), abs=1e-7
    )
    # The box of an ellipse mu + r C^(1/2) (cos t, sin t) is mu_j +/- r sqrt(C_jj), r^2 = chi2_2(0.95).
    r = math.sqrt(stats.chi2.ppf(0.95, 2))
    mu = np.array([fit.mean_logit_sensitivity, fit.mean_logit_fpr])
    conf = np.array([fit.se_logit_sensitivity, fit.se_logit_fpr])
    pred = np.sqrt(np.array([fit.tau2_logit_sensitivity, fit.tau2_logit_fpr]) + conf**2)
    assert special.expit(mu[1] + np.array([-1, 1]) * r * conf[1]) == pytest.approx(
        [0.1580839996, 0.2989420350], abs=1e-7
    )
    assert special.expit(mu[0] + np.array([-1, 1]) * r * conf[0]) == pytest.approx(
        [0.7847068954, 0.9457926820], abs=1e-7
    )
    assert special.expit(mu[1] + np.array([-1, 1]) * r * pred[1]) == pytest.approx(
        [0.0564527122, 0.5723263518], abs=1e-7
    )
    assert special.expit(mu[0] + np.array([-1, 1]) * r * pred[0]) == pytest.approx(
        [0.3224495182, 0.9925720938], abs=1e-7
    )


def test_regions_lie_on_their_ellipses(auditc_reml: BivariateFit) -> None:
    # mada's ROCellipse / plot(predict = TRUE): ellipse(Sigma, centre = mu, level) with radius^2 = chi2_2(level),
    # Sigma = vcov(mu) for the confidence region and Psi + vcov(mu) for the prediction region.
    fit = auditc_reml
    mu = np.array([fit.mean_logit_sensitivity, fit.mean_logit_fpr])
    vcov = np.array(
        [[fit.se_logit_sensitivity**2, fit.covariance_of_means], [fit.covariance_of_means, fit.se_logit_fpr**2]]
    )
    psi_off = fit.correlation * math.sqrt(fit.tau2_logit_sensitivity * fit.tau2_logit_fpr)
    psi = np.array([[fit.tau2_logit_sensitivity, psi_off], [psi_off, fit.tau2_logit_fpr]])
    for region, sigma in ((fit.confidence_region, vcov), (fit.prediction_region, psi + vcov)):
        points = np.column_stack([special.logit(region.sensitivity), special.logit(region.false_positive_rate)]) - mu
        distance = np.einsum("ni,ij,nj->n", points, np.linalg.inv(sigma), points)
        assert distance == pytest.approx(stats.chi2.ppf(0.95, 2), rel=1e-8)


def test_sroc_passes_through_the_summary_point(auditc_reml: BivariateFit) -> None:
    # Harbord et al. (2007): logit Se = Lambda e^(-beta/2) + e^(-beta) logit FPR, and at logit FPR = mu_FPR this
    # gives mu_Se (the line through the summary point with slope sigma_Se / sigma_FPR).
    fit = auditc_reml
    h = fit.hsroc
    assert h is not None
    at_mean = h.accuracy_lambda * math.exp(-h.shape_beta / 2) + math.exp(-h.shape_beta) * fit.mean_logit_fpr
    assert at_mean == pytest.approx(fit.mean_logit_sensitivity, rel=1e-12)
    slope = math.exp(-h.shape_beta)
    assert slope == pytest.approx(math.sqrt(fit.tau2_logit_sensitivity / fit.tau2_logit_fpr), rel=1e-12)


def test_hsroc_undefined_without_heterogeneity() -> None:
    # With a between-study variance of 0 the shape beta = log(sigma_FPR / sigma_Se) is undefined.
    assert hsroc_parameters([1.0, -1.0], [[0.0, 0.0], [0.0, 0.3]]) is None


def test_correlation_fixed_at_zero_equals_two_univariate_reml_fits() -> None:
    # With diagonal within-study covariances and rho = 0 the bivariate restricted likelihood separates into two
    # univariate ones (Reitsma et al. 2005), whose REML fits match metafor (tests/stats/test_univariate.py).
    fit = reitsma(AUDITC, correction_scope="all", correlation=0.0)
    counts = np.array([t.cells for t in AUDITC], dtype=float) + 0.5
    tp, fp, fn, tn = counts.T
    sens = random_effects(np.log(tp / fn), 1 / tp + 1 / fn, method="REML")
    fpr = random_effects(np.log(fp / tn), 1 / fp + 1 / tn, method="REML")
    assert fit.correlation_fixed
    assert fit.mean_logit_sensitivity == pytest.approx(sens.estimate, abs=1e-7)
    assert fit.mean_logit_fpr == pytest.approx(fpr.estimate, abs=1e-7)
    assert fit.tau2_logit_sensitivity == pytest.approx(sens.tau2, abs=1e-7)
    assert fit.tau2_logit_fpr == pytest.approx(fpr.tau2, abs=1e-7)
    assert fit.se_logit_sensitivity == pytest.approx(sens.se, abs=1e-7)
    assert fit.se_logit_fpr == pytest.approx(fpr.se, abs=1e-7)
    assert fit.covariance_of_means == pytest.approx(0.0, abs=1e-12)


def test_reml_is_a_maximum_of_the_restricted_likelihood(auditc_reml: BivariateFit) -> None:
    # Written out independently: -1/2 {sum log|S_i + Psi| + log|sum W_i| + sum r_i' W_i r_i} (Jackson et al. 2011).
    counts = np.array([t.cells for t in AUDITC], dtype=float) + 0.5
    tp, fp, fn, tn = counts.T
    y = np.column_stack([np.log(tp / fn), np.log(fp / tn)])
    s = np.column_stack([1 / tp + 1 / fn, 1 / fp + 1 / tn])

    def restricted(psi: np.ndarray) -> float:
        v = np.array([np.diag(si) + psi for si in s])
        w = np.linalg.inv(v)
        m = w.sum(axis=0)
        mu = np.linalg.solve(m, np.einsum("kij,kj->i", w, y))
        r = y - mu
        return -0.5 * (np.linalg.slogdet(v)[1].sum() + np.linalg.slogdet(m)[1] + np.einsum("ki,kij,kj->", r, w, r))

    fit = auditc_reml
    off = fit.correlation * math.sqrt(fit.tau2_logit_sensitivity * fit.tau2_logit_fpr)
    best = np.array([[fit.tau2_logit_sensitivity, off], [off, fit.tau2_logit_fpr]])
    top = restricted(best)
    rng = np.random.default_rng(0)
    for _ in range(50):
        e = rng.normal(scale=0.02, size=3)
        perturbed = best + np.array([[e[0], e[1]], [e[1], e[2]]])
        if np.all(np.linalg.eigvalsh(perturbed) > 0):
            assert restricted(perturbed) < top


def test_few_sites_fall_back_to_zero_correlation() -> None:
    fit = reitsma(AUDITC[:3])
    assert fit.correlation_fixed and any("fixed at 0 (fallback)" in n for n in fit.notes)


def test_result_round_trips_through_json(auditc_reml: BivariateFit) -> None:
    text = json.dumps(auditc_reml.to_dict(), allow_nan=False)
    assert BivariateFit.from_dict(json.loads(text)) == auditc_reml
    assert "sensitivity  0.891" in auditc_reml.summary()


def test_suppressed_and_empty_sites_are_listed_not_pooled() -> None:
    tables = [
        *AUDITC[:5],
        ReleasedTable("suppressed-site", None, None, None, None, min_cell_size=10),
        ReleasedTable.complete("no-condition", 0, 5, 0, 40),
    ]
    fit = reitsma(tables)
    reasons = {e.site_id: e.reason for e in fit.sites_not_pooled}
    assert reasons == {
        "suppressed-site": withheld_cells(("tp", "fp", "fn", "tn")),
        "no-condition": "no participants with the condition",
    }
    assert fit.n_sites == 5


@pytest.mark.parametrize(
    ("estimates", "variances", "message"),
    [
        ([[1.0, -1.0]], [[0.1, 0.1]], "at least 2 sites"),
        ([[1.0, -1.0], [math.nan, -1.0]], [[0.1, 0.1], [0.1, 0.1]], "estimates must be finite"),
        ([[1.0, -1.0], [1.0, -1.0]], [[0.1, 0.1], [0.0, 0.1]], "variances must be positive"),
        ([[1.0, -1.0], [1.0, -1.0]], [[0.1, 0.1], [math.inf, 0.1]], "variances must be finite"),
    ],
)
def test_bad_input_raises_a_clear_error(estimates: list, variances: list, message: str) -> None:
    with pytest.raises(PoolingError, match=message):
        bivariate_random_effects(estimates, variances)


def test_too_few_complete_tables_raise() -> None:
    tables = [AUDITC[0], ReleasedTable("s", None, None, None, None, min_cell_size=10)]
    with pytest.raises(PoolingError, match="at least 2 sites with complete tables, got 1"):
        reitsma(tables)
