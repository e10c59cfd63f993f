"""The bivariate normal random-effects model (Reitsma et al. 2005): its likelihood, the fit, and
:func:`reitsma` from released 2×2 tables.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import optimize

from federation.protocol.words import withheld_cells
from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError, SiteExclusion
from federation.stats.tables import ReleasedTable
from federation.stats.univariate import random_effects

from .geometry import _ZERO_VARIANCE, summarise_bivariate
from .results import BivariateFit

_MIN_SITES_FOR_CORRELATION = 4  # below this the correlation is fixed at 0 (Takwoingi et al. 2017)


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
