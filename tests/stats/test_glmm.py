"""Checks of the exact binomial GLMM: its quadrature against direct numerical integration (scipy), its fit
against the bivariate normal approximation on large counts, and its handling of suppressed sites."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import integrate, special, stats

from federation.stats import (
    BivariateFit,
    PoolingError,
    ReleasedTable,
    binomial_glmm,
    glmm_accuracy,
    marginal_log_likelihood,
    reitsma,
    site_evidence,
)
from tests.stats.test_bivariate import AUDITC

MEAN = np.array([2.0, -1.2])
PSI = np.array([[1.2, 0.5], [0.5, 0.4]])


def _direct(likelihood, mean: np.ndarray = MEAN, psi: np.ndarray = PSI) -> float:
    """log of the integral of likelihood(Se, FPR) * N2(u; 0, Psi) du, by Simpson's rule (scipy.integrate.simpson)
    on a fine grid over [-10, 10]^2, independent of the module's adaptive Gauss-Hermite quadrature."""
    u = np.linspace(-10.0, 10.0, 2001)
    u1, u2 = np.meshgrid(u, u, indexing="ij")
    inverse = np.linalg.inv(psi)
    quadratic = inverse[0, 0] * u1**2 + 2 * inverse[0, 1] * u1 * u2 + inverse[1, 1] * u2**2
    density = np.exp(-0.5 * quadratic) / (2 * math.pi * math.sqrt(np.linalg.det(psi)))
    values = likelihood(special.expit(mean[0] + u), special.expit(mean[1] + u))  # separable in (u1, u2)
    inner = integrate.simpson(values * density, x=u, axis=1)
    return math.log(integrate.simpson(inner, x=u))


def test_quadrature_matches_direct_integration_for_a_complete_site() -> None:
    # AuditC study 7 (TP 68 of 68, FP 112 of 535): the hardest shape, all positives detected.
    evidence = [site_evidence(ReleasedTable.complete("s", 68, 112, 0, 423))]
    direct = _direct(lambda se, fpr: np.outer(stats.binom.pmf(68, 68, se), stats.binom.pmf(112, 535, fpr)))
    assert marginal_log_likelihood(evidence, MEAN, PSI, points=21)[0] == pytest.approx(direct, abs=1e-9)
    # The default 7 x 7 grid is within 1e-4 on the log scale.
    assert marginal_log_likelihood(evidence, MEAN, PSI, points=7)[0] == pytest.approx(direct, abs=1e-4)


def test_quadrature_matches_direct_integration_for_a_suppressed_site() -> None:
    # Margins 30 and 90 released, TP/FN hidden and FP/TN hidden at k = 10: TP in 1..9 or 21..29 and FP in
    # 1..9 or 81..89 (tests/stats/test_suppression.py). The likelihood sums the binomial over those values.
    table = ReleasedTable("s", None, None, None, None, positives=30, negatives=90, analysed=120, min_cell_size=10)
    evidence = site_evidence(table)
    tps = np.r_[1:10, 21:30]
    fps = np.r_[1:10, 81:90]
    assert evidence.tp_values[0].tolist() == tps.tolist() and evidence.fp_values[0].tolist() == fps.tolist()
    direct = _direct(
        lambda se, fpr: np.outer(
            stats.binom.pmf(tps[:, None], 30, se).sum(axis=0), stats.binom.pmf(fps[:, None], 90, fpr).sum(axis=0)
        )
    )
    # The evidence also carries the constant weight 1/(N + 1) of the uniform split of N = 120 (no effect on fits).
    direct += math.log(evidence.weights[0])
    assert evidence.weights[0] == pytest.approx(1 / 121)
    assert marginal_log_likelihood([evidence], MEAN, PSI, points=21)[0] == pytest.approx(direct, abs=1e-7)


def test_glmm_approaches_the_normal_approximation_on_large_counts() -> None:
    # With thousands of participants per site the binomial likelihood is close to normal on the logit scale,
    # so the GLMM's ML estimates approach the bivariate normal ML fit (Hamza et al. 2008; Chu & Cole 2006).
    rng = np.random.default_rng(11)
    mean = np.array([1.4, -1.6])
    cov = np.array([[0.3, 0.1], [0.1, 0.25]])
    tables = []
    for i, theta in enumerate(rng.multivariate_normal(mean, cov, size=12)):
        n1, n0 = 20_000, 60_000
        tp = int(rng.binomial(n1, special.expit(theta[0])))
        fp = int(rng.binomial(n0, special.expit(theta[1])))
        tables.append(ReleasedTable.complete(f"s{i}", tp, fp, n1 - tp, n0 - fp))
    exact = glmm_accuracy(tables, interval="z")
    normal = reitsma(tables, method="ML")
    assert exact.mean_logit_sensitivity == pytest.approx(normal.mean_logit_sensitivity, abs=2e-3)
    assert exact.mean_logit_fpr == pytest.approx(normal.mean_logit_fpr, abs=2e-3)
    assert exact.tau2_logit_sensitivity == pytest.approx(normal.tau2_logit_sensitivity, rel=0.02)
    assert exact.tau2_logit_fpr == pytest.approx(normal.tau2_logit_fpr, rel=0.02)
    assert exact.correlation == pytest.approx(normal.correlation, abs=0.02)
    assert exact.se_logit_sensitivity == pytest.approx(normal.se_logit_sensitivity, rel=0.02)
    assert exact.se_logit_fpr == pytest.approx(normal.se_logit_fpr, rel=0.02)


def test_glmm_on_auditc_needs_no_continuity_correction() -> None:
    # Two AuditC studies have FN = 0; the GLMM uses the counts as they are (Chu & Cole 2006). It is a maximum of
    # the marginal likelihood: moving the means lowers it.
    fit = glmm_accuracy(AUDITC)
    assert fit.n_sites == 14 and fit.estimator == "ML-AGHQ" and not any("0.5" in n for n in fit.notes)
    evidence = [site_evidence(t) for t in AUDITC]
    mean = np.array([fit.mean_logit_sensitivity, fit.mean_logit_fpr])
    off = fit.correlation * math.sqrt(fit.tau2_logit_sensitivity * fit.tau2_logit_fpr)
    psi = np.array([[fit.tau2_logit_sensitivity, off], [off, fit.tau2_logit_fpr]])
    best = marginal_log_likelihood(evidence, mean, psi).sum()
    assert best == pytest.approx(fit.log_likelihood, abs=1e-6)
    for shift in ([0.05, 0], [-0.05, 0], [0, 0.05], [0, -0.05]):
        assert marginal_log_likelihood(evidence, mean + np.array(shift), psi).sum() < best
    # Intervals use t on k - 2 = 12 df (the SAS NLMIXED default), so they are wider than z intervals.
    half = (special.logit(fit.sensitivity.ci_high) - special.logit(fit.sensitivity.ci_low)) / 2
    assert half == pytest.approx(stats.t.ppf(0.975, 12) * fit.se_logit_sensitivity, rel=1e-9)


def test_suppression_aware_pooling_keeps_suppressed_sites() -> None:
    tables = [
        *AUDITC[:6],
        ReleasedTable("small-a", None, None, None, None, positives=30, negatives=90, analysed=120, min_cell_size=10),
        ReleasedTable("small-b", None, 40, None, 150, positives=25, negatives=190, analysed=215, min_cell_size=10),
    ]
    dropped = glmm_accuracy(tables, suppressed="drop")
    kept = glmm_accuracy(tables, suppressed="censor")
    assert dropped.n_sites == 6 and {e.site_id for e in dropped.sites_not_pooled} == {"small-a", "small-b"}
    assert kept.n_sites == 8 and not kept.sites_not_pooled
    assert "interval-censored" in kept.method


def test_censoring_changes_nothing_when_nothing_is_suppressed() -> None:
    a = glmm_accuracy(AUDITC[:8], suppressed="drop")
    b = glmm_accuracy(AUDITC[:8], suppressed="censor")
    assert a.mean_logit_sensitivity == b.mean_logit_sensitivity and a.tau2_logit_fpr == b.tau2_logit_fpr


def test_unusable_sites_are_listed_with_their_reason() -> None:
    tables = [
        *AUDITC[:4],
        ReleasedTable("no-policy", None, 30, None, 60, positives=50, negatives=90),
        ReleasedTable("unbounded", None, None, None, None, min_cell_size=10),
    ]
    fit = glmm_accuracy(tables)
    reasons = {e.site_id: e.reason for e in fit.sites_not_pooled}
    assert "states no minimum cell size" in reasons["no-policy"]
    assert "nothing bounds the table" in reasons["unbounded"]


def test_fewer_than_two_usable_sites_raise() -> None:
    with pytest.raises(PoolingError, match="at least 2 usable sites, got 1"):
        glmm_accuracy([AUDITC[0], ReleasedTable("x", None, None, None, None, min_cell_size=10)])
    with pytest.raises(PoolingError, match="at least 2 sites"):
        binomial_glmm([site_evidence(AUDITC[0])])


def test_result_round_trips_through_json() -> None:
    fit = glmm_accuracy(AUDITC[:5])
    assert fit.correlation_fixed is False
    assert BivariateFit.from_dict(json.loads(json.dumps(fit.to_dict(), allow_nan=False))) == fit
