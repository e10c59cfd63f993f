r"""Bivariate random-effects meta-analysis of sensitivity and specificity, and what follows from it.

Scale: every site contributes the pair (logit sensitivity, logit false-positive rate), as in the R
package mada and in Harbord et al. (2007); specificity is reported as 1 − FPR, and the correlation of
logit sensitivity with logit *specificity* is minus the reported correlation. The model is

.. math:: y_i \sim N_2(\mu, S_i + \Psi),

with :math:`S_i` the known within-site variances (diagonal) and :math:`\Psi` the between-site
covariance matrix. From :math:`(\hat\mu, \widehat{\mathrm{Var}}(\hat\mu), \hat\Psi)` come the HSROC
parameters and SROC curve, the summary point with its confidence region, the prediction region and the
SROC AUC. The same geometry serves the exact binomial model of :mod:`federation.stats.glmm`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import integrate, optimize, special, stats

from federation.protocol.words import withheld_cells
from federation.stats.proportions import _check_level
from federation.stats.results import Interval
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion
from federation.stats.tables import ReleasedTable
from federation.stats.univariate import random_effects

__all__ = [
    "BivariateFit",
    "HSROCParameters",
    "Region",
    "SROCCurve",
    "bivariate_random_effects",
    "hsroc_parameters",
    "reitsma",
    "sroc_auc_grid",
    "summarise_bivariate",
]

SROC_GRID = tuple(i / 100 for i in range(1, 100))  # mada's default grid of false-positive rates
_REGION_POINTS = 100
_ZERO_VARIANCE = 1e-10  # a between-site variance below this is reported as 0 (no correlation defined)
_MIN_SITES_FOR_CORRELATION = 4  # below this the correlation is fixed at 0 (Takwoingi et al. 2017)


@dataclass(frozen=True)
class HSROCParameters(ResultRecord):
    """Hierarchical SROC parameters equivalent to a bivariate fit without covariates.

    Attributes
    ----------
    threshold_theta : float
        Mean positivity threshold :math:`\\Theta`.
    accuracy_lambda : float
        Mean accuracy :math:`\\Lambda` (log diagnostic odds ratio at the symmetric point).
    shape_beta : float
        Shape (asymmetry) :math:`\\beta = \\log(\\sigma_{FPR}/\\sigma_{Se})`.
    var_threshold : float
        Between-site variance of the threshold, :math:`\\sigma^2_\\theta`.
    var_accuracy : float
        Between-site variance of accuracy, :math:`\\sigma^2_\\alpha`.
    """

    threshold_theta: float
    accuracy_lambda: float
    shape_beta: float
    var_threshold: float
    var_accuracy: float


@dataclass(frozen=True)
class SROCCurve(ResultRecord):
    """The HSROC summary ROC curve on a grid of false-positive rates, and its area.

    ``area_under_curve`` is the area under the whole curve, over false-positive rates from 0 to 1,
    integrated numerically (:func:`sroc_auc_grid` gives the coarser grid sum some published tables use).
    """

    false_positive_rate: tuple[float, ...]
    sensitivity: tuple[float, ...]
    area_under_curve: float


@dataclass(frozen=True)
class Region(ResultRecord):
    """An ellipse on the (logit FPR, logit sensitivity) scale, back-transformed, as a closed polygon."""

    kind: str
    level: float
    false_positive_rate: tuple[float, ...]
    sensitivity: tuple[float, ...]


@dataclass(frozen=True)
class BivariateFit(ResultRecord):
    """A fitted bivariate model of (logit sensitivity, logit false-positive rate) across sites.

    Attributes
    ----------
    method : str
        What was fitted, in words (model, estimator, integration).
    estimator : str
        ``"REML"``, ``"ML"`` (normal approximation) or ``"ML-AGHQ"`` (exact binomial GLMM).
    mean_logit_sensitivity, mean_logit_fpr : float
        :math:`\\hat\\mu`.
    se_logit_sensitivity, se_logit_fpr, covariance_of_means : float
        From :math:`\\widehat{\\mathrm{Var}}(\\hat\\mu)`.
    tau2_logit_sensitivity, tau2_logit_fpr : float
        Diagonal of :math:`\\hat\\Psi`.
    correlation : float or None
        Between-site correlation of logit sensitivity and logit FPR; ``None`` when a variance is 0.
    correlation_fixed : bool
        True when the correlation was not estimated but fixed (the value then is the fixed one).
    log_likelihood : float
        Maximised (restricted) log-likelihood.
    sensitivity, specificity : Interval
        Summary point with Wald intervals back-transformed from the logit scale.
    sensitivity_prediction, specificity_prediction : Interval or None
        Marginal prediction intervals for a new site, :math:`\\hat\\mu \\pm t_{k-2}
        \\sqrt{\\hat\\tau^2 + \\mathrm{SE}^2}` (Higgins et al. 2009); ``None`` with fewer than 3 sites.
    hsroc : HSROCParameters or None
    sroc : SROCCurve or None
        ``None`` when a between-site variance is 0 (the HSROC shape is then undefined).
    confidence_region, prediction_region : Region
        Joint regions, radius :math:`\\sqrt{\\chi^2_{2}(\\mathrm{level})}` (as mada draws them);
        the prediction region uses :math:`\\hat\\Psi + \\widehat{\\mathrm{Var}}(\\hat\\mu)`.
    n_sites : int
        Number of sites pooled.
    sites_pooled : tuple of str
    sites_not_pooled : tuple of SiteExclusion
    notes : tuple of str
        Fallbacks and boundary estimates a reader should know about.
    level : float
    """

    method: str
    estimator: str
    mean_logit_sensitivity: float
    mean_logit_fpr: float
    se_logit_sensitivity: float
    se_logit_fpr: float
    covariance_of_means: float
    tau2_logit_sensitivity: float
    tau2_logit_fpr: float
    correlation: float | None
    correlation_fixed: bool
    log_likelihood: float
    sensitivity: Interval
    specificity: Interval
    sensitivity_prediction: Interval | None
    specificity_prediction: Interval | None
    hsroc: HSROCParameters | None
    sroc: SROCCurve | None
    confidence_region: Region
    prediction_region: Region
    n_sites: int
    sites_pooled: tuple[str, ...]
    sites_not_pooled: tuple[SiteExclusion, ...] = ()
    notes: tuple[str, ...] = ()
    level: float = 0.95

    def summary(self) -> str:
        """A short text summary: summary point, heterogeneity, SROC AUC, sites."""
        pct = f"{100 * self.level:g}%"
        rho = "undefined" if self.correlation is None else f"{self.correlation:.3f}"
        fixed = " (fixed)" if self.correlation_fixed else ""
        lines = [
            f"Bivariate model: {self.method} (k = {self.n_sites})",
            f"  sensitivity  {self.sensitivity.estimate:.3f} ({pct} CI {self.sensitivity.ci_low:.3f} to "
            f"{self.sensitivity.ci_high:.3f})",
            f"  specificity  {self.specificity.estimate:.3f} ({pct} CI {self.specificity.ci_low:.3f} to "
            f"{self.specificity.ci_high:.3f})",
            f"  logit Se {self.mean_logit_sensitivity:.4f} (SE {self.se_logit_sensitivity:.4f}), "
            f"logit FPR {self.mean_logit_fpr:.4f} (SE {self.se_logit_fpr:.4f})",
            f"  tau^2 logit Se {self.tau2_logit_sensitivity:.4f}, logit FPR {self.tau2_logit_fpr:.4f}, "
            f"correlation {rho}{fixed}",
        ]
        if self.sroc is not None:
            lines.append(f"  area under the SROC curve (false-positive rates 0 to 1) {self.sroc.area_under_curve:.3f}")
        lines.extend(f"  not pooled: {e.site_id} ({e.reason})" for e in self.sites_not_pooled)
        lines.extend(f"  note: {note}" for note in self.notes)
        return "\n".join(lines)


# --- geometry shared by the normal-approximation and exact models ------------------------------------


def hsroc_parameters(mean: ArrayLike, between: ArrayLike) -> HSROCParameters | None:
    r"""HSROC parameters from the bivariate mean and between-site covariance (logit Se, logit FPR).

    Parameters
    ----------
    mean : array_like of shape (2,)
        :math:`(\mu_{Se}, \mu_{FPR})` on the logit scale.
    between : array_like of shape (2, 2)
        Between-site covariance :math:`\Psi`.

    Returns
    -------
    HSROCParameters or None
        ``None`` when a between-site variance is 0: the shape :math:`\beta` is then undefined.

    Notes
    -----
    With :math:`\sigma_1, \sigma_2` the between-site SDs of logit Se and logit FPR and
    :math:`\sigma_{12}` their covariance (Harbord et al. 2007, with FPR in place of specificity, as in mada):
    :math:`\Theta = \tfrac12(\sqrt{\sigma_2/\sigma_1}\,\mu_1 + \sqrt{\sigma_1/\sigma_2}\,\mu_2)`,
    :math:`\Lambda = \sqrt{\sigma_2/\sigma_1}\,\mu_1 - \sqrt{\sigma_1/\sigma_2}\,\mu_2`,
    :math:`\sigma^2_\theta = \tfrac12(\sigma_1\sigma_2 + \sigma_{12})`,
    :math:`\sigma^2_\alpha = 2(\sigma_1\sigma_2 - \sigma_{12})`, :math:`\beta = \log(\sigma_2/\sigma_1)`.

    References
    ----------
    Harbord RM, Deeks JJ, Egger M, Whiting P, Sterne JAC (2007). A unification of models for
    meta-analysis of diagnostic accuracy studies. Biostatistics 8:239–251.
    Doebler P (2020). mada: Meta-Analysis of Diagnostic Accuracy (R package), ``calc_hsroc_coef``.
    """
    mu = np.asarray(mean, dtype=float)
    psi = np.asarray(between, dtype=float)
    sd1, sd2 = math.sqrt(max(psi[0, 0], 0.0)), math.sqrt(max(psi[1, 1], 0.0))
    if min(sd1, sd2) ** 2 < _ZERO_VARIANCE:
        return None
    root = math.sqrt(sd2 / sd1)
    return HSROCParameters(
        threshold_theta=0.5 * (root * mu[0] + mu[1] / root),
        accuracy_lambda=root * mu[0] - mu[1] / root,
        shape_beta=math.log(sd2 / sd1),
        var_threshold=0.5 * (sd1 * sd2 + psi[0, 1]),
        var_accuracy=2.0 * (sd1 * sd2 - psi[0, 1]),
    )


def _sroc_sensitivity(hsroc: HSROCParameters, fpr: NDArray[np.float64]) -> NDArray[np.float64]:
    """Harbord et al. (2007): logit Se = Λ e^{−β/2} + e^{−β} logit FPR."""
    beta = hsroc.shape_beta
    return special.expit(hsroc.accuracy_lambda * math.exp(-beta / 2) + math.exp(-beta) * special.logit(fpr))


def sroc_auc_grid(sensitivity: ArrayLike) -> float:
    r"""Area under an SROC curve by mada's grid rule.

    Parameters
    ----------
    sensitivity : array_like of shape (n,)
        SROC sensitivities at an evenly spaced FPR grid (mada: 0.01, ..., 0.99), n >= 10.

    Returns
    -------
    float
        :math:`(s_1/2 + s_2 + \dots + s_{n-1} + s_n/2)/n`.

    References
    ----------
    Doebler P (2020). mada (R package), ``AUC.default``.
    """
    s = np.asarray(sensitivity, dtype=float)
    if s.size < 10:
        raise PoolingError("the grid rule needs at least 10 points")
    return float((s[0] / 2 + s[1:-1].sum() + s[-1] / 2) / s.size)


def _sroc(hsroc: HSROCParameters) -> SROCCurve:
    grid = np.array(SROC_GRID)
    sens = _sroc_sensitivity(hsroc, grid)
    return SROCCurve(tuple(float(x) for x in grid), tuple(float(x) for x in sens), _sroc_auc(hsroc))


def _sroc_auc(hsroc: HSROCParameters) -> float:
    """Area under the SROC curve over FPR in (0, 1).

    Substituting FPR = expit(t) gives a smooth integrand on the real line that decays like e^{-|t|}, for which
    the trapezoidal rule converges geometrically (Trefethen & Weideman 2014, SIAM Rev 56:385); 8001 points on
    [-60, 60] leave an error far below 1e-12.
    """
    t = np.linspace(-60.0, 60.0, 8001)
    x = special.expit(t)
    integrand = _sroc_sensitivity(hsroc, x) * x * (1 - x)
    return float(integrate.trapezoid(integrand, t))


def _region(kind: str, mean: NDArray[np.float64], cov: NDArray[np.float64], level: float) -> Region:
    radius = math.sqrt(float(stats.chi2.ppf(level, 2)))
    eigenvalues, eigenvectors = np.linalg.eigh(cov)
    scale = eigenvectors * np.sqrt(np.clip(eigenvalues, 0.0, None))
    angles = np.linspace(0.0, 2.0 * math.pi, _REGION_POINTS)
    points = mean[:, None] + radius * scale @ np.vstack([np.cos(angles), np.sin(angles)])
    return Region(
        kind,
        level,
        tuple(float(x) for x in special.expit(points[1])),
        tuple(float(x) for x in special.expit(points[0])),
    )


def summarise_bivariate(
    *,
    method: str,
    estimator: str,
    mean: NDArray[np.float64],
    mean_cov: NDArray[np.float64],
    between: NDArray[np.float64],
    log_likelihood: float,
    correlation_fixed: bool,
    site_ids: Sequence[str],
    excluded: Sequence[SiteExclusion] = (),
    notes: Sequence[str] = (),
    level: float = 0.95,
    degrees_of_freedom: int | None = None,
) -> BivariateFit:
    """Build a :class:`BivariateFit` (summary point, regions, SROC) from fitted parameters.

    The intervals for the summary sensitivity and specificity use the normal quantile, or Student's t on
    ``degrees_of_freedom`` when given.
    """
    k = len(site_ids)
    if degrees_of_freedom is None:
        z = float(stats.norm.isf((1 - level) / 2))
        wald = "Wald interval (normal quantile)"
    else:
        z = float(stats.t.isf((1 - level) / 2, degrees_of_freedom))
        wald = f"Wald interval with t on {degrees_of_freedom} df"
    se = np.sqrt(np.diag(mean_cov))
    notes = list(notes)
    sd = np.sqrt(np.clip(np.diag(between), 0.0, None))
    correlation = None if min(sd) ** 2 < _ZERO_VARIANCE else float(between[0, 1] / (sd[0] * sd[1]))
    if correlation is None:
        notes.append("a between-site variance is 0: the correlation and the HSROC shape are undefined")
    sensitivity = Interval(
        float(special.expit(mean[0])),
        float(special.expit(mean[0] - z * se[0])),
        float(special.expit(mean[0] + z * se[0])),
        f"{wald} on the logit scale, back-transformed",
        level,
    )
    specificity = Interval(
        float(1 - special.expit(mean[1])),
        float(1 - special.expit(mean[1] + z * se[1])),
        float(1 - special.expit(mean[1] - z * se[1])),
        f"{wald} on the logit FPR scale, back-transformed",
        level,
    )
    predictions: list[Interval | None] = [None, None]
    if k >= 3:
        t = float(stats.t.isf((1 - level) / 2, k - 2))
        for j in (0, 1):
            half = t * math.sqrt(between[j, j] + mean_cov[j, j])
            low, high = special.expit(mean[j] - half), special.expit(mean[j] + half)
            if j == 0:
                predictions[0] = Interval(
                    sensitivity.estimate, float(low), float(high), "prediction interval, t on k-2 df", level
                )
            else:
                predictions[1] = Interval(
                    specificity.estimate, float(1 - high), float(1 - low), "prediction interval, t on k-2 df", level
                )
    else:
        notes.append("prediction intervals undefined with fewer than 3 sites")
    hsroc = hsroc_parameters(mean, between)
    return BivariateFit(
        method=method,
        estimator=estimator,
        mean_logit_sensitivity=float(mean[0]),
        mean_logit_fpr=float(mean[1]),
        se_logit_sensitivity=float(se[0]),
        se_logit_fpr=float(se[1]),
        covariance_of_means=float(mean_cov[0, 1]),
        tau2_logit_sensitivity=float(between[0, 0]),
        tau2_logit_fpr=float(between[1, 1]),
        correlation=correlation,
        correlation_fixed=correlation_fixed,
        log_likelihood=float(log_likelihood),
        sensitivity=sensitivity,
        specificity=specificity,
        sensitivity_prediction=predictions[0],
        specificity_prediction=predictions[1],
        hsroc=hsroc,
        sroc=None if hsroc is None else _sroc(hsroc),
        confidence_region=_region("confidence", mean, mean_cov, level),
        prediction_region=_region("prediction", mean, between + mean_cov, level),
        n_sites=k,
        sites_pooled=tuple(site_ids),
        sites_not_pooled=tuple(excluded),
        notes=tuple(notes),
        level=level,
    )


# --- normal-approximation likelihood -----------------------------------------------------------------


class _NormalModel:
    """Restricted (or full) log-likelihood of y_i ~ N2(mu, S_i + Psi), mu profiled out by GLS."""

    def __init__(self, y: NDArray[np.float64], s: NDArray[np.float64], restricted: bool) -> None:
        self.y, self.s, self.restricted = y, s, restricted

    def evaluate(self, psi: NDArray[np.float64]) -> tuple[float, NDArray[np.float64], NDArray[np.float64], Any]:
        """Log-likelihood, gradient matrix G (d loglik = tr(G dPsi)), mu-hat and Var(mu-hat)."""
        a = self.s[:, 0] + psi[0, 0]
        d = self.s[:, 1] + psi[1, 1]
        b = psi[0, 1]
        det = a * d - b * b
        if np.any(det <= 0) or np.any(a <= 0):
            return -math.inf, np.zeros((2, 2)), np.zeros(2), None
        w = np.empty((a.size, 2, 2))
        w[:, 0, 0], w[:, 1, 1] = d / det, a / det
        w[:, 0, 1] = w[:, 1, 0] = -b / det
        m = w.sum(axis=0)
        m_inv = np.linalg.inv(m)
        mu = m_inv @ np.einsum("kij,kj->i", w, self.y)
        r = self.y - mu
        wr = np.einsum("kij,kj->ki", w, r)
        loglik = -0.5 * (
            float(np.log(det).sum()) + float(np.einsum("ki,ki->", r, wr)) + 2 * a.size * math.log(2 * math.pi)
        )
        gradient = -0.5 * w.sum(axis=0) + 0.5 * np.einsum("ki,kj->ij", wr, wr)
        if self.restricted:
            loglik -= 0.5 * math.log(np.linalg.det(m)) - math.log(2 * math.pi)
            gradient += 0.5 * np.einsum("kij,jl,klm->im", w, m_inv, w)
        return loglik, gradient, mu, m_inv


def _psi_from_cholesky(theta: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    lower = np.array([[theta[0], 0.0], [theta[1], theta[2]]])
    return lower @ lower.T, lower


def _psi_fixed_correlation(theta: NDArray[np.float64], rho: float) -> NDArray[np.float64]:
    s1, s2 = abs(theta[0]), abs(theta[1])
    return np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])


def _fit_normal(
    model: _NormalModel, start: NDArray[np.float64], correlation: float | None
) -> tuple[NDArray[np.float64], bool]:
    """Maximise over Psi (Cholesky factor, or two SDs at a fixed correlation); returns (Psi, converged)."""
    if correlation is None:

        def objective(theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
            psi, lower = _psi_from_cholesky(theta)
            loglik, g, _, _ = model.evaluate(psi)
            if not math.isfinite(loglik):
                return 1e300, np.zeros(3)
            dl = 2.0 * g @ lower  # d loglik / d L for symmetric G
            return -loglik, -np.array([dl[0, 0], dl[1, 0], dl[1, 1]])

        sd = np.sqrt(np.diag(start))
        rho = start[0, 1] / max(sd[0] * sd[1], 1e-12)
        starts = [np.array([sd[0], rho * sd[1], math.sqrt(max(1 - rho**2, 1e-6)) * sd[1]])]
        starts.append(np.array([sd[0], 0.0, sd[1]]))
        best = None
        for x0 in starts:
            found = optimize.minimize(
                objective, x0, jac=True, method="L-BFGS-B", options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000}
            )
            if best is None or found.fun < best.fun:
                best = found
        assert best is not None
        return _psi_from_cholesky(best.x)[0], bool(best.success)

    def objective_fixed(theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        psi = _psi_fixed_correlation(theta, correlation)
        loglik, g, _, _ = model.evaluate(psi)
        if not math.isfinite(loglik):
            return 1e300, np.zeros(2)
        s1, s2 = abs(theta[0]), abs(theta[1])
        d1 = np.array([[2 * s1, correlation * s2], [correlation * s2, 0.0]]) * np.sign(theta[0] or 1.0)
        d2 = np.array([[0.0, correlation * s1], [correlation * s1, 2 * s2]]) * np.sign(theta[1] or 1.0)
        return -loglik, -np.array([np.sum(g * d1), np.sum(g * d2)])

    x0 = np.sqrt(np.diag(start)) + 1e-3
    found = optimize.minimize(
        objective_fixed, x0, jac=True, method="L-BFGS-B", options={"ftol": 1e-15, "gtol": 1e-10, "maxiter": 2000}
    )
    return _psi_fixed_correlation(found.x, correlation), bool(found.success)


def _check_pairs(
    estimates: ArrayLike, variances: ArrayLike, site_ids: Sequence[str] | None
) -> tuple[NDArray[np.float64], NDArray[np.float64], tuple[str, ...]]:
    y = np.asarray(estimates, dtype=float)
    s = np.asarray(variances, dtype=float)
    if y.ndim != 2 or y.shape[1] != 2 or s.shape != y.shape:
        raise PoolingError("estimates and variances must both have shape (sites, 2)")
    ids = tuple(site_ids) if site_ids is not None else tuple(f"site {i + 1}" for i in range(y.shape[0]))
    if len(ids) != y.shape[0]:
        raise PoolingError(f"got {len(ids)} site ids for {y.shape[0]} sites")
    if y.shape[0] < 2:
        raise PoolingError(f"bivariate pooling needs at least 2 sites, got {y.shape[0]}")
    for values, what in ((y, "estimates"), (s, "variances")):
        bad = [ids[i] for i in np.flatnonzero(~np.all(np.isfinite(values), axis=1))]
        if bad:
            raise PoolingError(f"{what} must be finite; not finite for site(s) {bad}")
    bad = [ids[i] for i in np.flatnonzero(~np.all(s > 0, axis=1))]
    if bad:
        raise PoolingError(f"within-site variances must be positive; zero or negative for site(s) {bad}")
    return y, s, ids


def bivariate_random_effects(
    estimates: ArrayLike,
    variances: ArrayLike,
    site_ids: Sequence[str] | None = None,
    method: Literal["REML", "ML"] = "REML",
    correlation: float | None = None,
    level: float = 0.95,
    excluded: Sequence[SiteExclusion] = (),
    notes: Sequence[str] = (),
) -> BivariateFit:
    r"""Bivariate normal random-effects model (Reitsma et al. 2005) on any (estimate, variance) pairs.

    Parameters
    ----------
    estimates : array_like of shape (k, 2)
        Per site (logit sensitivity, logit false-positive rate).
    variances : array_like of shape (k, 2)
        Their within-site variances (the within-site covariance is 0: the two come from disjoint
        groups of participants).
    site_ids : sequence of str, optional
        Names of the sites, for the result.
    method : {"REML", "ML"}, default "REML"
        Restricted or full maximum likelihood for :math:`\Psi`.
    correlation : float, optional
        Fix the between-site correlation at this value instead of estimating it. With fewer than 4
        sites it is fixed at 0 (a fallback named in ``notes``).
    level : float, default 0.95
    excluded, notes : sequence, optional
        Passed through to the result (used by :func:`reitsma`).

    Returns
    -------
    BivariateFit

    Notes
    -----
    :math:`\mu` is profiled out by generalised least squares, :math:`\hat\mu = M^{-1}\sum W_i y_i` with
    :math:`W_i = (S_i + \Psi)^{-1}`, :math:`M = \sum W_i`, and :math:`\widehat{\mathrm{Var}}(\hat\mu) = M^{-1}`.
    The restricted log-likelihood :math:`-\tfrac12\{\sum\log|S_i+\Psi| + \log|M| + \sum r_i^\top W_i r_i\}`
    is maximised over the Cholesky factor of :math:`\Psi` (which reaches the boundary of the
    positive semi-definite cone) by L-BFGS-B with its analytic gradient
    :math:`G = -\tfrac12\sum W_i + \tfrac12\sum W_i M^{-1} W_i + \tfrac12\sum W_i r_i r_i^\top W_i`.

    References
    ----------
    Reitsma JB, Glas AS, Rutjes AWS, Scholten RJPM, Bossuyt PM, Zwinderman AH (2005). Bivariate
    analysis of sensitivity and specificity produces informative summary measures in diagnostic
    reviews. J Clin Epidemiol 58:982–990. Jackson D, Riley R, White IR (2011). Multivariate
    meta-analysis: potential and promise. Stat Med 30:2481–2498. Takwoingi Y, Guo B, Riley RD, Deeks JJ
    (2017). Performance of methods for meta-analysis of diagnostic test accuracy with few studies or
    sparse data. Stat Methods Med Res 26:1896–1911.
    """
    y, s, ids = _check_pairs(estimates, variances, site_ids)
    level = _check_level(level)
    if method not in ("REML", "ML"):
        raise PoolingError(f"method must be 'REML' or 'ML', got {method!r}")
    notes = list(notes)
    if correlation is not None and not -1.0 < float(correlation) < 1.0:
        raise PoolingError(f"a fixed correlation must lie strictly between -1 and 1, got {correlation!r}")
    if correlation is None and y.shape[0] < _MIN_SITES_FOR_CORRELATION:
        correlation = 0.0
        notes.append(f"fewer than {_MIN_SITES_FOR_CORRELATION} sites: between-site correlation fixed at 0 (fallback)")
    # Start from the two univariate REML fits and the correlation of the site estimates.
    tau2 = [random_effects(y[:, j], s[:, j], method="REML").tau2 for j in (0, 1)]
    tau2 = [max(t, 0.01) for t in tau2]
    rho0 = float(np.clip(np.corrcoef(y.T)[0, 1], -0.9, 0.9)) if y.shape[0] > 2 else 0.0
    if not math.isfinite(rho0):
        rho0 = 0.0
    start = np.array([[tau2[0], rho0 * math.sqrt(tau2[0] * tau2[1])], [rho0 * math.sqrt(tau2[0] * tau2[1]), tau2[1]]])
    model = _NormalModel(y, s, restricted=method == "REML")
    psi, converged = _fit_normal(model, start, None if correlation is None else float(correlation))
    if not converged:
        notes.append("the likelihood maximiser reported incomplete convergence; estimates are the best found")
    loglik, _, mu, mean_cov = model.evaluate(psi)
    sd = np.sqrt(np.clip(np.diag(psi), 0, None))
    if correlation is None and min(sd) ** 2 >= _ZERO_VARIANCE and abs(psi[0, 1] / (sd[0] * sd[1])) > 0.999:
        notes.append("between-site correlation estimated at the boundary (|rho| near 1)")
    label = "restricted maximum likelihood" if method == "REML" else "maximum likelihood"
    return summarise_bivariate(
        method=f"bivariate normal random effects (Reitsma 2005), {label}",
        estimator=method,
        mean=mu,
        mean_cov=mean_cov,
        between=psi,
        log_likelihood=loglik,
        correlation_fixed=correlation is not None,
        site_ids=ids,
        excluded=excluded,
        notes=notes,
        level=level,
    )


def reitsma(
    tables: Sequence[ReleasedTable],
    correction: float = 0.5,
    correction_scope: Literal["single", "all"] = "single",
    method: Literal["REML", "ML"] = "REML",
    correlation: float | None = None,
    level: float = 0.95,
) -> BivariateFit:
    r"""Bivariate REML meta-analysis of sensitivity and specificity from released 2×2 tables.

    Parameters
    ----------
    tables : sequence of ReleasedTable
        One per site. Tables with a suppressed cell, and tables without participants with (or
        without) the condition, are not pooled; the result lists them with the reason.
    correction : float, default 0.5
        Added to the cells where a zero cell makes a logit infinite.
    correction_scope : {"single", "all"}, default "single"
        ``"single"``: add ``correction`` to every cell of a table that has a zero cell.
        ``"all"``: if any table has a zero cell, add it to every cell of every table (mada's default,
        ``correction.control = "all"``).
    method, correlation, level
        As in :func:`bivariate_random_effects`.

    Returns
    -------
    BivariateFit

    Notes
    -----
    Per site, :math:`y = (\log\{tp/fn\}, \log\{fp/tn\})` and
    :math:`S = \mathrm{diag}(1/tp + 1/fn,\ 1/fp + 1/tn)` after any correction.

    References
    ----------
    Reitsma et al. (2005), J Clin Epidemiol 58:982–990. Doebler P (2020), mada (R package), ``reitsma``.
    """
    if correction_scope not in ("single", "all"):
        raise PoolingError(f"correction_scope must be 'single' or 'all', got {correction_scope!r}")
    if not isinstance(correction, int | float) or not 0 < correction < 1e3:
        raise PoolingError("correction must be a positive number")
    usable: list[ReleasedTable] = []
    excluded: list[SiteExclusion] = []
    for table in tables:
        if not table.is_complete:
            excluded.append(SiteExclusion(table.site_id, withheld_cells(table.suppressed)))
        elif table.tp + table.fn == 0:  # type: ignore[operator]
            excluded.append(SiteExclusion(table.site_id, "no participants with the condition"))
        elif table.fp + table.tn == 0:  # type: ignore[operator]
            excluded.append(SiteExclusion(table.site_id, "no participants without the condition"))
        else:
            usable.append(table)
    if len(usable) < 2:
        raise PoolingError(f"bivariate pooling needs at least 2 sites with complete tables, got {len(usable)}")
    counts = np.array([t.cells for t in usable], dtype=float)  # tp, fp, fn, tn
    zero_rows = np.any(counts == 0, axis=1)
    notes = []
    if correction_scope == "all" and zero_rows.any():
        counts = counts + correction
        notes.append(f"{correction:g} added to every cell of every site because a cell was 0")
    elif zero_rows.any():
        counts[zero_rows] += correction
        corrected = [usable[i].site_id for i in np.flatnonzero(zero_rows)]
        notes.append(f"{correction:g} added to every cell of site(s) with a zero cell: {', '.join(corrected)}")
    tp, fp, fn, tn = counts.T
    y = np.column_stack([np.log(tp / fn), np.log(fp / tn)])
    v = np.column_stack([1 / tp + 1 / fn, 1 / fp + 1 / tn])
    return bivariate_random_effects(
        y,
        v,
        [t.site_id for t in usable],
        method=method,
        correlation=correlation,
        level=level,
        excluded=excluded,
        notes=notes,
    )
