r"""A summary ROC curve from each site's own score bands: a multiple-threshold random-effects model.

Sites merge score bands until every count is safe, so each site releases operating points at its own
band edges. Summing counts across sites would need edges every site shares (often none). Instead, each
site's released bands give, at each of its interior band edges :math:`x`, the proportion of participants
*with* the condition scoring below :math:`x` (1 − sensitivity) and the proportion *without* the condition
scoring below :math:`x` (specificity). On the logit scale these are modelled as straight lines in the
(transformed) threshold, with site-specific random intercepts (Steinhauser, Schumacher & Rücker 2016):

.. math::

    \mathrm{logit}\,F_{ig}(x) = \alpha_g + \beta_g\,x + a_{ig} + \varepsilon_{igx},
    \qquad (a_{i1}, a_{i0}) \sim N_2(0, \Psi),

for class :math:`g = 1` (with the condition) and :math:`g = 0` (without). The random intercepts let every
site have its own accuracy and its own threshold shift (their correlation is the threshold effect of the
bivariate model); :math:`\varepsilon` has the binomial variance of each cumulative proportion, the points of
one site and class treated as independent given the site's random intercepts (working independence, as in the
published method; their multinomial covariance is in :func:`cumulative_points`).
At a common single threshold the model is the bivariate model of Reitsma et al. (2005).

The summary ROC curve is traced by the threshold: sensitivity :math:`1 - \mathrm{expit}(\alpha_1 + \beta_1 x)`
against false-positive rate :math:`1 - \mathrm{expit}(\alpha_0 + \beta_0 x)`, the curve of a site with random
effects 0. Its area is over false-positive rates 0 to 1, so it extrapolates beyond the sites' observed
points; the result states the range the observed points span.

References
----------
Steinhauser S, Schumacher M, Rücker G (2016). Modelling multiple thresholds in meta-analysis of diagnostic
test accuracy studies. BMC Med Res Methodol 16:97. Reitsma JB, Glas AS, Rutjes AWS, et al. (2005). Bivariate
analysis of sensitivity and specificity produces informative summary measures in diagnostic reviews.
J Clin Epidemiol 58:982–990. Harbord RM, Deeks JJ, Egger M, Whiting P, Sterne JAC (2007). A unification of
models for meta-analysis of diagnostic accuracy studies. Biostatistics 8:239–251.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import NDArray
from scipy import integrate, optimize, special, stats

from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion

__all__ = ["MultipleThresholdRoc", "OperatingPoint", "SiteBands", "multiple_threshold_roc", "cumulative_points"]

_ZERO_VARIANCE = 1e-10


@dataclass(frozen=True)
class SiteBands:
    """One site's score bands: band j is ``edges[j] <= score < edges[j + 1]`` (outer edges may be infinite).

    ``positives[j]`` and ``negatives[j]`` count participants with and without the condition in band j
    (``None``: withheld); ``total_positive`` and ``total_negative`` are the released class totals, if any.
    """

    site_id: str
    edges: tuple[float, ...]
    positives: tuple[int | None, ...]
    negatives: tuple[int | None, ...]
    total_positive: int | None = None
    total_negative: int | None = None


@dataclass(frozen=True)
class OperatingPoint(ResultRecord):
    """Summary sensitivity and specificity at one threshold, with Wald intervals on the logit scale."""

    threshold: float
    sensitivity: float
    sensitivity_ci_low: float
    sensitivity_ci_high: float
    specificity: float
    specificity_ci_low: float
    specificity_ci_high: float


@dataclass(frozen=True)
class MultipleThresholdRoc(ResultRecord):
    """A fitted multiple-threshold model and the summary ROC curve it implies.

    Attributes
    ----------
    method : str
        The model in words.
    threshold_scale : str
        ``"logit"`` (probability scores) or ``"identity"`` (points scores).
    coefficients : dict
        ``intercept_with``, ``slope_with``, ``intercept_without``, ``slope_without`` (logit of the share scoring
        below the threshold, against the transformed threshold centred at ``centre``).
    centre : float
    between_site_variance_with, between_site_variance_without : float
        Diagonal of :math:`\\Psi` (random intercepts of the two classes).
    between_site_correlation : float or None
        ``None`` when a variance is 0.
    false_positive_rate, sensitivity : tuple of float
        The summary ROC curve on a grid of thresholds.
    area_under_curve, area_under_curve_ci_low, area_under_curve_ci_high : float
        Area under the summary ROC curve over false-positive rates 0 to 1 (Wald interval on the logit
        scale, delta method).
    observed_fpr_low, observed_fpr_high : float
        The range of false-positive rates the sites' own points span.
    area_under_curve_described : str
        What ``area_under_curve`` is, in words (with the range).
    operating_points : tuple of OperatingPoint
        Summary sensitivity and specificity at every band edge some site released.
    n_points : int
        Operating points (site × edge × class) in the fit.
    sites_pooled : tuple of str
    sites_not_pooled : tuple of SiteExclusion
    notes : tuple of str
    level : float
    """

    method: str
    threshold_scale: str
    coefficients: dict[str, float]
    centre: float
    between_site_variance_with: float
    between_site_variance_without: float
    between_site_correlation: float | None
    false_positive_rate: tuple[float, ...]
    sensitivity: tuple[float, ...]
    area_under_curve: float
    area_under_curve_ci_low: float
    area_under_curve_ci_high: float
    observed_fpr_low: float
    observed_fpr_high: float
    area_under_curve_described: str
    operating_points: tuple[OperatingPoint, ...]
    n_points: int
    sites_pooled: tuple[str, ...]
    sites_not_pooled: tuple[SiteExclusion, ...] = ()
    notes: tuple[str, ...] = ()
    level: float = 0.95

    def summary(self) -> str:
        pct = f"{100 * self.level:g}%"
        lines = [
            f"Summary ROC, multiple-threshold model ({len(self.sites_pooled)} sites, {self.n_points} points)",
            f"  {self.area_under_curve_described}: {self.area_under_curve:.3f} ({pct} CI "
            f"{self.area_under_curve_ci_low:.3f} to {self.area_under_curve_ci_high:.3f})",
        ]
        lines += [
            f"  score >= {p.threshold:g}: sensitivity {p.sensitivity:.3f}, specificity {p.specificity:.3f}"
            for p in self.operating_points
        ]
        lines.extend(f"  not pooled: {e.site_id} ({e.reason})" for e in self.sites_not_pooled)
        lines.extend(f"  note: {n}" for n in self.notes)
        return "\n".join(lines)


@dataclass(frozen=True)
class _SitePoints:
    site_id: str
    x: NDArray[np.float64]  # transformed threshold per point
    klass: NDArray[np.int_]  # 1 with the condition, 0 without
    y: NDArray[np.float64]  # logit share below the threshold
    covariance: NDArray[np.float64]  # within-site


def _class_below(counts: tuple[int | None, ...], total: int | None) -> list[int | None]:
    """Participants below each interior edge (edge j + 1 of the bands), or None where the release cannot say."""
    m = len(counts)
    known_total = total if total is not None else (sum(counts) if all(c is not None for c in counts) else None)
    out: list[int | None] = []
    for j in range(1, m):
        below, above = counts[:j], counts[j:]
        if all(c is not None for c in below):
            out.append(int(sum(below)))  # type: ignore[arg-type]
        elif known_total is not None and all(c is not None for c in above):
            out.append(int(known_total - sum(above)))  # type: ignore[arg-type]
        else:
            out.append(None)
    return out


def cumulative_points(band_counts: Sequence[int]) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    r"""Logit of the share below each inner band edge of one class at one site, and their within-site covariance.

    Parameters
    ----------
    band_counts : sequence of int
        Participants of the class in each band, bands in increasing score order (at least 2 bands).

    Returns
    -------
    (y, covariance)
        :math:`y_j = \log(a_j/b_j)` with :math:`a_j` participants below inner edge :math:`j` and :math:`b_j`
        at or above it, 0.5 added to both where either is 0 (as for a single proportion). With
        :math:`F_j = a_j/(a_j + b_j)`, the multinomial gives :math:`\mathrm{cov}(\hat F_j, \hat F_l) =
        F_j(1 - F_l)/n` for :math:`j \le l`, so by the delta method :math:`\mathrm{cov}(y_j, y_l) =
        1/\{n(1 - F_j)F_l\}`; the diagonal is :math:`1/a_j + 1/b_j`.
    """
    counts = np.asarray(band_counts, dtype=float)
    if counts.size < 2:
        raise PoolingError("cumulative points need at least 2 bands")
    total = float(counts.sum())
    below = np.cumsum(counts)[:-1]
    corrected = (below == 0) | (below == total)
    a = np.where(corrected, below + 0.5, below)
    b = np.where(corrected, total - below + 0.5, total - below)
    share = a / (a + b)
    y = np.log(a / b)
    index = np.arange(share.size)
    low, high = np.minimum.outer(index, index), np.maximum.outer(index, index)
    covariance = 1.0 / (total * (1 - share[low]) * share[high])
    covariance[index, index] = 1 / a + 1 / b
    return y, covariance


def _merged_counts(counts: tuple[int | None, ...], total: int | None) -> tuple[list[int], list[int]] | None:
    """Band counts merged between the inner edges whose cumulative count the release determines.

    Returns (indices of the inner edges kept, counts of the merged bands), or None if fewer than one edge is kept.
    """
    below = _class_below(counts, total)
    known_total = total if total is not None else (sum(counts) if all(c is not None for c in counts) else None)  # type: ignore[arg-type]
    if known_total is None:
        return None
    kept = [j for j, c in enumerate(below) if c is not None]
    if not kept:
        return None
    cumulative = [0, *(below[j] for j in kept), known_total]
    merged = [int(b - a) for a, b in zip(cumulative[:-1], cumulative[1:], strict=True)]  # type: ignore[operator]
    if min(merged) < 0:
        return None
    return kept, merged


def _points(site: SiteBands, transform: Callable[[NDArray[np.float64]], NDArray[np.float64]]) -> _SitePoints | str:
    if len(site.edges) != len(site.positives) + 1 or len(site.positives) != len(site.negatives):
        return "band edges and counts do not match"
    interior = np.array(site.edges[1:-1], dtype=float)
    if interior.size == 0:
        return "a single band: no threshold inside the score range"
    xs, klass, ys, blocks = [], [], [], []
    for g, counts, total in ((1, site.positives, site.total_positive), (0, site.negatives, site.total_negative)):
        found = _merged_counts(counts, total)
        if found is None or sum(found[1]) == 0:
            continue
        kept, merged = found
        y, cov = cumulative_points(merged)
        # Working independence within a class (the published method): with the full multinomial covariance the
        # generalised least squares fit leans on the differences between adjacent points, which flattens the
        # slopes whenever the straight line in the threshold is only approximately right (seen on scikit-learn's
        # breast-cancer data: slope 0.36 against 0.56 fitted to all records).
        cov = np.diag(np.diag(cov))
        xs.append(transform(interior[kept]))
        klass.append(np.full(len(kept), g))
        ys.append(y)
        blocks.append(cov)
    if len(ys) < 2:
        return "no usable cumulative counts for one of the classes (withheld, or no participants)"
    size = sum(b.shape[0] for b in blocks)
    covariance = np.zeros((size, size))
    start = 0
    for block in blocks:
        end = start + block.shape[0]
        covariance[start:end, start:end] = block
        start = end
    return _SitePoints(site.site_id, np.concatenate(xs), np.concatenate(klass), np.concatenate(ys), covariance)


def _design(points: _SitePoints, centre: float) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    x = points.x - centre
    with_ = points.klass == 1
    design = np.column_stack([with_, with_ * x, ~with_, ~with_ * x]).astype(float)
    random = np.column_stack([with_, ~with_]).astype(float)
    return design, random


def _psi(theta: NDArray[np.float64]) -> NDArray[np.float64]:
    lower = np.array([[theta[0], 0.0], [theta[1], theta[2]]])
    return lower @ lower.T


class _Model:
    def __init__(self, sites: list[_SitePoints], centre: float, restricted: bool) -> None:
        self.parts = [(*_design(s, centre), s.y, s.covariance) for s in sites]
        self.restricted = restricted

    def evaluate(self, psi: NDArray[np.float64]) -> tuple[float, NDArray[np.float64], NDArray[np.float64]]:
        """(log-likelihood, beta, Var(beta)) at Psi, beta profiled out by GLS."""
        xtvx = np.zeros((4, 4))
        xtvy = np.zeros(4)
        logdet = 0.0
        cached = []
        for design, random, y, within in self.parts:
            v = random @ psi @ random.T + within
            chol = np.linalg.cholesky(v)
            logdet += 2 * float(np.sum(np.log(np.diag(chol))))
            vx = np.linalg.solve(v, design)
            vy = np.linalg.solve(v, y)
            xtvx += design.T @ vx
            xtvy += design.T @ vy
            cached.append((design, y, vy, vx))
        cov = np.linalg.inv(xtvx)
        beta = cov @ xtvy
        quadratic = 0.0
        for design, y, vy, vx in cached:
            r = y - design @ beta
            quadratic += float(r @ (vy - vx @ beta))
        loglik = -0.5 * (logdet + quadratic)
        if self.restricted:
            loglik -= 0.5 * float(np.linalg.slogdet(xtvx)[1])
        return loglik, beta, cov


def _fit(model: _Model) -> tuple[NDArray[np.float64], bool]:
    def objective(theta: NDArray[np.float64]) -> float:
        try:
            value = model.evaluate(_psi(theta))[0]
        except np.linalg.LinAlgError:
            return 1e300
        return -value if math.isfinite(value) else 1e300

    best = None
    for start in (np.array([0.5, 0.0, 0.5]), np.array([1.0, -0.5, 0.8]), np.array([0.2, 0.1, 0.2])):
        found = optimize.minimize(objective, start, method="L-BFGS-B", options={"ftol": 1e-12, "gtol": 1e-8})
        if best is None or found.fun < best.fun:
            best = found
        if best.success:  # further starts only when the first does not converge
            break
    assert best is not None
    return _psi(best.x), bool(best.success)


def _curve_parameters(beta: NDArray[np.float64]) -> tuple[float, float]:
    """(A, B) of logit TPR = A + B logit FPR along the summary curve."""
    a1, b1, a0, b0 = beta
    return float(-a1 + b1 * a0 / b0), float(b1 / b0)


def _auc(beta: NDArray[np.float64]) -> float:
    """Area under logit TPR = A + B logit FPR over FPR in (0, 1), substituting FPR = expit(t)."""
    intercept, slope = _curve_parameters(beta)
    t = np.linspace(-60.0, 60.0, 8001)
    x = special.expit(t)
    return float(integrate.trapezoid(special.expit(intercept + slope * t) * x * (1 - x), t))


def _gradient(function: Callable[[NDArray[np.float64]], float], beta: NDArray[np.float64]) -> NDArray[np.float64]:
    out = np.zeros(beta.size)
    for j in range(beta.size):
        h = 1e-6 * max(1.0, abs(beta[j]))
        up, down = beta.copy(), beta.copy()
        up[j] += h
        down[j] -= h
        out[j] = (function(up) - function(down)) / (2 * h)
    return out


def multiple_threshold_roc(
    sites: Sequence[SiteBands],
    threshold_scale: Literal["auto", "logit", "identity"] = "auto",
    method: Literal["REML", "ML"] = "REML",
    level: float = 0.95,
) -> MultipleThresholdRoc:
    r"""Summary ROC curve and its area from per-site banded counts, each site with its own band edges.

    Parameters
    ----------
    sites : sequence of SiteBands
        Per site, its released band edges and counts per class. A site whose counts at some edges are
        withheld contributes the edges whose cumulative counts the release still determines.
    threshold_scale : {"auto", "logit", "identity"}, default "auto"
        Scale of the threshold in the linear model: ``"logit"`` when every finite edge lies in (0, 1)
        (predicted probabilities), else ``"identity"`` (points scores).
    method : {"REML", "ML"}, default "REML"
        Estimator of the between-site covariance :math:`\Psi` (fixed effects by generalised least squares).
    level : float, default 0.95

    Returns
    -------
    MultipleThresholdRoc

    Notes
    -----
    The model is in the module docstring. Its fixed effects are the GLS estimate
    :math:`\hat\beta = (\sum X_i^\top V_i^{-1} X_i)^{-1} \sum X_i^\top V_i^{-1} y_i` with
    :math:`V_i = Z_i \Psi Z_i^\top + C_i` (:math:`C_i` from :func:`cumulative_points`); :math:`\Psi` maximises
    the (restricted) likelihood over its Cholesky factor. Along the summary curve
    :math:`\mathrm{logit}\,\mathrm{TPR} = A + B\,\mathrm{logit}\,\mathrm{FPR}` with :math:`B = \beta_1/\beta_0`,
    :math:`A = -\alpha_1 + \beta_1\alpha_0/\beta_0`; the area is integrated numerically and its interval is
    Wald on the logit scale with the delta-method variance from :math:`\mathrm{Var}(\hat\beta)`.

    References
    ----------
    Steinhauser S, Schumacher M, Rücker G (2016). BMC Med Res Methodol 16:97 (R package diagmeta).
    Reitsma JB et al. (2005). J Clin Epidemiol 58:982–990.
    """
    level = _check_level(level)
    edges = [e for s in sites for e in s.edges if math.isfinite(e)]
    if threshold_scale == "auto":
        threshold_scale = "logit" if edges and all(0 < e < 1 for e in edges) else "identity"
    if threshold_scale not in ("logit", "identity"):
        raise PoolingError(f"threshold_scale must be 'auto', 'logit' or 'identity', got {threshold_scale!r}")
    if threshold_scale == "logit" and not all(0 < e < 1 for e in edges):
        raise PoolingError("a logit threshold scale needs every band edge strictly between 0 and 1")

    def transform(x: NDArray[np.float64]) -> NDArray[np.float64]:
        return special.logit(x) if threshold_scale == "logit" else np.asarray(x, dtype=float)

    kept: list[_SitePoints] = []
    excluded: list[SiteExclusion] = []
    for site in sites:
        found = _points(site, transform)
        if isinstance(found, str):
            excluded.append(SiteExclusion(site.site_id, found))
        else:
            kept.append(found)
    if len(kept) < 2:
        raise PoolingError(f"a summary ROC needs at least 2 sites with banded counts, got {len(kept)}")
    x_all = np.concatenate([s.x for s in kept])
    for klass in (1, 0):
        x_class = np.concatenate([s.x[s.klass == klass] for s in kept])
        if x_class.size < 2 or np.ptp(x_class) == 0:
            raise PoolingError(
                "the sites' points lie at a single band edge: the slope in the threshold is not estimable"
            )
    centre = float(np.mean(x_all))
    model = _Model(kept, centre, restricted=method == "REML")
    psi, converged = _fit(model)
    _, beta, cov = model.evaluate(psi)
    notes = [] if converged else ["the likelihood maximiser reported incomplete convergence; the best estimates found"]
    if beta[1] <= 0 or beta[3] <= 0:
        raise PoolingError(
            "the fitted share below the threshold does not rise with the threshold in both classes: no summary ROC"
        )
    auc = _auc(beta)
    gradient = _gradient(lambda b: special.logit(_auc(b)), beta)
    se = math.sqrt(max(float(gradient @ cov @ gradient), 0.0))
    z = float(stats.norm.isf((1 - level) / 2))
    fpr_points = np.concatenate([1 - special.expit(s.y[s.klass == 0]) for s in kept])
    grid_x = np.linspace(x_all.min() - 3, x_all.max() + 3, 101) - centre
    tpr_curve = 1 - special.expit(beta[0] + beta[1] * grid_x)
    fpr_curve = 1 - special.expit(beta[2] + beta[3] * grid_x)
    order = np.argsort(fpr_curve)
    points = []
    for edge in sorted(set(edges)):
        x = float(transform(np.array([edge]))[0]) - centre
        row = []
        for a, b in ((0, 1), (2, 3)):
            gradient_point = np.zeros(4)
            gradient_point[a], gradient_point[b] = 1.0, x
            eta = beta[a] + beta[b] * x
            half = z * math.sqrt(float(gradient_point @ cov @ gradient_point))
            row.append((eta, half))
        (eta1, h1), (eta0, h0) = row
        points.append(
            OperatingPoint(
                threshold=float(edge),
                sensitivity=float(1 - special.expit(eta1)),
                sensitivity_ci_low=float(1 - special.expit(eta1 + h1)),
                sensitivity_ci_high=float(1 - special.expit(eta1 - h1)),
                specificity=float(special.expit(eta0)),
                specificity_ci_low=float(special.expit(eta0 - h0)),
                specificity_ci_high=float(special.expit(eta0 + h0)),
            )
        )
    sd = np.sqrt(np.clip(np.diag(psi), 0, None))
    rho = None if min(sd) ** 2 < _ZERO_VARIANCE else float(psi[0, 1] / (sd[0] * sd[1]))
    low, high = float(fpr_points.min()), float(fpr_points.max())
    return MultipleThresholdRoc(
        method=(
            "multiple-threshold random-effects model (Steinhauser et al. 2016): logit share below each site's own "
            f"band edges, linear in the {'logit of the ' if threshold_scale == 'logit' else ''}threshold, "
            f"correlated random intercepts per class, binomial variance per point (working independence), {method}"
        ),
        threshold_scale=threshold_scale,
        coefficients={
            "intercept_with": float(beta[0]),
            "slope_with": float(beta[1]),
            "intercept_without": float(beta[2]),
            "slope_without": float(beta[3]),
        },
        centre=centre,
        between_site_variance_with=float(psi[0, 0]),
        between_site_variance_without=float(psi[1, 1]),
        between_site_correlation=rho,
        false_positive_rate=tuple(float(v) for v in fpr_curve[order]),
        sensitivity=tuple(float(v) for v in tpr_curve[order]),
        area_under_curve=auc,
        area_under_curve_ci_low=float(special.expit(special.logit(auc) - z * se)),
        area_under_curve_ci_high=float(special.expit(special.logit(auc) + z * se)),
        observed_fpr_low=low,
        observed_fpr_high=high,
        area_under_curve_described=(
            "area under the summary ROC curve of the multiple-threshold model, over false-positive rates 0 to 1 "
            f"(the sites' own points span false-positive rates {low:.2f} to {high:.2f}; outside that the curve "
            "is extrapolated)"
        ),
        operating_points=tuple(points),
        n_points=int(x_all.size),
        sites_pooled=tuple(s.site_id for s in kept),
        sites_not_pooled=tuple(excluded),
        notes=tuple(notes),
        level=level,
    )
