r"""Exact binomial bivariate random-effects model (GLMM) for sensitivity and false-positive rate.

Per site :math:`i`, :math:`TP_i \sim \mathrm{Bin}(n_{1i}, \mathrm{expit}(\mu_1 + u_{1i}))` and
:math:`FP_i \sim \mathrm{Bin}(n_{0i}, \mathrm{expit}(\mu_2 + u_{2i}))` with
:math:`u_i \sim N_2(0, \Psi)`: the model of Chu & Cole (2006), on the (logit sensitivity, logit FPR)
scale used throughout :mod:`federation.stats.bivariate`. No continuity correction is needed. A site
with suppressed cells contributes, in place of the binomial probabilities, the probability of the
set of tables its release allows (:mod:`federation.stats.suppression`), so it stays in the pool.

The marginal likelihood of each site, :math:`\int L_i(\mu + u)\,\phi(u; \Psi)\,du`, is computed by
adaptive Gauss–Hermite quadrature: the integrand's mode :math:`\hat u_i` is found by damped Newton
steps (all sites at once), the product Gauss–Hermite grid is centred there and scaled by the
curvature, and the five parameters :math:`(\mu_1, \mu_2, \log\sigma_1, \log\sigma_2,
\operatorname{atanh}\rho)` are estimated by maximum likelihood (L-BFGS-B). Standard errors of
:math:`\hat\mu` come from the numerical Hessian of the log-likelihood.

References
----------
Chu H, Cole SR (2006). Bivariate meta-analysis of sensitivity and specificity with sparse data: a
generalized linear mixed model approach. J Clin Epidemiol 59:1331–1332. Pinheiro JC, Bates DM (1995).
Approximations to the log-likelihood function in the nonlinear mixed-effects model. J Comput Graph
Stat 4:12–35 (adaptive Gauss–Hermite quadrature). Liu Q, Pierce DA (1994). A note on Gauss–Hermite
quadrature. Biometrika 81:624–629. Hamza TH, van Houwelingen HC, Stijnen T (2008). The binomial
distribution of meta-analysis was preferred to model within-study variability. J Clin Epidemiol 61:41–51.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from scipy import optimize, special

from federation.protocol.words import withheld_cells
from federation.stats.bivariate import BivariateFit, reitsma, summarise_bivariate
from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError, SiteExclusion
from federation.stats.suppression import SiteEvidence, site_evidence
from federation.stats.tables import ReleasedTable

__all__ = ["GlmmLikelihood", "binomial_glmm", "glmm_accuracy", "glmm_evidence", "glmm_fit", "marginal_log_likelihood"]

_LOG_SD_BOUNDS = (math.log(1e-3), math.log(20.0))
_ATANH_BOUND = 3.8  # |rho| <= 0.999
_MEAN_BOUND = 15.0
_NEWTON_TOLERANCE = 1e-10
_NEWTON_ITERATIONS = 60
_MAX_UNITS = 200_000


def _runs(values: NDArray[np.int64]) -> list[NDArray[np.int64]]:
    """Split integer values into runs of consecutive integers (each run gives a unimodal likelihood)."""
    ordered = np.sort(np.asarray(values, dtype=np.int64))
    return np.split(ordered, np.flatnonzero(np.diff(ordered) != 1) + 1)


class _Design:
    """The integration units of all sites, flattened into arrays for vectorised segment sums.

    A unit is one block of a site's evidence with one run of consecutive TP values and one run of
    consecutive FP values, so its likelihood w * F(eta1) * G(eta2) is unimodal and separable; a site's
    likelihood is the sum over its units. Integrating unit by unit keeps adaptive quadrature accurate (and the
    marginal likelihood smooth) when a suppressed cell allows values at both ends of its margin.
    """

    def __init__(self, evidence: Sequence[SiteEvidence]) -> None:
        self.n_sites = len(evidence)
        unit_site, log_w, n1, n0 = [], [], [], []
        terms: dict[int, list[list[int]]] = {1: [[], [], []], 2: [[], [], []]}  # value, margin, unit
        site_start = []
        for site, ev in enumerate(evidence):
            site_start.append(len(unit_site))
            for b in range(ev.n_blocks):
                for run_tp in _runs(ev.tp_values[b]):
                    for run_fp in _runs(ev.fp_values[b]):
                        unit = len(unit_site)
                        unit_site.append(site)
                        log_w.append(math.log(ev.weights[b]))
                        n1.append(int(ev.positives[b]))
                        n0.append(int(ev.negatives[b]))
                        for side, values, margin in ((1, run_tp, n1[-1]), (2, run_fp, n0[-1])):
                            terms[side][0].extend(int(v) for v in values)
                            terms[side][1].extend([margin] * len(values))
                            terms[side][2].extend([unit] * len(values))
            if len(unit_site) > _MAX_UNITS:
                raise PoolingError("the releases leave too many possible tables to integrate over")
        self.n_units = len(unit_site)
        self.unit_site = np.array(unit_site)
        self.site_start = np.array(site_start)
        self.log_w = np.array(log_w)
        self.margin = (np.array(n1, dtype=float), np.array(n0, dtype=float))
        self.value, self.term_margin, self.term_unit, self.log_choose, self.unit_start = [], [], [], [], []
        for side in (1, 2):
            value = np.array(terms[side][0], dtype=float)
            margin = np.array(terms[side][1], dtype=float)
            units = np.array(terms[side][2])
            self.value.append(value)
            self.term_margin.append(margin)
            self.term_unit.append(units)
            self.log_choose.append(
                special.gammaln(margin + 1) - special.gammaln(value + 1) - special.gammaln(margin - value + 1)
            )
            self.unit_start.append(np.flatnonzero(np.r_[True, units[1:] != units[:-1]]))
        # The common case (every site released in full) needs no segment sums at all.
        self.exact = all(v.size == self.n_units for v in self.value)

    def _side(self, side: int, eta: NDArray[np.float64], derivatives: bool) -> tuple:
        """log F per unit (units x points) and, if asked, d log F and d^2 log F in eta."""
        j = side - 1
        e = eta if self.exact else eta[self.term_unit[j]]
        log_p, log_q = -np.logaddexp(0.0, -e), -np.logaddexp(0.0, e)
        t, n = self.value[j][:, None], self.term_margin[j][:, None]
        log_pmf = self.log_choose[j][:, None] + t * log_p + (n - t) * log_q
        if self.exact:
            if not derivatives:
                return (log_pmf,)
            p = np.exp(log_p)
            return log_pmf, t - n * p, -n * p * (1 - p)
        starts = self.unit_start[j]
        peak = np.maximum.reduceat(log_pmf, starts, axis=0)
        scaled = np.exp(log_pmf - peak[self.term_unit[j]])
        total = np.add.reduceat(scaled, starts, axis=0)
        log_f = peak + np.log(total)
        if not derivatives:
            return (log_f,)
        p = np.exp(log_p)
        a = t - n * p
        mean_a = np.add.reduceat(scaled * a, starts, axis=0) / total
        second = np.add.reduceat(scaled * (a * a - n * p * (1 - p)), starts, axis=0) / total
        return log_f, mean_a, second - mean_a * mean_a

    def log_likelihood(self, eta1: NDArray[np.float64], eta2: NDArray[np.float64], derivatives: bool = False):
        """Per-unit log L (units x points); with derivatives also d/d eta and d^2/d eta^2 of each factor."""
        side1 = self._side(1, eta1, derivatives)
        side2 = self._side(2, eta2, derivatives)
        log_l = self.log_w[:, None] + side1[0] + side2[0]
        if not derivatives:
            return log_l
        return log_l, side1[1], side2[1], side1[2], side2[2]

    def fisher(self, eta1: NDArray[np.float64], eta2: NDArray[np.float64]) -> tuple:
        """Expected information of the binomials (a negative-definite stand-in for the Hessian)."""
        p1, p2 = special.expit(eta1[:, 0]), special.expit(eta2[:, 0])
        return self.margin[0] * p1 * (1 - p1) + 1e-8, self.margin[1] * p2 * (1 - p2) + 1e-8


def _between(theta: NDArray[np.float64]) -> NDArray[np.float64]:
    s1, s2, rho = math.exp(theta[2]), math.exp(theta[3]), math.tanh(theta[4])
    return np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])


class _Quadrature:
    """Adaptive Gauss-Hermite marginal log-likelihood; remembers the last modes as warm starts."""

    def __init__(self, design: _Design, points: int) -> None:
        self.design = design
        x, w = np.polynomial.hermite.hermgauss(points)
        grid = np.array([(a, b) for a in x for b in x])
        self.nodes = grid  # (Q, 2)
        self.log_weights = np.array([math.log(wa) + math.log(wb) for wa in w for wb in w]) + np.sum(grid**2, axis=1)
        self.modes = np.zeros((design.n_units, 2))

    def _objective(self, mean: NDArray[np.float64], omega: NDArray[np.float64], u: NDArray[np.float64]):
        ll = self.design.log_likelihood(mean[0] + u[:, :1], mean[1] + u[:, 1:])[:, 0]
        return ll - 0.5 * np.einsum("si,ij,sj->s", u, omega, u)

    def _curvature(self, mean, omega, u):
        d = self.design
        _, g1, g2, h11, h22 = d.log_likelihood(mean[0] + u[:, :1], mean[1] + u[:, 1:], derivatives=True)
        grad = np.column_stack([g1[:, 0], g2[:, 0]]) - u @ omega
        hess = np.empty((d.n_units, 2, 2))
        bad = ~((h11[:, 0] <= 0) & (h22[:, 0] <= 0))
        if bad.any():  # not concave here: use the expected information instead
            i1, i2 = d.fisher(mean[0] + u[:, :1], mean[1] + u[:, 1:])
            h11[bad, 0], h22[bad, 0] = -i1[bad], -i2[bad]
        hess[:, 0, 0], hess[:, 1, 1] = h11[:, 0] - omega[0, 0], h22[:, 0] - omega[1, 1]
        hess[:, 0, 1] = hess[:, 1, 0] = -omega[0, 1]
        return grad, hess

    def modes_and_curvature(self, mean: NDArray[np.float64], between: NDArray[np.float64]):
        omega = np.linalg.inv(between)
        u = self.modes.copy()
        value = self._objective(mean, omega, u)
        for _ in range(_NEWTON_ITERATIONS):
            grad, hess = self._curvature(mean, omega, u)
            step = -np.linalg.solve(hess, grad[:, :, None])[:, :, 0]
            if np.max(np.abs(step)) < _NEWTON_TOLERANCE:
                self.modes = u  # converged: the curvature just computed is the one at the mode
                return u, hess, omega
            scale = np.ones(len(u))
            for _ in range(8):  # step halving, unit by unit, until the objective does not fall
                trial = u + scale[:, None] * step
                new = self._objective(mean, omega, trial)
                worse = ~(new >= value - 1e-12)
                if not worse.any():
                    break
                scale[worse] *= 0.5
            else:  # a unit whose objective still falls after 8 halvings is at its mode to rounding: stay
                scale[worse] = 0.0
                trial = u + scale[:, None] * step
                new = np.where(worse, value, new)
            gain = float(np.max(np.where(np.isfinite(new), new - value, 0.0)))
            u, value = trial, np.where(np.isfinite(new), new, value)
            if np.max(np.abs(scale[:, None] * step)) < _NEWTON_TOLERANCE or gain < 1e-13:
                break
        self.modes = u
        _, hess = self._curvature(mean, omega, u)
        return u, hess, omega

    def site_log_marginals(self, mean: NDArray[np.float64], between: NDArray[np.float64]) -> NDArray[np.float64]:
        return self._marginals(mean, between, None)[0]

    def value_and_gradient(self, theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        """Total marginal log-likelihood and its gradient in the five parameters.

        The gradient holds the quadrature's centres and scales fixed (the nodes of the adaptive rule at
        these parameters): with the rule nearly exact its dependence on them is negligible, and each
        gradient then costs one pass instead of the ten of central differences.
        """
        sites, gradient = self._marginals(theta[:2], _between(theta), theta)
        return float(np.sum(sites)), gradient

    def _marginals(self, mean, between, theta):
        u, hess, omega = self.modes_and_curvature(mean, between)
        cov = np.linalg.inv(-hess)
        chol = np.linalg.cholesky(cov)  # (U, 2, 2)
        points = u[:, None, :] + math.sqrt(2.0) * np.einsum("sij,qj->sqi", chol, self.nodes)  # (U, Q, 2)
        eta1, eta2 = mean[0] + points[:, :, 0], mean[1] + points[:, :, 1]
        if theta is None:
            ll = self.design.log_likelihood(eta1, eta2)
        else:
            ll, g1, g2, _, _ = self.design.log_likelihood(eta1, eta2, derivatives=True)
        _, log_det = np.linalg.slogdet(between)
        prior = -math.log(2 * math.pi) - 0.5 * log_det - 0.5 * np.einsum("sqi,ij,sqj->sq", points, omega, points)
        log_det_chol = np.log(chol[:, 0, 0] * chol[:, 1, 1])
        integrand = self.log_weights[None, :] + ll + prior
        units = math.log(2.0) + log_det_chol + special.logsumexp(integrand, axis=1)
        several = self.design.n_units != self.design.n_sites
        if several:
            starts = self.design.site_start
            peak = np.maximum.reduceat(units, starts)
            sites = peak + np.log(np.add.reduceat(np.exp(units - peak[self.design.unit_site]), starts))
        else:
            sites = units
        if theta is None:
            return sites, None
        weight = np.exp(integrand - special.logsumexp(integrand, axis=1, keepdims=True))  # (U, Q)
        if several:
            weight = weight * np.exp(units - sites[self.design.unit_site])[:, None]
        s1, s2, rho = math.exp(theta[2]), math.exp(theta[3]), math.tanh(theta[4])
        derivatives = (
            np.array([[2 * s1 * s1, rho * s1 * s2], [rho * s1 * s2, 0.0]]),
            np.array([[0.0, rho * s1 * s2], [rho * s1 * s2, 2 * s2 * s2]]),
            (1 - rho * rho) * np.array([[0.0, s1 * s2], [s1 * s2, 0.0]]),
        )
        gradient = np.empty(5)
        gradient[0] = float(np.sum(weight * g1))
        gradient[1] = float(np.sum(weight * g2))
        for j, d_between in enumerate(derivatives):
            a = omega @ d_between @ omega
            d_prior = -0.5 * np.trace(omega @ d_between) + 0.5 * np.einsum("sqi,ij,sqj->sq", points, a, points)
            gradient[2 + j] = float(np.sum(weight * d_prior))
        return sites, gradient


def marginal_log_likelihood(
    evidence: Sequence[SiteEvidence], mean: Sequence[float], between: Sequence[Sequence[float]], points: int = 7
) -> NDArray[np.float64]:
    """Each site's marginal log-likelihood at given parameters, by adaptive Gauss–Hermite quadrature.

    Parameters
    ----------
    evidence : sequence of SiteEvidence
    mean : (2,) array_like
        :math:`(\\mu_1, \\mu_2)`, logit sensitivity and logit FPR.
    between : (2, 2) array_like
        Between-site covariance :math:`\\Psi` (positive definite).
    points : int, default 7
        Gauss–Hermite points per dimension.

    Returns
    -------
    ndarray of shape (sites,)
    """
    quadrature = _Quadrature(_Design(evidence), points)
    return quadrature.site_log_marginals(np.asarray(mean, dtype=float), np.asarray(between, dtype=float))


PARAMETERS = ("mean logit Se", "mean logit FPR", "SD logit Se", "SD logit FPR", "correlation")
BOUNDS = ((-_MEAN_BOUND, _MEAN_BOUND),) * 2 + (_LOG_SD_BOUNDS,) * 2 + ((-_ATANH_BOUND, _ATANH_BOUND),)


class GlmmLikelihood:
    """The GLMM's marginal log-likelihood in :math:`\\theta = (\\mu_1, \\mu_2, \\log\\sigma_1,
    \\log\\sigma_2, \\operatorname{atanh}\\rho)`, with maximisation over any subset of the parameters
    (the others held at given values): the building block of the fit and of profile likelihoods."""

    def __init__(self, quadrature: _Quadrature) -> None:
        self.quadrature = quadrature
        self.evaluations = 0

    def negative(self, theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        self.evaluations += 1
        value, gradient = self.quadrature.value_and_gradient(theta)
        if not math.isfinite(value) or not np.all(np.isfinite(gradient)):
            return 1e300, np.zeros(5)
        return -value, -gradient

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
    design = _Design(evidence)
    quadrature = _Quadrature(design, points)
    theta0 = np.array(start, dtype=float) if start is not None else _start(evidence)
    if theta0.shape != (5,) or not np.all(np.isfinite(theta0)):
        raise PoolingError("start must hold 5 finite numbers")
    theta0[2:4] = np.clip(theta0[2:4], *_LOG_SD_BOUNDS)
    theta0[4] = np.clip(theta0[4], -_ATANH_BOUND, _ATANH_BOUND)
    free = [0, 1, 2, 3] if correlation is not None else [0, 1, 2, 3, 4]
    if correlation is not None:
        theta0[4] = math.atanh(float(correlation))

    likelihood = GlmmLikelihood(quadrature)
    theta, value, success = likelihood.maximise(theta0, free)
    if not success:
        notes.append("the likelihood maximiser reported incomplete convergence; estimates are the best found")
    on_bound = likelihood.on_bound(theta, free)
    if on_bound:
        notes.append("estimate on its bound: " + ", ".join(on_bound))
    hess = likelihood.hessian(theta, free)
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
    found_fun = value
    label = f"exact binomial GLMM (Chu & Cole 2006), ML by adaptive Gauss-Hermite quadrature ({points}x{points} points)"
    if any(ev.censored for ev in evidence):
        label += "; suppressed cells interval-censored"
    fit = summarise_bivariate(
        method=label,
        estimator="ML-AGHQ",
        mean=theta[:2],
        mean_cov=mean_cov,
        between=_between(theta),
        log_likelihood=-found_fun,
        correlation_fixed=correlation is not None,
        site_ids=[ev.site_id for ev in evidence],
        excluded=excluded,
        notes=notes,
        level=level,
        degrees_of_freedom=max(len(evidence) - 2, 1) if interval == "t" else None,
    )
    return fit, likelihood, theta, found_fun, free, hess


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
