r"""Fitting the exact binomial bivariate GLMM: maximum likelihood, and maximisation over any subset of the
parameters (the building block of profile likelihoods). The model and its references are in
:mod:`federation.stats.glmm`; the marginal likelihood in :mod:`federation.stats.glmm.quadrature`.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray
from scipy import optimize
from threadpoolctl import ThreadpoolController

from federation.protocol.words import withheld_cells
from federation.stats.bivariate import BivariateFit, reitsma, summarise_bivariate
from federation.stats.glmm.quadrature import AdaptiveQuadrature, Design, between
from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError, SiteExclusion
from federation.stats.suppression import SiteEvidence, site_evidence
from federation.stats.tables import ReleasedTable

__all__ = [
    "BOUNDS",
    "PARAMETERS",
    "GlmmLikelihood",
    "binomial_glmm",
    "glmm_accuracy",
    "glmm_evidence",
    "glmm_fit",
    "glmm_refit_without",
    "one_blas_thread",
]

_LOG_SD_BOUNDS = (math.log(1e-3), math.log(20.0))
_ATANH_BOUND = 3.8  # |rho| <= 0.999
_MEAN_BOUND = 15.0
_CONTROLLER: ThreadpoolController | None = None


def one_blas_thread() -> Any:
    """A context in which BLAS runs on one thread. Every matrix of the fit is tiny (2x2 per site, 5x5 for
    the parameters): OpenBLAS threads waiting for a busy core cost far more than they give (L-BFGS-B's own
    small BLAS calls took 9 ms each on a loaded 2-core machine, a third of a 50-site fit)."""
    global _CONTROLLER
    if _CONTROLLER is None:  # scanning the loaded libraries is slow: once per process
        _CONTROLLER = ThreadpoolController()
    return _CONTROLLER.limit(limits=1, user_api="blas")


PARAMETERS = ("mean logit Se", "mean logit FPR", "SD logit Se", "SD logit FPR", "correlation")
BOUNDS = ((-_MEAN_BOUND, _MEAN_BOUND),) * 2 + (_LOG_SD_BOUNDS,) * 2 + ((-_ATANH_BOUND, _ATANH_BOUND),)


class GlmmLikelihood:
    """The GLMM's marginal log-likelihood in :math:`\\theta = (\\mu_1, \\mu_2, \\log\\sigma_1,
    \\log\\sigma_2, \\operatorname{atanh}\\rho)`, with maximisation over any subset of the parameters
    (the others held at given values): the building block of the fit and of profile likelihoods."""

    def __init__(self, quadrature: AdaptiveQuadrature) -> None:
        self.quadrature = quadrature
        self.evaluations = 0

    def negative(self, theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        self.evaluations += 1
        value, gradient = self.quadrature.value_and_gradient(theta)
        if not math.isfinite(value) or not np.all(np.isfinite(gradient)):
            return 1e300, np.zeros(5)
        return -value, -gradient

    def negative_with_hessian(
        self, theta: NDArray[np.float64]
    ) -> tuple[float, NDArray[np.float64], NDArray[np.float64] | None]:
        """Negative log-likelihood, its gradient and its Hessian (nodes held fixed; None where not finite)."""
        self.evaluations += 1
        value, gradient, hessian = self.quadrature.value_gradient_hessian(theta)
        if not (math.isfinite(value) and np.all(np.isfinite(gradient)) and np.all(np.isfinite(hessian))):
            return 1e300, np.zeros(5), None
        return -value, -gradient, -hessian

    def newton(
        self, theta0: NDArray[np.float64], free: Sequence[int], tolerance: float = 1e-10, steps: int = 30
    ) -> tuple[NDArray[np.float64], float, bool]:
        """Maximise over ``free`` from ``theta0`` by Newton steps with the analytic Hessian.

        The Hessian is made positive definite (absolute eigenvalues, floored), steps are capped at 2 on the
        parameters' scale and halved until the likelihood rises enough (Armijo), and a parameter on its bound
        that the gradient pushes outwards is held there. Converged when the Newton decrement
        :math:`g^\top H^{-1} g / 2` (the expected further gain) is below ``tolerance``. Returns (theta,
        negative log-likelihood, converged); near a good start it needs a handful of evaluations where a
        quasi-Newton method needs dozens.
        """
        free = list(free)
        low = np.array([BOUNDS[i][0] for i in free])
        high = np.array([BOUNDS[i][1] for i in free])
        theta = np.array(theta0, dtype=float)
        theta[free] = np.clip(theta[free], low, high)
        nll, gradient, hessian = self.negative_with_hessian(theta)
        if hessian is None:
            return theta, nll, False
        for _ in range(steps):
            x, g = theta[free], gradient[free]
            move = ~(((x <= low + 1e-12) & (g > 0)) | ((x >= high - 1e-12) & (g < 0)))
            if not move.any():
                return theta, nll, True
            h = hessian[np.ix_(free, free)][np.ix_(move, move)]
            values, vectors = np.linalg.eigh(0.5 * (h + h.T))
            floor = max(float(np.max(np.abs(values))), 1e-8) * 1e-8
            step = -(vectors / np.maximum(np.abs(values), floor)) @ (vectors.T @ g[move])
            decrement = float(-g[move] @ step)
            if 0.5 * decrement < tolerance:  # a maximum only where the likelihood is concave (not a saddle)
                return theta, nll, bool(np.min(values) > -1e-8 * np.max(np.abs(values)))
            step *= min(1.0, 2.0 / float(np.max(np.abs(step))))
            scale = 1.0
            for _ in range(5):  # a step halved five times: the quadratic guide is poor here
                trial = theta.copy()
                moved = x.copy()
                moved[move] += scale * step
                trial[free] = np.clip(moved, low, high)
                value, trial_gradient, trial_hessian = self.negative_with_hessian(trial)
                if trial_hessian is not None and value <= nll - 1e-4 * scale * decrement:
                    break
                scale *= 0.5
            else:  # no step gains: at the maximum to the accuracy of the gradient, or a poor quadratic guide
                return theta, nll, 0.5 * decrement < 100 * tolerance
            theta, nll, gradient, hessian = trial, value, trial_gradient, trial_hessian
        return theta, nll, False

    def maximise(
        self,
        theta0: NDArray[np.float64],
        free: Sequence[int],
        tolerance: float = 1e-10,
        gtol: float = 1e-6,
        maxiter: int = 400,
    ) -> tuple[NDArray[np.float64], float, bool]:
        """Maximise over ``free`` from ``theta0``; returns (theta, negative log-likelihood, converged)."""
        free = list(free)
        base = np.array(theta0, dtype=float)

        def objective(x: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
            theta = base.copy()
            theta[free] = x
            value, gradient = self.negative(theta)
            return value, gradient[free]

        found = optimize.minimize(
            objective,
            np.clip(base[free], [BOUNDS[i][0] for i in free], [BOUNDS[i][1] for i in free]),
            jac=True,
            method="L-BFGS-B",
            bounds=[BOUNDS[i] for i in free],
            options={"ftol": tolerance, "gtol": gtol, "maxiter": maxiter},
        )
        theta = base.copy()
        theta[free] = found.x
        # L-BFGS-B stops on its line search when the gradient is approximate; a small |gradient| is success.
        converged = bool(found.success) or float(np.max(np.abs(found.jac))) < 1e-3
        return theta, float(found.fun), converged

    @staticmethod
    def on_bound(theta: NDArray[np.float64], free: Sequence[int]) -> list[str]:
        return [
            PARAMETERS[i] for i in free if abs(theta[i] - BOUNDS[i][0]) < 1e-6 or abs(theta[i] - BOUNDS[i][1]) < 1e-6
        ]

    def hessian(self, theta: NDArray[np.float64], free: Sequence[int], step: float = 1e-4) -> NDArray[np.float64]:
        """Hessian of the negative log-likelihood in ``free``, by central differences of the gradient."""
        free = list(free)
        hess = np.empty((len(free), len(free)))
        for j, i in enumerate(free):
            e = np.zeros(5)
            e[i] = step
            hess[j] = (self.negative(theta + e)[1][free] - self.negative(theta - e)[1][free]) / (2 * step)
        return 0.5 * (hess + hess.T)


def _start(evidence: Sequence[SiteEvidence]) -> NDArray[np.float64]:
    """Starting values from crude pooled logits; between-site SD 0.5, correlation 0."""
    tp = sum(float(np.mean(v)) for ev in evidence for v in ev.tp_values[:1])
    n1 = sum(float(ev.positives[0]) for ev in evidence)
    fp = sum(float(np.mean(v)) for ev in evidence for v in ev.fp_values[:1])
    n0 = sum(float(ev.negatives[0]) for ev in evidence)
    return np.array(
        [
            math.log((tp + 0.5) / (n1 - tp + 0.5)),
            math.log((fp + 0.5) / (n0 - fp + 0.5)),
            math.log(0.5),
            math.log(0.5),
            0.0,
        ]
    )


def binomial_glmm(
    evidence: Sequence[SiteEvidence],
    points: int = 7,
    correlation: float | None = None,
    level: float = 0.95,
    start: Sequence[float] | None = None,
    excluded: Sequence[SiteExclusion] = (),
    notes: Sequence[str] = (),
    interval: Literal["t", "z"] = "t",
) -> BivariateFit:
    r"""Fit the exact binomial bivariate GLMM by maximum likelihood with adaptive Gauss–Hermite quadrature.

    Parameters
    ----------
    evidence : sequence of SiteEvidence
        One per site (:func:`federation.stats.suppression.site_evidence`); at least 2.
    points : int, default 7
        Gauss–Hermite points per dimension (``points**2`` nodes per site).
    correlation : float, optional
        Fix the between-site correlation (fewer than 4 sites: fixed at 0, a fallback named in ``notes``).
    level : float, default 0.95
    start : sequence of 5 floats, optional
        Starting :math:`(\mu_1, \mu_2, \log\sigma_1, \log\sigma_2, \operatorname{atanh}\rho)`.
    excluded, notes : sequence, optional
        Passed through to the result.
    interval : {"t", "z"}, default "t"
        Quantile for the Wald intervals of the summary point: Student's t on k − 2 degrees of freedom
        (k sites; the default of SAS PROC NLMIXED, number of subjects minus number of random effects, which
        Chu & Cole (2006) used; from memory), or the normal quantile.

    Returns
    -------
    BivariateFit
        ``estimator = "ML-AGHQ"``; ``log_likelihood`` is the maximised marginal log-likelihood.

    Notes
    -----
    The between-site SDs are bounded in [0.001, 20] and :math:`|\rho| \le 0.999`; an estimate on a bound
    is named in ``notes``. When the Hessian is not positive definite (a boundary estimate), the SEs of
    :math:`\hat\mu` are taken from the Hessian of the means alone, with the variance parameters held at
    their estimates (also named in ``notes``).
    """
    with one_blas_thread():
        return _fit(evidence, points, correlation, level, start, excluded, notes, interval)[0]


def _fit(
    evidence: Sequence[SiteEvidence],
    points: int,
    correlation: float | None,
    level: float,
    start: Sequence[float] | None,
    excluded: Sequence[SiteExclusion],
    notes: Sequence[str],
    interval: Literal["t", "z"],
) -> tuple[BivariateFit, GlmmLikelihood, NDArray[np.float64], float, list[int], NDArray[np.float64]]:
    """The fit and what a profile likelihood needs: likelihood, estimates, minimum, free parameters, Hessian."""
    if len(evidence) < 2:
        raise PoolingError(f"the binomial GLMM needs at least 2 sites, got {len(evidence)}")
    if interval not in ("t", "z"):
        raise PoolingError(f"interval must be 't' or 'z', got {interval!r}")
    if not isinstance(points, int) or not 1 <= points <= 40:
        raise PoolingError("points must be a whole number between 1 and 40")
    level = _check_level(level)
    notes = list(notes)
    if correlation is None and len(evidence) < 4:
        correlation = 0.0
        notes.append("fewer than 4 sites: between-site correlation fixed at 0 (fallback)")
    if correlation is not None and not -0.999 <= float(correlation) <= 0.999:
        raise PoolingError("a fixed correlation must lie in [-0.999, 0.999]")
    quadrature = AdaptiveQuadrature(Design(evidence), points)
    theta0 = np.array(start, dtype=float) if start is not None else _start(evidence)
    if theta0.shape != (5,) or not np.all(np.isfinite(theta0)):
        raise PoolingError("start must hold 5 finite numbers")
    theta0[2:4] = np.clip(theta0[2:4], *_LOG_SD_BOUNDS)
    theta0[4] = np.clip(theta0[4], -_ATANH_BOUND, _ATANH_BOUND)
    free = [0, 1, 2, 3] if correlation is not None else [0, 1, 2, 3, 4]
    if correlation is not None:
        theta0[4] = math.atanh(float(correlation))

    likelihood = GlmmLikelihood(quadrature)
    # L-BFGS-B from the start, not Newton: far from the maximum, Newton steps can settle on a lesser local
    # maximum with the correlation on its bound; near one (a profile's next point) they are faster.
    theta, value, success = likelihood.maximise(theta0, free)
    if not success:
        notes.append("the likelihood maximiser reported incomplete convergence; estimates are the best found")
    hess = likelihood.hessian(theta, free)
    fit = _summary(
        evidence, theta, value, free, hess, correlation is not None, excluded, notes, level, points, interval
    )
    return fit, likelihood, theta, value, free, hess


def _summary(
    evidence: Sequence[SiteEvidence],
    theta: NDArray[np.float64],
    value: float,
    free: list[int],
    hess: NDArray[np.float64],
    correlation_fixed: bool,
    excluded: Sequence[SiteExclusion],
    notes: list[str],
    level: float,
    points: int,
    interval: Literal["t", "z"],
) -> BivariateFit:
    """The fit's result from its estimates and the Hessian of the negative log-likelihood in ``free``."""
    on_bound = GlmmLikelihood.on_bound(theta, free)
    if on_bound:
        notes.append("estimate on its bound: " + ", ".join(on_bound))
    mean_cov = None
    if not on_bound:
        try:
            np.linalg.cholesky(hess)
            mean_cov = np.linalg.inv(hess)[:2, :2]
        except np.linalg.LinAlgError:
            mean_cov = None
    if mean_cov is None or not np.all(np.isfinite(mean_cov)) or np.any(np.diag(mean_cov) <= 0):
        try:
            mean_cov = np.linalg.inv(hess[:2, :2])
        except np.linalg.LinAlgError as error:
            raise PoolingError("the likelihood is flat in the summary point: it cannot be estimated") from error
        notes.append("standard errors of the means from their own Hessian, variance parameters held fixed (fallback)")
        if not np.all(np.isfinite(mean_cov)) or np.any(np.diag(mean_cov) <= 0):
            raise PoolingError("the likelihood is flat in the summary point: it cannot be estimated")
    label = f"exact binomial GLMM (Chu & Cole 2006), ML by adaptive Gauss-Hermite quadrature ({points}x{points} points)"
    if any(ev.censored for ev in evidence):
        label += "; suppressed cells interval-censored"
    return summarise_bivariate(
        method=label,
        estimator="ML-AGHQ",
        mean=theta[:2],
        mean_cov=mean_cov,
        between=between(theta),
        log_likelihood=-value,
        correlation_fixed=correlation_fixed,
        site_ids=[ev.site_id for ev in evidence],
        excluded=excluded,
        notes=notes,
        level=level,
        degrees_of_freedom=max(len(evidence) - 2, 1) if interval == "t" else None,
    )


def glmm_refit_without(
    likelihood: GlmmLikelihood,
    evidence: Sequence[SiteEvidence],
    omit: int,
    theta: NDArray[np.float64],
    free: Sequence[int],
    level: float = 0.95,
) -> BivariateFit:
    """The GLMM refitted without site ``omit`` of ``evidence``, started from a fit to all of it.

    The refit starts at that fit's estimates ``theta`` and, for every remaining site, at its random effects'
    modes, so Newton steps with the analytic Hessian reach the nearby maximum in a few evaluations (L-BFGS-B
    from there if they do not). Wald intervals of the summary point from the analytic Hessian, t on k − 2 df
    (k the remaining sites); parameters that the full fit put on a bound may stay there.

    Parameters
    ----------
    likelihood : GlmmLikelihood
        The likelihood of the full fit (its quadrature remembers the modes at ``theta``).
    evidence : sequence of SiteEvidence
        The full fit's sites, in its order.
    omit : int
        Index of the site to leave out.
    theta : (5,) ndarray
        The full fit's estimates.
    free : sequence of int
        The parameters to estimate (the others held at ``theta``).
    level : float, default 0.95

    Returns
    -------
    BivariateFit
    """
    rest = [ev for i, ev in enumerate(evidence) if i != omit]
    if len(rest) < 2:
        raise PoolingError(f"the binomial GLMM needs at least 2 sites, got {len(rest)}")
    full = likelihood.quadrature
    quadrature = AdaptiveQuadrature(Design(rest), full.points)
    quadrature.modes = full.modes[full.design.unit_site != omit].copy()
    refit = GlmmLikelihood(quadrature)
    free = list(free)
    found, value, converged = refit.newton(theta, free)
    if not converged:
        found, value, converged = refit.maximise(found, free)
    notes = ["refitted from the fit to every site; standard errors from the analytic Hessian"]
    if not converged:
        notes.append("the likelihood maximiser reported incomplete convergence; estimates are the best found")
    _, _, hessian = refit.negative_with_hessian(found)
    if hessian is None:
        raise PoolingError("the likelihood is not finite at the refit's estimates")
    return _summary(
        rest, found, value, free, hessian[np.ix_(free, free)], 4 not in free, (), notes, level, full.points, "t"
    )


def glmm_accuracy(
    tables: Sequence[ReleasedTable],
    suppressed: Literal["censor", "drop"] = "censor",
    points: int = 7,
    correlation: float | None = None,
    level: float = 0.95,
    interval: Literal["t", "z"] = "t",
) -> BivariateFit:
    """Exact binomial GLMM from released tables, with suppressed sites censored (default) or dropped.

    Parameters
    ----------
    tables : sequence of ReleasedTable
    suppressed : {"censor", "drop"}, default "censor"
        ``"censor"``: a site with suppressed cells contributes the probability of the tables its
        release allows (suppression-aware pooling). ``"drop"``: such sites are not pooled.
    points, correlation, level, interval
        As in :func:`binomial_glmm`.

    Returns
    -------
    BivariateFit
        Sites that could not be used are in ``sites_not_pooled`` with the reason.
    """
    evidence, excluded = glmm_evidence(tables, suppressed)
    return binomial_glmm(
        evidence,
        points=points,
        correlation=correlation,
        level=level,
        start=_start_from_tables(tables, evidence),
        excluded=excluded,
        interval=interval,
    )


def glmm_fit(
    evidence: Sequence[SiteEvidence],
    tables: Sequence[ReleasedTable],
    excluded: Sequence[SiteExclusion],
    points: int = 7,
    level: float = 0.95,
) -> tuple[BivariateFit, GlmmLikelihood, NDArray[np.float64], float, list[int], NDArray[np.float64]]:
    """Fit with the correlation free; return the fit and what profile likelihoods need (see :func:`_fit`)."""
    with one_blas_thread():
        start = _start_from_tables(tables, evidence)
        return _fit(evidence, points, None, level, start, excluded, (), "t")


def glmm_evidence(
    tables: Sequence[ReleasedTable], suppressed: Literal["censor", "drop"] = "censor", minimum: int = 2
) -> tuple[list[SiteEvidence], list[SiteExclusion]]:
    """Each usable site's likelihood evidence, and the sites that cannot be used with the reason.

    Raises :class:`PoolingError` when fewer than ``minimum`` sites are usable."""
    if suppressed not in ("censor", "drop"):
        raise PoolingError(f"suppressed must be 'censor' or 'drop', got {suppressed!r}")
    evidence: list[SiteEvidence] = []
    excluded: list[SiteExclusion] = []
    for table in tables:
        if not table.is_complete and suppressed == "drop":
            excluded.append(SiteExclusion(table.site_id, withheld_cells(table.suppressed)))
            continue
        try:
            ev = site_evidence(table)
        except PoolingError as error:
            excluded.append(SiteExclusion(table.site_id, str(error)))
            continue
        if np.all(ev.positives == 0) and np.all(ev.negatives == 0):
            excluded.append(SiteExclusion(table.site_id, "no participants analysed"))
            continue
        evidence.append(ev)
    if len(evidence) < minimum:
        raise PoolingError(f"the binomial GLMM needs at least {minimum} usable sites, got {len(evidence)}")
    return evidence, excluded


def _start_from_tables(tables: Sequence[ReleasedTable], evidence: Sequence[SiteEvidence]) -> list[float] | None:
    """Starting values from the normal-approximation model of the complete tables, when there are two."""
    start = None
    complete = [t for t in tables if t.is_complete and t.site_id in {ev.site_id for ev in evidence}]
    if len(complete) >= 2:
        try:
            approx = reitsma(complete, correlation=0.0)
            start = [
                approx.mean_logit_sensitivity,
                approx.mean_logit_fpr,
                0.5 * math.log(max(approx.tau2_logit_sensitivity, 1e-4)),
                0.5 * math.log(max(approx.tau2_logit_fpr, 1e-4)),
                0.0,
            ]
        except PoolingError:
            start = None
    return start
