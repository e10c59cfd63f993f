"""The GLMM's vectorised marginal likelihood (every site's quadrature at once, the censored sums' fixed parts
computed once, analytic gradient and Hessian) against a plain computation written here from the formula:
per site and per block of allowed tables, scipy.stats.binom.logpmf summed over the allowed TP and FP values,
integrated over the between-site distribution by a dense product Gauss-Hermite rule on the prior's scale
(numpy.polynomial.hermite.hermgauss, no adaptation, no shared code)."""

from __future__ import annotations

import dataclasses
import math

import numpy as np
import pytest
from numpy.polynomial.hermite import hermgauss
from scipy import special, stats

from federation.stats.glmm import glmm_evidence, marginal_log_likelihood
from federation.stats.glmm.quadrature import AdaptiveQuadrature, Design, between
from simulations.validate_stats import SCENARIOS, consortium


def _plain(evidence, mean, psi, points: int = 60) -> np.ndarray:
    """Each site's log of sum_b w_b sum_t Bin(t; n1b, Se) sum_f Bin(f; n0b, FPR) integrated over N2(0, psi)."""
    x, w = hermgauss(points)
    z = np.array(np.meshgrid(x, x, indexing="ij")).reshape(2, -1)
    u = math.sqrt(2.0) * np.linalg.cholesky(psi) @ z
    log_w = (np.log(w)[:, None] + np.log(w)[None, :]).ravel() - math.log(math.pi)
    se, fpr = special.expit(mean[0] + u[0]), special.expit(mean[1] + u[1])
    sites = []
    for ev in evidence:
        blocks = [
            math.log(ev.weights[b])
            + special.logsumexp(stats.binom.logpmf(ev.tp_values[b][:, None], ev.positives[b], se), axis=0)
            + special.logsumexp(stats.binom.logpmf(ev.fp_values[b][:, None], ev.negatives[b], fpr), axis=0)
            for b in range(ev.n_blocks)
        ]
        sites.append(special.logsumexp(special.logsumexp(np.array(blocks), axis=0) + log_w))
    return np.array(sites)


@pytest.fixture(scope="module")
def evidence():
    # 12 invented screening sites through the site's own disclosure rule: 11 of them withhold cells.
    tables = consortium(dataclasses.replace(SCENARIOS[1], sites=12), np.random.default_rng(1))
    found, _ = glmm_evidence(tables, "censor", minimum=0)
    assert sum(ev.censored for ev in found) >= 10 and sum(ev.n_blocks for ev in found) > 40
    return found


PARAMETERS = [
    np.array([1.4, -2.2, math.log(0.5), math.log(0.4), math.atanh(-0.3)]),
    np.array([1.0, -2.0, math.log(0.8), math.log(0.3), math.atanh(0.5)]),
    np.array([1.5, -2.3, math.log(0.2), math.log(0.3), 0.0]),
]


@pytest.mark.parametrize("theta", PARAMETERS)
def test_fast_path_matches_the_plain_computation(evidence, theta) -> None:
    psi = between(theta)
    plain = _plain(evidence, theta[:2], psi)
    assert _plain(evidence, theta[:2], psi, points=100).sum() == pytest.approx(plain.sum(), abs=1e-8)  # converged
    # With enough nodes the adaptive rule is the integral: 1e-6 on the total log-likelihood.
    assert marginal_log_likelihood(evidence, theta[:2], psi, points=24).sum() == pytest.approx(plain.sum(), abs=1e-6)
    # The default 7 x 7 rule (what the fits use) is within 1e-3 of it, each site within 5e-4.
    default = marginal_log_likelihood(evidence, theta[:2], psi, points=7)
    assert default.sum() == pytest.approx(plain.sum(), abs=1e-3)
    assert np.max(np.abs(default - plain)) < 5e-4


def test_gradient_and_hessian_are_the_plain_likelihoods_derivatives(evidence) -> None:
    theta = PARAMETERS[0]
    quadrature = AdaptiveQuadrature(Design(evidence), 24)
    value, gradient, hessian = quadrature.value_gradient_hessian(theta)
    assert value == pytest.approx(_plain(evidence, theta[:2], between(theta)).sum(), abs=1e-6)
    h = 1e-4
    for i in range(5):
        e = np.zeros(5)
        e[i] = h
        up = _plain(evidence, (theta + e)[:2], between(theta + e)).sum()
        down = _plain(evidence, (theta - e)[:2], between(theta - e)).sum()
        assert gradient[i] == pytest.approx((up - down) / (2 * h), abs=1e-5)
        # the Hessian's row: central differences of the (plain-checked) gradient
        row = (quadrature.value_and_gradient(theta + e)[1] - quadrature.value_and_gradient(theta - e)[1]) / (2 * h)
        assert hessian[i] == pytest.approx(row, abs=1e-3 * max(1.0, float(np.max(np.abs(row)))))
