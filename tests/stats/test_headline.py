"""The headline model: the bivariate binomial GLMM with profile-likelihood intervals, checked against an
independent implementation written here (plain Gauss-Hermite quadrature from numpy.polynomial.hermite and
scipy.optimize, no adaptive step, no shared code), and its "not estimable" answers."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from scipy import optimize, special, stats

from federation.analysis import analyze_tables
from federation.report.inputs import ReportInputs
from federation.report.methods import methods_text
from federation.stats import ReleasedTable
from federation.stats.headline import headline_accuracy
from tests.stats.chu_cole import chu_cole_log_likelihood
from tests.stats.test_analysis_pooling import _complete, _site_table
from tests.stats.test_bivariate import AUDITC, AUDITC_FN, AUDITC_FP, AUDITC_TN, AUDITC_TP

# AUDIT-C: 14 published studies (Kriston et al. 2008, the AuditC data shipped with R's mada package).
TABLES = np.array([AUDITC_TP, AUDITC_FN, AUDITC_FP, AUDITC_TN], dtype=float).T


def _independent_log_likelihood(theta: np.ndarray, points: int = 30) -> float:
    """Chu & Cole (2006) marginal log-likelihood, written from the formula and not from the module: per study,
    a product Gauss-Hermite rule (numpy.polynomial.hermite.hermgauss) centred at the precision-weighted mean
    of the study's empirical logits (0.5 added) and the summary mean, scaled by the combined precision (a
    normal approximation to the study's posterior; no mode search), log-sum-exp over the nodes."""
    return chu_cole_log_likelihood(theta, None, points, TABLES)


@pytest.fixture(scope="module")
def headline():
    return headline_accuracy(AUDITC)


@pytest.fixture(scope="module")
def independent():
    return optimize.minimize(
        lambda t: -_independent_log_likelihood(t),
        np.array([2.0, -1.2, 0.0, -0.5, 0.5]),
        method="BFGS",
        options={"gtol": 1e-6},
    )


def test_estimates_match_an_independent_implementation(headline, independent) -> None:
    theta = independent.x
    assert headline.sensitivity.estimate == pytest.approx(special.expit(theta[0]), abs=1e-3)
    assert headline.specificity.estimate == pytest.approx(1 - special.expit(theta[1]), abs=1e-3)
    assert headline.tau_logit_sensitivity.estimate == pytest.approx(math.exp(theta[2]), abs=5e-3)
    assert headline.tau_logit_fpr.estimate == pytest.approx(math.exp(theta[3]), abs=5e-3)
    assert headline.correlation.estimate == pytest.approx(math.tanh(theta[4]), abs=1e-2)


def test_profile_limits_sit_where_an_independent_likelihood_ratio_says(headline, independent) -> None:
    # At each limit of the summary sensitivity, maximise the independent likelihood over the other four
    # parameters: the likelihood-ratio statistic there must equal the t(k-2) quantile squared (k = 14).
    best = -independent.fun
    target = stats.t.isf(0.025, 12) ** 2
    for limit in (headline.sensitivity.ci_low, headline.sensitivity.ci_high):
        fixed = special.logit(limit)
        inner = optimize.minimize(
            lambda t, fixed=fixed: -_independent_log_likelihood(np.r_[fixed, t]),
            independent.x[1:],
            method="BFGS",
            options={"gtol": 1e-6},
        )
        assert 2 * (best + inner.fun) == pytest.approx(target, abs=0.1)
    # and the interval is not the Wald one (the likelihood is skewed on the logit scale for sensitivity)
    assert headline.sensitivity.method.startswith("profile likelihood")


def test_intervals_and_prediction_intervals_nest(headline) -> None:
    for name in ("sensitivity", "specificity"):
        interval, prediction = getattr(headline, name), getattr(headline, f"{name}_prediction")
        assert prediction.ci_low < interval.ci_low < interval.estimate < interval.ci_high < prediction.ci_high
    assert headline.tau_logit_sensitivity.ci_low < headline.tau_logit_sensitivity.estimate
    assert -1 <= headline.correlation.ci_low < headline.correlation.estimate < headline.correlation.ci_high <= 1
    json.dumps(headline.to_dict(), allow_nan=False)


def _hidden_positive_pair(site: str, n1: int, fp: int, tn: int) -> ReleasedTable:
    """TP and FN withheld, their total released: the site's likelihood is the same at Se and 1 - Se."""
    return ReleasedTable(
        site, None, fp, None, tn, positives=n1, negatives=fp + tn, analysed=n1 + fp + tn, min_cell_size=10
    )


def test_a_likelihood_symmetric_in_sensitivity_is_not_estimable() -> None:
    tables = [_hidden_positive_pair(f"s{i}", 40 + i, 20 + i, 150 + 3 * i) for i in range(6)]
    fit = headline_accuracy(tables)
    assert fit.sensitivity is None and fit.not_estimable["sensitivity"].startswith("not estimable: at every site TP")
    assert fit.specificity is not None and 0.85 < fit.specificity.estimate < 0.89


def test_every_cell_withheld_everywhere_gives_no_number_at_all() -> None:
    tables = [
        ReleasedTable(f"s{i}", None, None, None, None, positives=40 + i, negatives=170 + i, min_cell_size=10)
        for i in range(6)
    ]
    result = analyze_tables("study", [_site_table(t) for t in tables])
    pooled = result["pooled"]
    assert pooled["sensitivity"] is None and pooled["specificity"] is None
    assert pooled["note"].startswith("not estimable: ")
    text = json.dumps(result)
    assert "nan" not in text.lower() and "Traceback" not in text


def test_every_site_without_false_negatives_is_a_boundary() -> None:
    tables = [ReleasedTable.complete(f"s{i}", 20 + i, 10 + i, 0, 100 + i) for i in range(6)]
    fit = headline_accuracy(tables)
    assert fit.sensitivity is None
    assert fit.not_estimable["sensitivity"] == (
        "not estimable: FN = 0 at every site, so the estimate lies on the boundary"
    )
    assert fit.specificity is not None


def test_three_sites_are_too_few() -> None:
    fit = headline_accuracy(AUDITC[:3])
    assert not fit.estimable
    assert fit.not_estimable["sensitivity"] == (
        "not estimable: 3 usable site(s); the bivariate random-effects model needs at least 4"
    )


def test_identical_sites_have_no_correlation() -> None:
    tables = [ReleasedTable.complete(f"s{i}", 40, 30, 10, 120) for i in range(5)]
    fit = headline_accuracy(tables)
    assert fit.sensitivity.estimate == pytest.approx(0.8, abs=1e-4)  # 200/250 pooled, as a fixed effect
    assert fit.tau_logit_sensitivity.estimate == 0.0 and fit.tau_logit_sensitivity.ci_low == 0.0
    assert fit.correlation is None
    assert fit.not_estimable["correlation"] == "not estimable: a between-site SD is estimated as 0"


def test_an_internal_failure_reads_as_not_estimable() -> None:
    from federation.analysis import _attempt

    def broken() -> None:
        raise ValueError("Interval.ci_low is nan; an undefined quantity must be None")

    assert _attempt(broken) == {
        "status": "not estimated",
        "reason": "not estimable: the model could not be fitted to these data",
    }


def test_the_report_methods_name_the_interval_reference_and_why() -> None:
    # AUDIT-C (14 studies, Kriston et al. 2008): k - 2 = 12 degrees of freedom for the summary point's limits.
    analysis = analyze_tables("study", [_complete(t) for t in AUDITC])
    assert analysis["pooled"]["sensitivity"]["method"].endswith("referred to t on 12 df")
    inputs = ReportInputs("study.db", "study", analysis, (), (), (), None, ())
    text = " ".join(methods_text(inputs)[0].split())
    assert "referred to t on k − 2 degrees of freedom rather than the normal distribution" in text
    assert "fewer than 93% of consortia of 8 to 15 sites" in text


def test_sites_without_false_negatives_beside_withheld_ones_are_no_boundary() -> None:
    # Three sites released FN = 0; three withheld TP and FN (FN in 1..9, TP its complement) with only their
    # total released and no rule named (an older release). Those three allow TP in 1..9 or 21..29 of 30
    # (worked by hand from the rule: one of the pair in 1..9, neither 0 nor 30 since zeros are shown), so
    # their likelihood vanishes at sensitivity 1: the estimate is inside (0, 1), not on the boundary.
    tables = [ReleasedTable.complete(f"c{i}", 20 + i, 10 + i, 0, 100 + i) for i in range(3)]
    tables += [_hidden_positive_pair(f"h{i}", 30, 12 + i, 120 + i) for i in range(3)]
    fit = headline_accuracy(tables)
    assert "sensitivity" not in fit.not_estimable
    assert fit.sensitivity is not None and 0.7 < fit.sensitivity.estimate < 0.99
    assert fit.sensitivity.ci_low < fit.sensitivity.estimate < fit.sensitivity.ci_high < 1.0
