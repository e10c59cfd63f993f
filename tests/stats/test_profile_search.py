"""The headline's profile-likelihood limits on a consortium whose sites withhold cells: each limit is where
the likelihood-ratio statistic, maximised over the other parameters by a separate optimiser (scipy's
L-BFGS-B, tight tolerances, started from the overall estimate), reaches the cut-off the interval names
(scipy.stats.t for the summary point, scipy.stats.chi2 with 1 df for the SDs and the correlation)."""

from __future__ import annotations

import math
import re

import numpy as np
import pytest
from scipy import special, stats

from federation.stats.glmm import BOUNDS, glmm_evidence, glmm_fit
from federation.stats.headline import headline_accuracy
from simulations.validate_stats import SCENARIOS, consortium


@pytest.fixture(scope="module")
def screening():
    # 20 invented screening sites through the site's disclosure rule; its between-site SD of logit sensitivity
    # is small and its profile flat, where a secant search once stepped past the limit to the SD's bound (20).
    tables = consortium(SCENARIOS[1], np.random.default_rng(303))
    assert sum(not t.is_complete for t in tables) >= 15
    evidence, excluded = glmm_evidence(tables, "censor", minimum=0)
    fit, likelihood, theta_hat, nll_hat, free, _ = glmm_fit(evidence, tables, excluded)
    return headline_accuracy(tables), likelihood, theta_hat, nll_hat, free


def _statistic(likelihood, theta_hat, nll_hat, free, index, value) -> float:
    held = [i for i in free if BOUNDS[i][0] + 1e-6 < theta_hat[i] < BOUNDS[i][1] - 1e-6 or i == index]
    start = theta_hat.copy()
    start[index] = value
    others = [i for i in held if i != index]
    _, nll, _ = likelihood.maximise(start, others, tolerance=1e-14, gtol=1e-7, maxiter=2000)
    return 2 * (nll - nll_hat)


def test_every_interior_limit_is_where_the_likelihood_ratio_reaches_its_cut_off(screening) -> None:
    fit, likelihood, theta_hat, nll_hat, free = screening
    df = int(re.search(r"t on (\d+) df", fit.sensitivity.method).group(1))
    mean_cut = stats.t.isf(0.025, df) ** 2
    variance_cut = stats.chi2.ppf(0.95, 1)
    checks = [
        (0, fit.sensitivity.ci_low, special.logit, mean_cut),
        (0, fit.sensitivity.ci_high, special.logit, mean_cut),
        (1, fit.specificity.ci_low, lambda p: special.logit(1 - p), mean_cut),
        (1, fit.specificity.ci_high, lambda p: special.logit(1 - p), mean_cut),
        (3, fit.tau_logit_fpr.ci_low, math.log, variance_cut),
        (3, fit.tau_logit_fpr.ci_high, math.log, variance_cut),
        (2, fit.tau_logit_sensitivity.ci_high, math.log, variance_cut),
    ]
    assert fit.tau_logit_sensitivity.ci_high < 5.0  # not the SD's bound
    for index, limit, scale, cut in checks:
        statistic = _statistic(likelihood, theta_hat, nll_hat, free, index, scale(limit))
        # the search stops within 0.5% of the signed root: about 1% of the statistic
        assert statistic == pytest.approx(cut, rel=0.015), (index, limit)
