r"""Summary likelihood ratios and diagnostic odds ratio derived from a fitted bivariate model.

Pooling LR+ or LR− site by site can give pairs that no (sensitivity, specificity) supports (for example
LR+ < 1 with LR− < 1). Zwinderman & Bossuyt (2008) derive them instead from the bivariate model's summary
point: with :math:`\mu = (\mu_{Se}, \mu_{FPR})` on the logit scale and its covariance :math:`V`,

.. math::

    \mathrm{LR}^+ = \frac{\mathrm{expit}\,\mu_{Se}}{\mathrm{expit}\,\mu_{FPR}}, \quad
    \mathrm{LR}^- = \frac{1 - \mathrm{expit}\,\mu_{Se}}{1 - \mathrm{expit}\,\mu_{FPR}}, \quad
    \mathrm{DOR} = \exp(\mu_{Se} - \mu_{FPR}).

Intervals: Wald on the log scale with the delta-method variance (``method="delta"``), or the percentiles of
the ratios over draws of :math:`\mu` from :math:`N_2(\hat\mu, V)` (``method="simulation"``, the authors'
recommendation).

References
----------
Zwinderman AH, Bossuyt PM (2008). We should not pool diagnostic likelihood ratios in systematic reviews.
Stat Med 27:687–697. Reitsma JB et al. (2005). J Clin Epidemiol 58:982–990.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike
from scipy import special, stats

from federation.stats.proportions import _check_level
from federation.stats.results import Interval
from federation.stats.serial import PoolingError, ResultRecord

__all__ = ["SummaryRatios", "summary_ratios"]


@dataclass(frozen=True)
class SummaryRatios(ResultRecord):
    """LR+, LR− and the DOR at the bivariate model's summary point, each with its interval."""

    likelihood_ratio_positive: Interval
    likelihood_ratio_negative: Interval
    diagnostic_odds_ratio: Interval
    method: str
    level: float = 0.95


def _log_ratios(mu: np.ndarray) -> np.ndarray:
    """log LR+, log LR−, log DOR for each row of (logit Se, logit FPR)."""
    se_, fpr = mu[..., 0], mu[..., 1]
    return np.stack(
        [
            special.log_expit(se_) - special.log_expit(fpr),
            special.log_expit(-se_) - special.log_expit(-fpr),
            se_ - fpr,
        ],
        axis=-1,
    )


def summary_ratios(
    mean: ArrayLike,
    covariance: ArrayLike,
    method: Literal["delta", "simulation"] = "delta",
    draws: int = 20000,
    seed: int = 20080301,
    level: float = 0.95,
) -> SummaryRatios:
    r"""Summary LR+, LR− and DOR from a bivariate fit's mean and its covariance (logit Se, logit FPR).

    Parameters
    ----------
    mean : array_like of shape (2,)
        :math:`\hat\mu = (\mu_{Se}, \mu_{FPR})`.
    covariance : array_like of shape (2, 2)
        :math:`\widehat{\mathrm{Var}}(\hat\mu)`.
    method : {"delta", "simulation"}, default "delta"
        Wald interval on the log scale with the delta-method variance, or percentiles of ``draws`` simulated
        means (seeded, so the same input gives the same output).
    draws, seed : int
        For ``"simulation"``.
    level : float, default 0.95

    Returns
    -------
    SummaryRatios

    Notes
    -----
    Gradients of the log ratios with respect to :math:`(\mu_{Se}, \mu_{FPR})`: :math:`(1 - Se, -(1 - FPR))` for
    log LR+, :math:`(-Se, FPR)` for log LR− and :math:`(1, -1)` for log DOR (Se and FPR at the summary point).

    References
    ----------
    Zwinderman & Bossuyt (2008), Stat Med 27:687–697.
    """
    level = _check_level(level)
    mu = np.asarray(mean, dtype=float).reshape(2)
    cov = np.asarray(covariance, dtype=float).reshape(2, 2)
    if not (np.all(np.isfinite(mu)) and np.all(np.isfinite(cov))):
        raise PoolingError("the bivariate mean and its covariance must be finite")
    if np.any(np.linalg.eigvalsh((cov + cov.T) / 2) < -1e-12):
        raise PoolingError("the covariance of the bivariate mean is not positive semi-definite")
    estimates = _log_ratios(mu)
    alpha = 1 - level
    if method == "delta":
        sens, fpr = special.expit(mu[0]), special.expit(mu[1])
        gradients = np.array([[1 - sens, -(1 - fpr)], [-sens, fpr], [1.0, -1.0]])
        z = float(stats.norm.isf(alpha / 2))
        half = z * np.sqrt(np.clip(np.einsum("ij,jk,ik->i", gradients, cov, gradients), 0, None))
        low, high = estimates - half, estimates + half
        label = "delta method, Wald interval on the log scale"
    elif method == "simulation":
        if not isinstance(draws, int) or draws < 1000:
            raise PoolingError("simulation needs at least 1000 draws")
        sample = np.random.default_rng(seed).multivariate_normal(mu, cov, size=draws, method="eigh")
        logs = _log_ratios(sample)
        low, high = np.quantile(logs, alpha / 2, axis=0), np.quantile(logs, 1 - alpha / 2, axis=0)
        label = f"percentiles of {draws} draws from the bivariate normal of the summary point"
    else:
        raise PoolingError(f"method must be 'delta' or 'simulation', got {method!r}")
    what = "from the bivariate summary point (Zwinderman & Bossuyt 2008)"
    intervals = [
        Interval(float(math.exp(e)), float(math.exp(lo)), float(math.exp(hi)), f"{label}; {what}", level)
        for e, lo, hi in zip(estimates, low, high, strict=True)
    ]
    return SummaryRatios(*intervals, method=label, level=level)
