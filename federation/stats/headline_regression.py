r"""Likelihood-ratio test of site covariates in the headline model: the censored bivariate binomial GLMM
(:mod:`federation.stats.headline`) fitted with and without them.

With site covariates :math:`x_i` (m columns; a category enters as indicator columns) the means become
:math:`\mathrm{logit}\,Se_i = \beta_{10} + x_i^\top\beta_{11} + u_{1i}` and
:math:`\mathrm{logit}\,FPR_i = \beta_{20} + x_i^\top\beta_{21} + u_{2i}`, with the same between-site covariance
and the same exact likelihood of what each site released (withheld cells censored under the rule that withheld
them). The statistic :math:`2(\ell_1 - \ell_0)` is referred to :math:`\chi^2` on 2m df (each column shifts
both logits; Wilks 1938). Unlike the Wald tests of the normal-approximation meta-regression
(:mod:`federation.stats.bivariate_regression`) it uses every site that has the covariate, withheld cells
included, and no within-site normal approximation.

References
----------
Wilks SS (1938). The large-sample distribution of the likelihood ratio for testing composite hypotheses. Ann
Math Stat 9:60–62. Chu H, Cole SR (2006). J Clin Epidemiol 59:1331–1332. van Houwelingen HC, Arends LR,
Stijnen T (2002). Stat Med 21:589–624.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, stats

from federation.stats.glmm import BOUNDS, glmm_evidence, glmm_fit, one_blas_thread
from federation.stats.headline import _MIN_SITES, _identifiability
from federation.stats.serial import PoolingError, ResultRecord
from federation.stats.tables import ReleasedTable

__all__ = ["CovariateLikelihoodRatio", "headline_covariate_test"]

_SLOPE_BOUND = 50.0  # per SD of the covariate, on the logit scale


@dataclass(frozen=True)
class CovariateLikelihoodRatio(ResultRecord):
    """The likelihood-ratio test of site covariates in the headline model.

    ``logit_sensitivity`` and ``logit_specificity`` hold, per covariate column, the change per unit of the
    covariate (against the reference category for an indicator) estimated by the model with the covariates.
    """

    method: str
    covariates: tuple[str, ...]
    statistic: float
    distribution: str
    df: int
    p: float
    log_likelihood_without: float
    log_likelihood_with: float
    logit_sensitivity: tuple[float, ...]
    logit_specificity: tuple[float, ...]
    n_sites: int
    sites_pooled: tuple[str, ...]
    censored_sites: tuple[str, ...]
    notes: tuple[str, ...] = ()


METHOD = (
    "likelihood-ratio test: the headline model (bivariate binomial GLMM, withheld cells censored under the rule "
    "that withheld them) with and without the covariate, over every site that has it; chi-squared on 2 df per "
    "covariate column"
)


def headline_covariate_test(
    tables: Sequence[ReleasedTable], covariates: ArrayLike, names: Sequence[str], points: int = 7
) -> CovariateLikelihoodRatio:
    r"""Likelihood-ratio test of site covariates in the headline model (see the module docstring).

    Parameters
    ----------
    tables : sequence of ReleasedTable
        The sites' released tables (withheld cells as ``None``, with their ranges and rules).
    covariates : array_like of shape (k,) or (k, m)
        One row per table, in the same order (an intercept is added; a category enters as indicator columns).
    names : sequence of str
        One name per covariate column.
    points : int, default 7
        Gauss–Hermite points per dimension.

    Returns
    -------
    CovariateLikelihoodRatio

    Raises
    ------
    PoolingError
        Fewer than ``max(4, m + 3)`` usable sites, a summary measure the headline could not estimate on these
        sites, covariates that are not finite, collinear, or the same at every site.

    Notes
    -----
    The model without the covariates is the headline fit to the same sites, its maximum refined by Newton steps;
    the model with them starts there (slopes 0), so its maximised likelihood is never below it. Covariates are
    centred and scaled for the fit; the coefficients are reported per unit of the covariate.
    """
    tables = list(tables)
    x = np.asarray(covariates, dtype=float)
    x = x.reshape(-1, 1) if x.ndim == 1 else x
    if x.ndim != 2 or x.shape[0] != len(tables):
        raise PoolingError("covariates must have one row per site")
    if len(names) != x.shape[1]:
        raise PoolingError(f"got {len(names)} names for {x.shape[1]} covariate columns")
    if not np.all(np.isfinite(x)):
        raise PoolingError("covariates must be finite for every site")
    evidence, excluded = glmm_evidence(tables, "censor", minimum=0)
    row = {t.site_id: i for i, t in enumerate(tables)}
    x = x[[row[ev.site_id] for ev in evidence]]
    k, m = x.shape
    needed = max(_MIN_SITES, m + 3)
    if k < needed:
        raise PoolingError(
            f"a likelihood-ratio test of {m} covariate column(s) in the headline model needs at least {needed} "
            f"usable sites, got {k}"
        )
    reasons = _identifiability(evidence)
    for measure in ("sensitivity", "specificity"):
        if measure in reasons:
            raise PoolingError(reasons[measure])
    scale = x.std(axis=0)
    if (
        np.any(scale <= 1e-12 * np.maximum(1.0, np.abs(x).max(axis=0)))
        or np.linalg.matrix_rank(np.column_stack([np.ones(k), x])) < m + 1
    ):
        raise PoolingError("the covariates are collinear, or one is the same at every site")
    z = (x - x.mean(axis=0)) / scale
    used = [t for t in tables if t.site_id in {ev.site_id for ev in evidence}]
    notes: list[str] = []
    with one_blas_thread():
        _, likelihood, theta0, nll0, free, _ = glmm_fit(evidence, used, excluded, points)
        polished, polished_nll, _ = likelihood.newton(theta0, free, tolerance=1e-12)
        if polished_nll < nll0:
            theta0, nll0 = polished, polished_nll
        quadrature = likelihood.quadrature
        design = np.column_stack([np.ones(quadrature.design.n_units), z[quadrature.design.unit_site]])
        p = m + 1
        variance = [i for i in free if i >= 2]

        def negative(params: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
            theta = theta0.copy()
            theta[variance] = params[2 * p :]
            value, gradient, (score1, score2) = quadrature.value_and_unit_scores(
                design @ params[:p], design @ params[p : 2 * p], theta
            )
            if not np.isfinite(value) or not np.all(np.isfinite(gradient)):
                return 1e300, np.zeros(params.size)
            return -value, -np.r_[design.T @ score1, design.T @ score2, gradient[variance]]

        start = np.r_[theta0[0], np.zeros(m), theta0[1], np.zeros(m), theta0[variance]]
        slopes = [(-_SLOPE_BOUND, _SLOPE_BOUND)] * m
        bounds = [BOUNDS[0], *slopes, BOUNDS[1], *slopes, *(BOUNDS[i] for i in variance)]
        found = optimize.minimize(
            negative,
            start,
            jac=True,
            method="L-BFGS-B",
            bounds=bounds,
            options={"ftol": 1e-13, "gtol": 1e-8, "maxiter": 2000},
        )
    if not found.success and float(np.max(np.abs(found.jac))) > 1e-3:
        notes.append("the likelihood maximiser with the covariates reported incomplete convergence")
    nll1 = min(float(found.fun), nll0)  # the model with the covariates contains the one without
    statistic = max(0.0, 2.0 * (nll0 - nll1))
    df = 2 * m
    slope_sensitivity = found.x[1:p] / scale
    slope_fpr = found.x[p + 1 : 2 * p] / scale
    return CovariateLikelihoodRatio(
        method=METHOD,
        covariates=tuple(names),
        statistic=statistic,
        distribution="chi-squared",
        df=df,
        p=float(stats.chi2.sf(statistic, df)),
        log_likelihood_without=-nll0,
        log_likelihood_with=-nll1,
        logit_sensitivity=tuple(float(v) for v in slope_sensitivity),
        logit_specificity=tuple(float(-v) for v in slope_fpr),
        n_sites=k,
        sites_pooled=tuple(ev.site_id for ev in evidence),
        censored_sites=tuple(ev.site_id for ev in evidence if ev.censored),
        notes=tuple(notes),
    )
