"""Univariate meta-analysis: pooling one effect (on an additive scale) across sites.

Each site contributes an estimate :math:`y_i` and its within-site variance :math:`v_i`. The fixed-effect
model pools with weights :math:`1/v_i`; the random-effects model adds a between-site variance
:math:`\\tau^2` and pools with weights :math:`w_i = 1/(v_i + \\tau^2)`. Proportions (sensitivity,
specificity) are pooled on the logit scale; see :func:`logit_proportion`.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from typing import Literal, NamedTuple

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize, special

from federation.stats.proportions import _as_count, _check_level
from federation.stats.results import PooledEstimate

__all__ = [
    "LogitProportion",
    "expit",
    "fixed_effect",
    "logit",
    "logit_proportion",
    "random_effects",
]

_TOLERANCE = 1e-12
_MAX_ITERATIONS = 1000


class LogitProportion(NamedTuple):
    """A proportion on the logit scale, its variance, and whether 0.5 was added to the cells."""

    logit: float
    variance: float
    corrected: bool


def logit(p: ArrayLike) -> float | NDArray[np.float64]:
    """Log-odds :math:`\\log\\{p/(1-p)\\}`; a scalar in gives a float out."""
    result = special.logit(np.asarray(p, dtype=float))
    return float(result) if np.ndim(result) == 0 else result


def expit(x: ArrayLike) -> float | NDArray[np.float64]:
    """Inverse logit :math:`1/(1 + e^{-x})`; a scalar in gives a float out."""
    result = special.expit(np.asarray(x, dtype=float))
    return float(result) if np.ndim(result) == 0 else result


def logit_proportion(x: int, n: int) -> LogitProportion:
    r"""Logit of a proportion :math:`x/n` with its large-sample variance.

    Parameters
    ----------
    x : int
        Number of events, ``0 <= x <= n``.
    n : int
        Number of trials, positive.

    Returns
    -------
    LogitProportion
        ``(logit, variance, corrected)``.

    Notes
    -----
    :math:`\mathrm{logit} = \log\{x/(n-x)\}` and :math:`\mathrm{var} = 1/x + 1/(n-x)`. Only when
    ``x == 0`` or ``x == n`` is 0.5 added to both :math:`x` and :math:`n-x` (``corrected`` is then
    True); otherwise the counts are used as they are.

    References
    ----------
    Hamza TH, van Houwelingen HC, Stijnen T (2008). The binomial distribution of meta-analysis was
    preferred to model within-study variability. J Clin Epidemiol 61:41–51.
    """
    events, total = _as_count(x, "x"), _as_count(n, "n")
    if total == 0 or events > total:
        raise ValueError(f"need 0 <= x <= n and n > 0, got x = {events}, n = {total}")
    corrected = events in (0, total)
    a, b = (events + 0.5, total - events + 0.5) if corrected else (float(events), float(total - events))
    return LogitProportion(math.log(a / b), 1 / a + 1 / b, corrected)


def _check_studies(estimates: ArrayLike, variances: ArrayLike) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    y = np.asarray(estimates, dtype=float).ravel()
    v = np.asarray(variances, dtype=float).ravel()
    if y.shape != v.shape:
        raise ValueError(f"got {y.size} estimates but {v.size} variances; give one of each per study")
    if y.size < 2:
        raise ValueError(f"pooling needs at least 2 studies, got {y.size}")
    for values, what in ((y, "estimates"), (v, "variances")):
        bad = np.flatnonzero(~np.isfinite(values)).tolist()
        if bad:
            raise ValueError(f"{what} must be finite; not finite at study index {bad}")
    bad = np.flatnonzero(v <= 0).tolist()
    if bad:
        raise ValueError(f"variances must be positive; zero or negative at study index {bad}")
    return y, v


def _weighted_mean(y: NDArray[np.float64], w: NDArray[np.float64]) -> float:
    return float(np.dot(w, y) / w.sum())


def _generalised_q(y: NDArray[np.float64], v: NDArray[np.float64], tau2: float) -> float:
    """:math:`Q(\\tau^2) = \\sum w_i (y_i - \\hat\\mu)^2` with :math:`w_i = 1/(v_i + \\tau^2)`."""
    w = 1.0 / (v + tau2)
    return float(np.dot(w, (y - _weighted_mean(y, w)) ** 2))


def _typical_variance(v: NDArray[np.float64]) -> float:
    """Higgins & Thompson's "typical" within-study variance :math:`(k-1)\\sum w/((\\sum w)^2 - \\sum w^2)`."""
    w = 1.0 / v
    return float((v.size - 1) * w.sum() / (w.sum() ** 2 - np.sum(w**2)))


def _tau2_dersimonian_laird(y: NDArray[np.float64], v: NDArray[np.float64]) -> float:
    w = 1.0 / v
    c = w.sum() - np.sum(w**2) / w.sum()
    return max(0.0, (_generalised_q(y, v, 0.0) - (y.size - 1)) / c)


def _root_of_decreasing(function: Callable[[float], float], start: float) -> float:
    """Root in (0, inf) of a decreasing function that is positive at 0, bracketed by doubling."""
    upper = max(start, 1e-8)
    while function(upper) > 0:
        upper *= 2.0
        if upper > 1e12:
            raise RuntimeError("could not bracket tau^2: the between-study variance looks unbounded")
    return float(optimize.brentq(function, 0.0, upper, xtol=_TOLERANCE, rtol=8.9e-16, maxiter=_MAX_ITERATIONS))


def _q_roots(y: NDArray[np.float64], v: NDArray[np.float64], targets: NDArray[np.float64]) -> NDArray[np.float64]:
    """tau^2 >= 0 solving Q(tau^2) = target for each target, all at once; 0 where Q(0) <= target.

    Q is decreasing in tau^2 with dQ/dtau^2 = -sum w_i^2 (y_i - mu)^2 (mu-hat minimises Q, so its own derivative
    drops out). Newton steps from tau^2 = 0 are kept inside a bracket that shrinks as they go (a step outside
    it is replaced by bisection), which converges quadratically near the root and never leaves [0, inf). A
    target that does not converge falls back to Brent's method.
    """
    m = targets.size
    tau2 = np.zeros(m)
    low = np.zeros(m)
    high = np.full(m, np.inf)
    done = _generalised_q(y, v, 0.0) <= targets  # Q(0) already at or below the target: the root is 0
    for _ in range(200):
        w = 1.0 / (v[:, None] + tau2[None, :])
        mu = (w * y[:, None]).sum(axis=0) / w.sum(axis=0)
        r2 = (y[:, None] - mu) ** 2
        gap = (w * r2).sum(axis=0) - targets
        active = ~done
        if not active.any():
            break
        low = np.where(active & (gap > 0), tau2, low)
        high = np.where(active & (gap < 0), tau2, high)
        slope = (w * w * r2).sum(axis=0)
        # Newton on 1/Q rather than Q: 1/Q is nearly linear in tau^2 (exactly so with equal variances), so the
        # steps are long where Q flattens out and few are needed.
        q = gap + targets
        step = q * gap / (targets * np.where(slope > 0, slope, np.inf))
        proposal = tau2 + step
        outside = ~((proposal > low) & (proposal < high)) & np.isfinite(high)
        proposal = np.where(outside, 0.5 * (low + high), proposal)
        converged = active & (
            (np.abs(proposal - tau2) <= _TOLERANCE * np.maximum(1.0, tau2)) | (np.abs(gap) <= 1e-14 * targets)
        )
        tau2 = np.where(active, proposal, tau2)
        done |= converged
    if not done.all():
        for j in np.flatnonzero(~done):
            target = float(targets[j])
            tau2[j] = _root_of_decreasing(lambda t, q=target: _generalised_q(y, v, t) - q, float(np.var(y)))
    return tau2


def _tau2_paule_mandel(y: NDArray[np.float64], v: NDArray[np.float64]) -> float:
    return float(_q_roots(y, v, np.array([float(y.size - 1)]))[0])


def _tau2_reml(y: NDArray[np.float64], v: NDArray[np.float64]) -> tuple[float, bool]:
    """REML, truncated at 0 (metafor's estimate); returns (tau2, converged).

    Newton steps on the restricted score U = (y'PPy - tr P)/2, with dU/dtau^2 = tr(PP)/2 - y'PPPy, and a Fisher
    scoring step (metafor's algorithm: the expected information tr(PP)/2 in place of -dU) wherever Newton
    would not move uphill or would leave [0, inf). Both have the same fixed point; Newton needs about half
    the iterations.
    """
    tau2 = _tau2_dersimonian_laird(y, v)
    for _ in range(_MAX_ITERATIONS):
        w = 1.0 / (v + tau2)
        w2 = w * w
        sw, sw2 = w.sum(), w2.sum()
        residual = y - np.dot(w, y) / sw
        wr = w * residual
        # Intercept-only model: P = W - w w'/sum(w), so y'PPy, y'PPPy, tr(P), tr(PP) have closed forms.
        ypppy = np.dot(wr, wr)
        trace_p = sw - sw2 / sw
        trace_pp = sw2 - 2 * np.dot(w2, w) / sw + sw2**2 / sw**2
        score = ypppy - trace_p
        information = 2 * (np.dot(w, wr * wr) - np.dot(w, wr) ** 2 / sw) - trace_pp
        new = tau2 + score / information if information > 0 else -1.0
        if new < 0.0 or not math.isfinite(new):
            new = max(0.0, float(tau2 + score / trace_pp))
        new = float(new)
        if abs(new - tau2) <= _TOLERANCE * max(1.0, tau2):
            return new, True
        tau2 = new
    return tau2, False


def _restricted_log_likelihood(y: NDArray[np.float64], v: NDArray[np.float64], tau2: float) -> float:
    w = 1.0 / (v + tau2)
    residual = y - _weighted_mean(y, w)
    return -0.5 * float(np.sum(np.log(v + tau2)) + math.log(w.sum()) + np.dot(w, residual**2))


def _tau2_reml_fallback(y: NDArray[np.float64], v: NDArray[np.float64]) -> float:
    upper = 10.0 * (float(np.var(y)) + float(v.max()))
    found = optimize.minimize_scalar(
        lambda t: -_restricted_log_likelihood(y, v, t),
        bounds=(0.0, upper),
        method="bounded",
        options={"xatol": _TOLERANCE},
    )
    return float(found.x)


def _tau2_q_profile(y: NDArray[np.float64], v: NDArray[np.float64], level: float) -> tuple[float, float]:
    """Invert :math:`Q(\\tau^2) \\sim \\chi^2_{k-1}` (Viechtbauer 2007); bounds below 0 become 0."""
    df = y.size - 1
    alpha = 1.0 - level
    # Upper chi-squared quantiles from scipy.special directly (scipy.stats adds ~100 us per call).
    quantiles = np.array([special.chdtri(df, alpha / 2), special.chdtri(df, 1 - alpha / 2)])
    low, high = _q_roots(y, v, quantiles)
    return float(low), float(high)


def fixed_effect(estimates: ArrayLike, variances: ArrayLike, level: float = 0.95) -> PooledEstimate:
    r"""Inverse-variance fixed-effect (common-effect) pooled estimate.

    Parameters
    ----------
    estimates : array_like of shape (k,)
        Per-study estimates on an additive scale (for example log odds).
    variances : array_like of shape (k,)
        Their within-study variances, all positive.
    level : float, default 0.95
        Confidence level.

    Returns
    -------
    PooledEstimate
        ``method="FE"``; ``tau2`` is 0 by assumption, I² is :math:`\max\{0, (Q-df)/Q\}` and
        :math:`H^2 = Q/df`.

    Notes
    -----
    :math:`\hat\mu = \sum w_i y_i / \sum w_i`, :math:`w_i = 1/v_i`, :math:`\mathrm{SE} = (\sum w_i)^{-1/2}`,
    and Cochran's :math:`Q = \sum w_i (y_i - \hat\mu)^2` on :math:`k-1` df.

    References
    ----------
    Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to Meta-Analysis. Wiley.
    """
    y, v = _check_studies(estimates, variances)
    level = _check_level(level)
    w = 1.0 / v
    estimate, se = _weighted_mean(y, w), math.sqrt(1.0 / w.sum())
    q, df = _generalised_q(y, v, 0.0), y.size - 1
    half = float(-special.ndtri((1 - level) / 2)) * se
    return PooledEstimate(
        method="FE",
        estimate=estimate,
        se=se,
        ci_low=estimate - half,
        ci_high=estimate + half,
        tau2=0.0,
        tau2_ci_low=None,
        tau2_ci_high=None,
        i2=max(0.0, (q - df) / q) if q > 0 else 0.0,
        h2=q / df,
        q=q,
        q_df=df,
        q_pvalue=float(special.chdtrc(df, q)),
        pi_low=None,
        pi_high=None,
        n_studies=int(y.size),
        interval_method="wald",
        notes=("fixed-effect model: tau^2 = 0 by assumption",),
        level=level,
    )


def random_effects(
    estimates: ArrayLike,
    variances: ArrayLike,
    method: Literal["DL", "REML", "PM"] = "DL",
    interval: Literal["wald", "hksj"] = "wald",
    level: float = 0.95,
    tau2_interval: bool = True,
    hksj_truncation: bool = True,
) -> PooledEstimate:
    r"""Random-effects pooled estimate with heterogeneity statistics.

    Parameters
    ----------
    estimates : array_like of shape (k,)
        Per-study estimates on an additive scale, k >= 2.
    variances : array_like of shape (k,)
        Their within-study variances, all positive.
    method : {"DL", "REML", "PM"}, default "DL"
        Estimator of :math:`\tau^2`: DerSimonian–Laird moment estimator (floored at 0), restricted
        maximum likelihood (Fisher scoring, truncated at 0), or Paule–Mandel.
    interval : {"wald", "hksj"}, default "wald"
        ``"wald"``: :math:`\hat\mu \pm z\,\mathrm{SE}`, :math:`\mathrm{SE} = (\sum w_i)^{-1/2}`.
        ``"hksj"``: Hartung–Knapp–Sidik–Jonkman, :math:`\hat\mu \pm t_{k-1}\,\mathrm{SE}_{HK}` with
        :math:`\mathrm{SE}_{HK}^2 = \max(1, q)/\sum w_i`, :math:`q = \sum w_i (y_i - \hat\mu)^2/(k-1)`:
        the ad hoc variance correction of Knapp & Hartung (2003), so the interval is never narrower than
        the Wald interval (Röver, Knapp & Friede 2015). ``hksj_truncation=False`` gives the untruncated
        form (metafor's ``test="knha"``).
    level : float, default 0.95
        Confidence level for the estimate, :math:`\tau^2` and the prediction interval.
    hksj_truncation : bool, default True
        Apply the :math:`\max(1, q)` correction to the HKSJ variance (ignored for ``"wald"``).
    tau2_interval : bool, default True
        Compute the Q-profile interval for :math:`\tau^2` (two root-findings, most of the cost for large k);
        when False, ``tau2_ci_low`` and ``tau2_ci_high`` are ``None``.

    Returns
    -------
    PooledEstimate

    Notes
    -----
    - :math:`\hat\tau^2_{DL} = \max\{0, (Q - (k-1)) / (\sum w - \sum w^2/\sum w)\}`, :math:`w = 1/v`.
    - Paule–Mandel solves :math:`\sum w_i(\tau^2)(y_i - \hat\mu(\tau^2))^2 = k - 1`.
    - :math:`I^2 = \hat\tau^2/(\hat\tau^2 + s^2)` and :math:`H^2 = (\hat\tau^2 + s^2)/s^2` with the typical
      within-study variance :math:`s^2 = (k-1)\sum w/((\sum w)^2 - \sum w^2)` (metafor's definition; for
      DL it equals the usual :math:`\max\{0, (Q-df)/Q\}`).
    - The :math:`\tau^2` interval is the Q-profile interval, which does not depend on ``method``.
    - Prediction interval (one convention across the package; Higgins, Thompson & Spiegelhalter 2009,
      eq. 12): :math:`\hat\mu \pm t_{k-2}\sqrt{\hat\tau^2 + \mathrm{SE}_{RE}^2}` with the model-based
      random-effects standard error :math:`\mathrm{SE}_{RE} = (\sum w_i)^{-1/2}`, whatever ``interval`` is;
      ``None`` when k < 3.

    References
    ----------
    DerSimonian R, Laird N (1986). Meta-analysis in clinical trials. Control Clin Trials 7:177–188.
    Paule RC, Mandel J (1982). Consensus values and weighting factors. J Res Natl Bur Stand 87:377–385.
    Viechtbauer W (2005). Bias and efficiency of meta-analytic variance estimators in the random-effects
    model. J Educ Behav Stat 30:261–293. Viechtbauer W (2007). Confidence intervals for the amount of
    heterogeneity in meta-analysis. Stat Med 26:37–52. Higgins JPT, Thompson SG (2002). Quantifying
    heterogeneity in a meta-analysis. Stat Med 21:1539–1558. Hartung J, Knapp G (2001). Stat Med
    20:3875–3889; Sidik K, Jonkman JN (2002). Stat Med 21:3153–3159. Higgins JPT, Thompson SG,
    Spiegelhalter DJ (2009). A re-evaluation of random-effects meta-analysis. JRSS A 172:137–159.
    Knapp G, Hartung J (2003). Improved tests for a random effects meta-regression with a single
    covariate. Stat Med 22:2693–2710. Röver C, Knapp G, Friede T (2015). Hartung-Knapp-Sidik-Jonkman
    approach and its modification for random-effects meta-analysis with few studies. BMC Med Res
    Methodol 15:99.
    """
    y, v = _check_studies(estimates, variances)
    level = _check_level(level)
    if method not in ("DL", "REML", "PM"):
        raise ValueError(f"method must be 'DL', 'REML' or 'PM', got {method!r}")
    if interval not in ("wald", "hksj"):
        raise ValueError(f"interval must be 'wald' or 'hksj', got {interval!r}")
    k, df = int(y.size), int(y.size) - 1
    notes: list[str] = []

    if method == "DL":
        tau2 = _tau2_dersimonian_laird(y, v)
    elif method == "PM":
        tau2 = _tau2_paule_mandel(y, v)
    else:
        tau2, converged = _tau2_reml(y, v)
        if not converged:
            tau2 = _tau2_reml_fallback(y, v)
            notes.append("REML Fisher scoring did not converge; tau^2 from bounded likelihood maximisation")
    if tau2 == 0.0:
        notes.append("tau^2 estimate truncated at 0 (no heterogeneity beyond sampling error)")

    w = 1.0 / (v + tau2)
    estimate = _weighted_mean(y, w)
    alpha = 1.0 - level
    se_random = math.sqrt(1.0 / w.sum())
    if interval == "wald":
        se = se_random
        critical = float(-special.ndtri(alpha / 2))
    else:
        factor = float(np.dot(w, (y - estimate) ** 2)) / df
        if hksj_truncation and factor < 1.0:
            factor = 1.0
            notes.append("Hartung-Knapp variance factor below 1 set to 1: the interval is never narrower than Wald")
        se = math.sqrt(factor) * se_random
        critical = float(special.stdtrit(df, 1 - alpha / 2))

    q = _generalised_q(y, v, 0.0)
    typical = _typical_variance(v)
    tau2_low: float | None = None
    tau2_high: float | None = None
    if tau2_interval:
        tau2_low, tau2_high = _tau2_q_profile(y, v, level)
        if tau2_high == 0.0:
            notes.append("Q-profile interval for tau^2 lies at 0: the data are more homogeneous than expected")

    if k >= 3:
        half_prediction = float(special.stdtrit(k - 2, 1 - alpha / 2)) * math.sqrt(tau2 + se_random**2)
        pi_low, pi_high = estimate - half_prediction, estimate + half_prediction
    else:
        pi_low = pi_high = None
        notes.append("prediction interval undefined with fewer than 3 studies")

    return PooledEstimate(
        method=method,
        estimate=estimate,
        se=se,
        ci_low=estimate - critical * se,
        ci_high=estimate + critical * se,
        tau2=tau2,
        tau2_ci_low=tau2_low,
        tau2_ci_high=tau2_high,
        i2=tau2 / (tau2 + typical),
        h2=(tau2 + typical) / typical,
        q=q,
        q_df=df,
        q_pvalue=float(special.chdtrc(df, q)),
        pi_low=pi_low,
        pi_high=pi_high,
        n_studies=k,
        interval_method=interval,
        notes=tuple(notes),
        level=level,
    )
