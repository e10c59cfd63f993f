r"""The GLMM's marginal likelihood by adaptive Gauss–Hermite quadrature, vectorised over every site.

A site's likelihood given its random effects is a weighted sum, over the tables its release allows, of
products of two binomial probabilities (:mod:`federation.stats.suppression`). Its marginal likelihood
:math:`\int L_i(\mu + u)\,\phi(u; \Psi)\,du` is integrated unit by unit (:class:`Design`): the integrand's
mode is found by damped Newton steps (all units at once, warm-started from the previous parameter vector),
the product Gauss–Hermite grid is centred there and scaled by the curvature (Pinheiro & Bates 1995; Liu &
Pierce 1994), and the nodes so placed are used for the value, the gradient and the Hessian at that parameter
vector.

The censored sums are cheap because what does not depend on the parameters is computed once: a unit's
allowed values are consecutive integers :math:`t_0, t_0 + 1, \dots`, so
:math:`\log \sum_t \binom{n}{t} p^t q^{n-t} = t_0\eta + n\log q + \log\sum_t \binom{n}{t} e^{(t-t_0)\eta}`
(:math:`\eta = \mathrm{logit}\,p`) needs the fixed :math:`\log\binom{n}{t}` and offsets :math:`t - t_0` and
one multiply-add per allowed value and node; the logistic terms are computed per unit, not per value.

Gradient and Hessian hold the nodes fixed (the rule at these parameters): with the rule nearly exact the
dependence of the integral on where the nodes lie is negligible. Per node the log integrand's derivatives
in the means are the binomial scores, in the variance parameters those of the bivariate normal density,
and a site's derivatives are their averages under the node weights (the Hessian adds their weighted
covariance), all in one pass.

References
----------
Pinheiro JC, Bates DM (1995). Approximations to the log-likelihood function in the nonlinear mixed-effects
model. J Comput Graph Stat 4:12–35. Liu Q, Pierce DA (1994). A note on Gauss–Hermite quadrature.
Biometrika 81:624–629. Louis TA (1982). Finding the observed information matrix when using the EM
algorithm. J R Stat Soc B 44:226–233 (information as expected second derivative minus the variance of the
score, here under the node weights).
"""

from __future__ import annotations

import math
from collections.abc import Sequence

import numpy as np
from numpy.typing import NDArray
from scipy import special

from federation.stats.serial import PoolingError
from federation.stats.suppression import SiteEvidence

__all__ = ["AdaptiveQuadrature", "Design", "between", "marginal_log_likelihood"]

_NEWTON_TOLERANCE = 1e-10
_NEWTON_ITERATIONS = 60
_MAX_UNITS = 200_000


def _runs(values: NDArray[np.int64]) -> list[NDArray[np.int64]]:
    """Split integer values into runs of consecutive integers (each run gives a unimodal likelihood)."""
    ordered = np.sort(np.asarray(values, dtype=np.int64))
    return np.split(ordered, np.flatnonzero(np.diff(ordered) != 1) + 1)


def _logistic(eta: NDArray[np.float64]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """(log(1 - p), p) for p = expit(eta), accurate at both ends."""
    small = np.exp(-np.abs(eta))
    log_q = np.minimum(-eta, 0.0) - np.log1p(small)
    p = np.where(eta >= 0, 1.0, small) / (1.0 + small)
    return log_q, p


class Design:
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
        # Per side: the fixed parts of every allowed value's log binomial probability (computed once).
        self.term_unit, self.unit_start, self.log_choose, self.offset, self.first, self.single = [], [], [], [], [], []
        for side in (1, 2):
            value = np.array(terms[side][0], dtype=float)
            margin = np.array(terms[side][1], dtype=float)
            units = np.array(terms[side][2], dtype=np.int64)
            starts = np.flatnonzero(np.r_[True, units[1:] != units[:-1]])
            self.term_unit.append(units)
            self.unit_start.append(starts)
            self.log_choose.append(
                special.gammaln(margin + 1) - special.gammaln(value + 1) - special.gammaln(margin - value + 1)
            )
            self.first.append(value[starts])
            self.offset.append(value - value[starts][units])
            self.single.append(value.size == self.n_units)  # every unit allows one value on this side

    def _side(self, side: int, eta: NDArray[np.float64], derivatives: bool) -> tuple:
        """log F per unit (units x points) and, if asked, d log F and d^2 log F in eta."""
        j = side - 1
        n, first = self.margin[j][:, None], self.first[j][:, None]
        log_q, p = _logistic(eta)
        if self.single[j]:
            log_f = self.log_choose[j][:, None] + first * eta + n * log_q
            if not derivatives:
                return (log_f,)
            return log_f, first - n * p, -n * p * (1 - p)
        units, starts, offset = self.term_unit[j], self.unit_start[j], self.offset[j][:, None]
        log_terms = self.log_choose[j][:, None] + offset * eta[units]
        peak = np.maximum.reduceat(log_terms, starts, axis=0)
        scaled = np.exp(log_terms - peak[units])
        total = np.add.reduceat(scaled, starts, axis=0)
        log_f = peak + np.log(total) + first * eta + n * log_q
        if not derivatives:
            return (log_f,)
        weighted = scaled * offset
        mean = np.add.reduceat(weighted, starts, axis=0) / total  # E[t - t0] under the unit's allowed values
        square = np.add.reduceat(weighted * offset, starts, axis=0) / total
        return log_f, first + mean - n * p, (square - mean * mean) - n * p * (1 - p)

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


def between(theta: NDArray[np.float64]) -> NDArray[np.float64]:
    """The between-site covariance from (log SD, log SD, atanh correlation) in ``theta[2:5]``."""
    s1, s2, rho = math.exp(theta[2]), math.exp(theta[3]), math.tanh(theta[4])
    return np.array([[s1 * s1, rho * s1 * s2], [rho * s1 * s2, s2 * s2]])


def _between_derivatives(theta: NDArray[np.float64]) -> tuple[list, dict]:
    """First and second derivatives of the between-site covariance in (log SD1, log SD2, atanh rho)."""
    s1, s2, rho = math.exp(theta[2]), math.exp(theta[3]), math.tanh(theta[4])
    c, shrink = s1 * s2, 1 - rho * rho

    def sym(a: float, b: float, d: float) -> NDArray[np.float64]:
        return np.array([[a, b], [b, d]])

    first = [sym(2 * s1 * s1, rho * c, 0.0), sym(0.0, rho * c, 2 * s2 * s2), sym(0.0, shrink * c, 0.0)]
    second = {
        (0, 0): sym(4 * s1 * s1, rho * c, 0.0),
        (1, 1): sym(0.0, rho * c, 4 * s2 * s2),
        (0, 1): sym(0.0, rho * c, 0.0),
        (0, 2): sym(0.0, shrink * c, 0.0),
        (1, 2): sym(0.0, shrink * c, 0.0),
        (2, 2): sym(0.0, -2 * rho * shrink * c, 0.0),
    }
    return first, second


def _quadratic(matrix: NDArray[np.float64], squares: Sequence) -> NDArray[np.float64] | float:
    """u' M u from the squares (u0^2, u0 u1, u1^2) (arrays or their weighted sums)."""
    return matrix[0, 0] * squares[0] + 2 * matrix[0, 1] * squares[1] + matrix[1, 1] * squares[2]


class AdaptiveQuadrature:
    """Adaptive Gauss-Hermite marginal log-likelihood; remembers the last modes as warm starts."""

    def __init__(self, design: Design, points: int) -> None:
        self.design = design
        self.points = points
        x, w = np.polynomial.hermite.hermgauss(points)
        grid = np.array([(a, b) for a in x for b in x])
        self.nodes = grid  # (Q, 2)
        self.log_weights = np.array([math.log(wa) + math.log(wb) for wa in w for wb in w]) + np.sum(grid**2, axis=1)
        self.modes = np.zeros((design.n_units, 2))

    def _objective(self, mean: NDArray[np.float64], omega: NDArray[np.float64], u: NDArray[np.float64]):
        ll = self.design.log_likelihood(mean[0] + u[:, :1], mean[1] + u[:, 1:])[:, 0]
        return ll - 0.5 * _quadratic(omega, (u[:, 0] ** 2, u[:, 0] * u[:, 1], u[:, 1] ** 2))

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
        return self._marginals(mean, between)[0]

    def value_and_gradient(self, theta: NDArray[np.float64]) -> tuple[float, NDArray[np.float64]]:
        """Total marginal log-likelihood and its gradient in the five parameters (nodes held fixed)."""
        sites, gradient, _ = self._marginals(theta[:2], between(theta), theta)
        return float(np.sum(sites)), gradient

    def value_gradient_hessian(
        self, theta: NDArray[np.float64]
    ) -> tuple[float, NDArray[np.float64], NDArray[np.float64]]:
        """Total marginal log-likelihood, its gradient and its Hessian in the five parameters (nodes fixed)."""
        sites, gradient, hessian = self._marginals(theta[:2], between(theta), theta, hessian=True)
        return float(np.sum(sites)), gradient, hessian

    def value_and_unit_scores(
        self, mean1: NDArray[np.float64], mean2: NDArray[np.float64], theta: NDArray[np.float64]
    ) -> tuple[float, NDArray[np.float64], tuple[NDArray[np.float64], NDArray[np.float64]]]:
        """Total marginal log-likelihood with a mean per unit (``mean1``, ``mean2``: one value per unit, as a
        site covariate makes them), its gradient in the variance parameters ``theta[2:5]`` (entries 2-4 of the
        returned gradient) and each unit's derivatives in its two means (nodes held fixed)."""
        sites, gradient, scores = self._marginals(
            (mean1[:, None], mean2[:, None]), between(theta), theta, unit_means=True
        )
        return float(np.sum(sites)), gradient, scores

    def _marginals(self, mean, between_cov, theta=None, hessian: bool = False, unit_means: bool = False):
        design = self.design
        u, hess, omega = self.modes_and_curvature(mean, between_cov)
        chol = np.linalg.cholesky(np.linalg.inv(-hess))  # (U, 2, 2), lower
        x, y = math.sqrt(2.0) * self.nodes[:, 0], math.sqrt(2.0) * self.nodes[:, 1]
        u0 = u[:, :1] + chol[:, 0, :1] * x
        u1 = u[:, 1:] + chol[:, 1, :1] * x + chol[:, 1, 1:] * y
        squares = (u0 * u0, u0 * u1, u1 * u1)
        if theta is None:
            ll = design.log_likelihood(mean[0] + u0, mean[1] + u1)
        else:
            ll, g1, g2, h11, h22 = design.log_likelihood(mean[0] + u0, mean[1] + u1, derivatives=True)
        _, log_det = np.linalg.slogdet(between_cov)
        integrand = self.log_weights + ll - 0.5 * _quadratic(omega, squares)
        peak = np.max(integrand, axis=1, keepdims=True)
        scaled = np.exp(integrand - peak)
        total = np.sum(scaled, axis=1)
        units = (
            math.log(2.0)
            - math.log(2 * math.pi)
            - 0.5 * log_det
            + np.log(chol[:, 0, 0] * chol[:, 1, 1])
            + peak[:, 0]
            + np.log(total)
        )
        several = design.n_units != design.n_sites
        if several:
            starts = design.site_start
            top = np.maximum.reduceat(units, starts)
            sites = top + np.log(np.add.reduceat(np.exp(units - top[design.unit_site]), starts))
        else:
            sites = units
        if theta is None:
            return sites, None, None
        # Each node's weight in its site's integral (the site's posterior of the random effects, discretised).
        weight = scaled / total[:, None]
        if several:
            weight = weight * np.exp(units - sites[design.unit_site])[:, None]
        d_between, d2_between = _between_derivatives(theta)
        sums = [float(np.sum(weight * s)) for s in squares]
        k = design.n_sites
        # Per node, d log(prior)/d theta_j = -tr(Omega B_j)/2 + u' Omega B_j Omega u / 2
        forms = [omega @ b @ omega for b in d_between]
        traces = [float(np.trace(omega @ b)) for b in d_between]
        gradient = np.empty(5)
        unit_scores = (np.sum(weight * g1, axis=1), np.sum(weight * g2, axis=1))  # each unit's d/d(its means)
        gradient[0] = float(np.sum(unit_scores[0]))
        gradient[1] = float(np.sum(unit_scores[1]))
        for j in range(3):
            gradient[2 + j] = -0.5 * traces[j] * k + 0.5 * _quadratic(forms[j], sums)
        if unit_means:
            return sites, gradient, unit_scores
        if not hessian:
            return sites, gradient, None
        scores = np.stack(
            [g1, g2, *(-0.5 * traces[j] + 0.5 * _quadratic(forms[j], squares) for j in range(3))], axis=-1
        )  # (U, Q, 5): d log integrand / d theta at each node
        flat_w, flat_s = weight.reshape(-1), scores.reshape(-1, 5)
        moment = (flat_s * flat_w[:, None]).T @ flat_s  # sum over nodes of w * s s'
        per_unit = np.einsum("uq,uqj->uj", weight, scores)
        per_site = np.add.reduceat(per_unit, design.site_start, axis=0) if several else per_unit
        result = moment - per_site.T @ per_site  # the weighted covariance of the scores, summed over sites
        result[0, 0] += float(np.sum(weight * h11))
        result[1, 1] += float(np.sum(weight * h22))
        for (a, b), second in d2_between.items():
            # d2 log(prior) = tr(O B_a O B_b)/2 - tr(O B_ab)/2 + u'(O B_ab O - O B_a O B_b O - O B_b O B_a O)u/2
            form = omega @ second @ omega - forms[a] @ d_between[b] @ omega - forms[b] @ d_between[a] @ omega
            value = 0.5 * k * (np.trace(forms[a] @ d_between[b]) - np.trace(omega @ second))
            value += 0.5 * _quadratic(form, sums)
            result[2 + a, 2 + b] += value
            if a != b:
                result[2 + b, 2 + a] += value
        return sites, gradient, result


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
    quadrature = AdaptiveQuadrature(Design(evidence), points)
    return quadrature.site_log_marginals(np.asarray(mean, dtype=float), np.asarray(between, dtype=float))
