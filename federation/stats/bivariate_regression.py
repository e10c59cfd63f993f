r"""Bivariate meta-regression of sensitivity and specificity on site covariates.

The bivariate model of Reitsma et al. (2005) with site-level covariates :math:`x_i` (setting, prevalence,
age mix, ...) in the means of both logits:

.. math:: y_i = \begin{pmatrix}\mathrm{logit}\,Se_i\\ \mathrm{logit}\,FPR_i\end{pmatrix}
          \sim N_2\!\left(\begin{pmatrix}x_i^\top\beta_{Se}\\ x_i^\top\beta_{FPR}\end{pmatrix},\ S_i + \Psi\right),

:math:`S_i` the known within-site variances, :math:`\Psi` the residual between-site covariance (REML). A
covariate's coefficients say how logit sensitivity and logit specificity change per unit (or against the
reference category); its joint Wald test asks whether it changes either.

References
----------
Reitsma JB, Glas AS, Rutjes AWS, et al. (2005). J Clin Epidemiol 58:982–990. van Houwelingen HC, Arends LR,
Stijnen T (2002). Advanced methods in meta-analysis: multivariate approach and meta-regression. Stat Med
21:589–624. Jackson D, Riley R, White IR (2011). Multivariate meta-analysis: potential and promise. Stat Med
30:2481–2498 (the multivariate Q statistic).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError, ResultRecord

__all__ = ["BivariateRegression", "CovariateEffect", "bivariate_meta_regression"]

_ZERO_VARIANCE = 1e-10


@dataclass(frozen=True)
class CovariateEffect(ResultRecord):
    """One covariate column's coefficients on logit sensitivity and logit specificity, and its joint test."""

    name: str
    logit_sensitivity: float
    logit_sensitivity_se: float
    logit_sensitivity_ci_low: float
    logit_sensitivity_ci_high: float
    logit_specificity: float
    logit_specificity_se: float
    logit_specificity_ci_low: float
    logit_specificity_ci_high: float
    covariate_test: dict[str, float | int | str]


@dataclass(frozen=True)
class BivariateRegression(ResultRecord):
    """A fitted bivariate meta-regression.

    ``effects`` has one entry per covariate column (not the intercept); ``intercept`` gives the intercepts
    (the reference site: every covariate 0 or at its reference). ``residual_heterogeneity`` is the
    multivariate Q of the fixed-effects fit, ``{q, df, p}``.
    """

    method: str
    covariates: tuple[str, ...]
    intercept: dict[str, float]
    effects: tuple[CovariateEffect, ...]
    tau2_logit_sensitivity: float
    tau2_logit_fpr: float
    correlation: float | None
    residual_heterogeneity: dict[str, float | int]
    log_likelihood: float
    n_sites: int
    sites_pooled: tuple[str, ...]
    notes: tuple[str, ...] = ()
    level: float = 0.95


def _psi(theta: NDArray[np.float64]) -> NDArray[np.float64]:
    lower = np.array([[theta[0], 0.0], [theta[1], theta[2]]])
    return lower @ lower.T


def _designs(x: NDArray[np.float64]) -> NDArray[np.float64]:
    """Per site the 2 x 2p design: row 0 = (x_i, 0), row 1 = (0, x_i)."""
    k, p = x.shape
    out = np.zeros((k, 2, 2 * p))
    out[:, 0, :p] = x
    out[:, 1, p:] = x
    return out


def _gls(
    y: NDArray[np.float64], s: NDArray[np.float64], designs: NDArray[np.float64], psi: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64], float, float]:
    """(beta, Var(beta), sum log|V_i| + sum r'V^-1 r, log|X'V^-1X|) at Psi."""
    v = psi[None, :, :] + np.einsum("ij,jk->ijk", s, np.eye(2))
    inverse = np.linalg.inv(v)
    xtvx = np.einsum("iab,ibc,icd->ad", designs.transpose(0, 2, 1), inverse, designs)
    xtvy = np.einsum("iab,ibc,ic->a", designs.transpose(0, 2, 1), inverse, y)
    cov = np.linalg.inv(xtvx)
    beta = cov @ xtvy
    r = y - np.einsum("iab,b->ia", designs, beta)
    quadratic = float(np.einsum("ia,iab,ib->", r, inverse, r))
    logdet = float(np.sum(np.linalg.slogdet(v)[1]))
    return beta, cov, logdet + quadratic, float(np.linalg.slogdet(xtvx)[1])


def bivariate_meta_regression(
    estimates: ArrayLike,
    variances: ArrayLike,
    covariates: ArrayLike,
    names: Sequence[str],
    site_ids: Sequence[str] | None = None,
    method: Literal["REML", "ML"] = "REML",
    level: float = 0.95,
) -> BivariateRegression:
    r"""Bivariate random-effects meta-regression of (logit sensitivity, logit FPR) on site covariates.

    Parameters
    ----------
    estimates : array_like of shape (k, 2)
        Per site (logit sensitivity, logit false-positive rate).
    variances : array_like of shape (k, 2)
        Their within-site variances.
    covariates : array_like of shape (k,) or (k, m)
        Site covariates (an intercept column is added); a category enters as indicator columns.
    names : sequence of str
        One name per covariate column.
    site_ids : sequence of str, optional
    method : {"REML", "ML"}, default "REML"
    level : float, default 0.95

    Returns
    -------
    BivariateRegression

    Notes
    -----
    For given :math:`\Psi` the coefficients are generalised least squares,
    :math:`\hat\beta = (\sum X_i^\top W_i X_i)^{-1}\sum X_i^\top W_i y_i`, :math:`W_i = (S_i + \Psi)^{-1}`,
    :math:`\widehat{\mathrm{Var}}(\hat\beta) = (\sum X_i^\top W_i X_i)^{-1}`; :math:`\Psi` maximises the
    restricted likelihood over its Cholesky factor. Intervals and tests are Wald (normal; chi-squared on 2 df
    for a covariate's joint test of both coefficients). Coefficients on logit specificity are minus those on
    logit FPR. Residual heterogeneity: :math:`Q = \sum r_i^\top S_i^{-1} r_i` at the fixed-effects fit
    (:math:`\Psi = 0`), chi-squared on :math:`2k - 2p` df (Jackson et al. 2011).

    References
    ----------
    van Houwelingen, Arends & Stijnen (2002), Stat Med 21:589–624. Reitsma et al. (2005).
    """
    level = _check_level(level)
    y = np.asarray(estimates, dtype=float)
    s = np.asarray(variances, dtype=float)
    x = np.asarray(covariates, dtype=float)
    x = x.reshape(-1, 1) if x.ndim == 1 else x
    if y.ndim != 2 or y.shape[1] != 2 or s.shape != y.shape or x.shape[0] != y.shape[0]:
        raise PoolingError("estimates, variances (sites x 2) and covariates (sites x m) must describe the same sites")
    if len(names) != x.shape[1]:
        raise PoolingError(f"got {len(names)} names for {x.shape[1]} covariate columns")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(s)) and np.all(np.isfinite(x))) or np.any(s <= 0):
        raise PoolingError("estimates, covariates and positive variances must be finite for every site")
    k = y.shape[0]
    ids = tuple(site_ids) if site_ids is not None else tuple(f"site {i + 1}" for i in range(k))
    design = np.column_stack([np.ones(k), x])
    p = design.shape[1]
    if np.linalg.matrix_rank(design) < p:
        raise PoolingError("the covariates are collinear, or one is the same at every site")
    if 2 * k - 2 * p < 3:
        raise PoolingError(
            f"a bivariate meta-regression with {p - 1} covariate column(s) needs at least {p + 2} sites, got {k}"
        )
    designs = _designs(design)

    def objective(theta: NDArray[np.float64]) -> float:
        try:
            _, _, value, logdet_x = _gls(y, s, designs, _psi(theta))
        except np.linalg.LinAlgError:
            return 1e300
        total = 0.5 * (value + (logdet_x if method == "REML" else 0.0))
        return total if math.isfinite(total) else 1e300

    best = None
    spread = np.sqrt(np.maximum(np.var(y, axis=0), 0.05))
    # Further starts only when the first does not converge (each fit costs a few hundred likelihood evaluations).
    for start in (np.array([spread[0], 0.0, spread[1]]), np.array([0.3, -0.1, 0.3]), np.array([1.0, 0.5, 1.0])):
        found = optimize.minimize(objective, start, method="L-BFGS-B", options={"ftol": 1e-12, "gtol": 1e-8})
        if best is None or found.fun < best.fun:
            best = found
        if best.success:
            break
    assert best is not None
    psi = _psi(best.x)
    beta, cov, _, _ = _gls(y, s, designs, psi)
    notes = [] if best.success else ["the likelihood maximiser reported incomplete convergence"]
    z = float(stats.norm.isf((1 - level) / 2))
    se = np.sqrt(np.diag(cov))
    effects = []
    for j in range(1, p):
        b_se, b_fpr = beta[j], beta[p + j]
        s_se, s_fpr = se[j], se[p + j]
        pair = np.array([b_se, b_fpr])
        pair_cov = cov[np.ix_([j, p + j], [j, p + j])]
        statistic = float(pair @ np.linalg.solve(pair_cov, pair))
        effects.append(
            CovariateEffect(
                name=names[j - 1],
                logit_sensitivity=float(b_se),
                logit_sensitivity_se=float(s_se),
                logit_sensitivity_ci_low=float(b_se - z * s_se),
                logit_sensitivity_ci_high=float(b_se + z * s_se),
                logit_specificity=float(-b_fpr),
                logit_specificity_se=float(s_fpr),
                logit_specificity_ci_low=float(-b_fpr - z * s_fpr),
                logit_specificity_ci_high=float(-b_fpr + z * s_fpr),
                covariate_test={
                    "statistic": statistic,
                    "distribution": "chi-squared",
                    "df": 2,
                    "p": float(stats.chi2.sf(statistic, 2)),
                },
            )
        )
    fixed_beta, _, _, _ = _gls(y, s, designs, np.zeros((2, 2)))
    residual = y - np.einsum("iab,b->ia", designs, fixed_beta)
    q = float(np.sum(residual**2 / s))
    q_df = 2 * k - 2 * p
    sd = np.sqrt(np.clip(np.diag(psi), 0, None))
    rho = None if min(sd) ** 2 < _ZERO_VARIANCE else float(psi[0, 1] / (sd[0] * sd[1]))
    value = objective(best.x)
    return BivariateRegression(
        method=f"bivariate random-effects meta-regression (Reitsma 2005 with covariates), {method}, Wald tests",
        covariates=tuple(names),
        intercept={"logit_sensitivity": float(beta[0]), "logit_specificity": float(-beta[p])},
        effects=tuple(effects),
        tau2_logit_sensitivity=float(psi[0, 0]),
        tau2_logit_fpr=float(psi[1, 1]),
        correlation=rho,
        residual_heterogeneity={"q": q, "df": q_df, "p": float(stats.chi2.sf(q, q_df))},
        log_likelihood=float(-value - (k * 2 - (2 * p if method == "REML" else 0)) * 0.5 * math.log(2 * math.pi)),
        n_sites=k,
        sites_pooled=ids,
        notes=tuple(notes),
        level=level,
    )
