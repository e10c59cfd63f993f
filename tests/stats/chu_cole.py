"""An independent Chu & Cole (2006) marginal log-likelihood of the bivariate binomial GLMM, written from the
formula and not from the module under test, with an optional covariate in both means; the reference the
headline and its likelihood-ratio test are checked against. Data: the 14 AUDIT-C studies (Kriston et al.
2008, the AuditC data shipped with R's mada package)."""

from __future__ import annotations

import math

import numpy as np
from numpy.polynomial.hermite import hermgauss
from scipy import special, stats

from tests.stats.test_bivariate import AUDITC_FN, AUDITC_FP, AUDITC_TN, AUDITC_TP

CELLS = np.array([AUDITC_TP, AUDITC_FN, AUDITC_FP, AUDITC_TN], dtype=float).T


def chu_cole_log_likelihood(
    params: np.ndarray, x: np.ndarray | None = None, points: int = 24, cells: np.ndarray = CELLS
) -> float:
    """Marginal log-likelihood, study by study: a product Gauss-Hermite rule centred at the precision-weighted
    mean of the study's empirical logits (0.5 added) and its mean under the model, scaled by their combined
    precision (a normal approximation to the study's posterior; no mode search), log-sum-exp over the nodes."""
    slopes = params[5:] if x is not None else np.zeros(2)
    s1, s2, rho = math.exp(params[2]), math.exp(params[3]), math.tanh(params[4])
    psi = np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])
    inverse = np.linalg.inv(psi)
    log_norm = -math.log(2 * math.pi) - 0.5 * math.log(np.linalg.det(psi))
    nodes, weights = hermgauss(points)
    grid = np.array(np.meshgrid(nodes, nodes, indexing="ij")).reshape(2, -1)
    log_w = (np.log(weights)[:, None] + np.log(weights)[None, :]).ravel() + np.sum(grid**2, axis=0)
    total = 0.0
    for i, (tp, fn, fp, tn) in enumerate(cells):
        mu = params[:2] + slopes * (x[i] if x is not None else 0.0)
        observed = np.array([math.log((tp + 0.5) / (fn + 0.5)), math.log((fp + 0.5) / (tn + 0.5))])
        within = np.array([1 / (tp + 0.5) + 1 / (fn + 0.5), 1 / (fp + 0.5) + 1 / (tn + 0.5)])
        precision = 1 / within + 1 / np.diag(psi)
        centre = (observed / within + mu / np.diag(psi)) / precision
        scale = np.sqrt(1 / precision)
        eta = centre[:, None] + math.sqrt(2.0) * scale[:, None] * grid
        d = eta - mu[:, None]
        prior = log_norm - 0.5 * np.einsum("iq,ij,jq->q", d, inverse, d)
        ll = stats.binom.logpmf(tp, tp + fn, special.expit(eta[0])) + stats.binom.logpmf(
            fp, fp + tn, special.expit(eta[1])
        )
        total += math.log(2 * scale[0] * scale[1]) + special.logsumexp(log_w + ll + prior)
    return float(total)
