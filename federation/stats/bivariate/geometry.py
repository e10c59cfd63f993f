"""The geometry shared by the normal-approximation and exact models: HSROC parameters, the SROC curve and
its AUC, the confidence and prediction regions, and the summary of a fitted mean and covariance.
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import integrate, special, stats

from federation.stats.results import Interval
from federation.stats.serial import PoolingError, SiteExclusion

from .results import BivariateFit, HSROCParameters, Region, SROCCurve

SROC_GRID = tuple(i / 100 for i in range(1, 100))  # mada's default grid of false-positive rates
_REGION_POINTS = 100
_ZERO_VARIANCE = 1e-10  # a between-site variance below this is reported as 0 (no correlation defined)


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
