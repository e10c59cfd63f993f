r"""The headline summary of a validation: the bivariate binomial GLMM over every site, with honest intervals.

Model: the exact binomial bivariate random-effects model of Chu & Cole (2006)
(:func:`federation.stats.glmm.binomial_glmm`), every site included; a site with withheld cells contributes
the probability of the tables its release allows under the rule that withheld them and the feasible ranges
the recipient can compute (:mod:`federation.stats.suppression`, :mod:`federation.ranges`). Nothing is
dropped and no continuity correction is needed.

Intervals (one convention, stated in every result):

- **Summary sensitivity and specificity**: profile likelihood on the logit scale. The limits are where the
  signed root of the likelihood-ratio statistic, maximised over the other four parameters, reaches the
  :math:`t_{k-2}` quantile (k sites) instead of the normal one. Maximum likelihood estimates the
  between-site variances without allowing for the two means, which makes plain profile (and Wald)
  intervals too narrow when sites are few; referring the statistic to :math:`t_{k-2}` (equivalently
  :math:`F(1, k-2)` for its square) is the small-sample correction that SAS PROC NLMIXED applies to the
  Wald intervals of this model (k − 2 = subjects minus random effects; Chu & Cole 2006 used it; from
  memory) and is carried over here to the likelihood-ratio statistic, which unlike Wald respects the
  skewness of the likelihood near 0 or 1. Chosen by simulation against the plain profile interval (the
  :math:`\chi^2_1` cut-off, i.e. the normal quantile), which covered 86-93% with 8 and 15 sites, more than
  the Wald z interval does; a parametric bootstrap would need hundreds of refits per interval. The coverage
  is checked by ``make validate-stats`` (docs/coordinator.md, "How the pooled intervals were chosen").
- **Between-site SDs (tau) and correlation (rho)**: profile likelihood with the :math:`\chi^2_1` quantile;
  a limit that reaches the parameter's boundary (SD 0, correlation ±1) is reported as the boundary.
- **Prediction intervals** for a new site's sensitivity and specificity (the convention shared by every
  pooled result in :mod:`federation.stats`): :math:`\hat\mu \pm t_{k-2}\sqrt{\hat\tau^2 + \widehat{SE}^2}`
  on the logit scale (Higgins, Thompson & Spiegelhalter 2009), SE from the observed information.

Quantities the data cannot support are reported as "not estimable: <reason>", never as a number: a
likelihood symmetric in sensitivity and 1 − sensitivity (every informative site withheld both TP and FN
with only their total released), an estimate on the boundary (every site FN = 0), fewer than two sites that
inform a measure, three sites or fewer in all, a between-site SD estimated as 0 (then the correlation).

References
----------
Chu H, Cole SR (2006). J Clin Epidemiol 59:1331–1332. Venzon DJ, Moolgavkar SH (1988). A method for
computing profile-likelihood-based confidence intervals. Appl Stat 37:87–94. Higgins JPT, Thompson SG,
Spiegelhalter DJ (2009). J R Stat Soc A 172:137–159. Takwoingi Y, et al. (2017). Performance of methods for
meta-analysis of diagnostic test accuracy with few studies or sparse data. Stat Methods Med Res 26:1896–1911.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, replace

import numpy as np
from scipy import special, stats

from federation.stats.bivariate import BivariateFit
from federation.stats.glmm import BOUNDS, GlmmLikelihood, glmm_evidence, glmm_fit, one_blas_thread
from federation.stats.results import Interval
from federation.stats.serial import ResultRecord, SiteExclusion
from federation.stats.suppression import SiteEvidence
from federation.stats.tables import ReleasedTable

__all__ = ["HeadlineFit", "headline_accuracy", "PREDICTION_CONVENTION"]

PREDICTION_CONVENTION = "prediction interval: mean +/- t(k-2) * sqrt(tau^2 + SE^2) on the logit scale"
_MEAN_INTERVAL = "profile likelihood on the logit scale, signed root referred to t on {df} df"
_VARIANCE_INTERVAL = "profile likelihood, chi-squared 1 df"
_MIN_SITES = 4
_ROOT_TOLERANCE = 0.005  # relative, on the signed root at a profile limit
_ROOT_STEPS = 16
HETEROGENEITY = ("tau_logit_sensitivity", "tau_logit_fpr", "correlation")


@dataclass(frozen=True)
class HeadlineFit(ResultRecord):
    """The headline bivariate result: summary point, intervals, heterogeneity, and what is not estimable.

    Attributes
    ----------
    method : str
    sensitivity, specificity : Interval or None
        Summary estimates with profile-likelihood intervals (None where not estimable).
    sensitivity_prediction, specificity_prediction : Interval or None
    tau_logit_sensitivity, tau_logit_fpr, correlation : Interval or None
        Between-site SDs on the logit scale and their correlation, with profile-likelihood intervals.
    not_estimable : dict of str to str
        Quantity -> "not estimable: <reason>".
    fit : BivariateFit or None
        The full fit (SROC, regions, HSROC parameters), intervals of the summary point replaced by the
        profile ones.
    sites_pooled : tuple of str
    sites_not_pooled : tuple of SiteExclusion
    censored_sites : tuple of str
        Sites pooled through the censoring likelihood (some cells withheld).
    notes : tuple of str
    """

    method: str
    sensitivity: Interval | None
    specificity: Interval | None
    sensitivity_prediction: Interval | None
    specificity_prediction: Interval | None
    tau_logit_sensitivity: Interval | None
    tau_logit_fpr: Interval | None
    correlation: Interval | None
    not_estimable: dict[str, str]
    fit: BivariateFit | None
    sites_pooled: tuple[str, ...]
    sites_not_pooled: tuple[SiteExclusion, ...] = ()
    censored_sites: tuple[str, ...] = ()
    notes: tuple[str, ...] = ()
    level: float = 0.95

    @property
    def estimable(self) -> bool:
        return self.sensitivity is not None or self.specificity is not None

    @classmethod
    def none_estimable(
        cls,
        reasons: dict[str, str],
        sites_pooled: tuple[str, ...],
        sites_not_pooled: tuple[SiteExclusion, ...] = (),
        censored_sites: tuple[str, ...] = (),
    ) -> HeadlineFit:
        """A result with no estimate: every quantity ``None``, ``reasons`` saying why for each."""
        return cls(
            method=METHOD,
            sensitivity=None,
            specificity=None,
            sensitivity_prediction=None,
            specificity_prediction=None,
            tau_logit_sensitivity=None,
            tau_logit_fpr=None,
            correlation=None,
            not_estimable=reasons,
            fit=None,
            sites_pooled=sites_pooled,
            sites_not_pooled=sites_not_pooled,
            censored_sites=censored_sites,
        )


METHOD = (
    "bivariate binomial GLMM (Chu & Cole 2006) over every site, withheld cells censored under the rule that "
    "withheld them; ML by adaptive Gauss-Hermite quadrature"
)


def _symmetric(values: np.ndarray, margin: int) -> bool:
    return bool(np.array_equal(np.sort(values), np.sort(margin - values)))


def _informative(evidence: Sequence[SiteEvidence], side: int) -> tuple[int, bool, bool]:
    """(sites informing the measure, every site with data at the upper boundary, every one at the lower).

    A site whose likelihood is symmetric in p and 1 - p cannot tell which side the measure lies on, but it
    still excludes the boundary (its allowed values are not all 0 or all the margin), so it counts against a
    boundary estimate: sites with FN = 0 beside sites whose TP and FN were withheld do not make one.
    """
    informative, upper, lower = 0, True, True
    for ev in evidence:
        margins = ev.positives if side == 0 else ev.negatives
        values = ev.tp_values if side == 0 else ev.fp_values
        if np.all(margins == 0):
            continue
        upper = upper and all(np.all(v == n) for v, n in zip(values, margins, strict=True))
        lower = lower and all(np.all(v == 0) for v in values)
        if all(_symmetric(v, int(n)) for v, n in zip(values, margins, strict=True) if n > 0):
            continue  # the site's likelihood is the same at p and 1 - p: it cannot tell which
        informative += 1
    return informative, informative > 0 and upper, informative > 0 and lower


def _identifiability(evidence: Sequence[SiteEvidence]) -> dict[str, str]:
    reasons: dict[str, str] = {}
    for side, measure, event, other in ((0, "sensitivity", "TP", "FN"), (1, "specificity", "FP", "TN")):
        informative, upper, lower = _informative(evidence, side)
        if informative == 0:
            reasons[measure] = (
                f"not estimable: at every site {event} and {other} were both withheld with only their total "
                f"released, so the data cannot tell {measure} from 1 - {measure}"
            )
        elif informative < 2:
            reasons[measure] = f"not estimable: only {informative} site informs {measure}"
        elif upper or lower:
            zero = other if upper else event
            if side == 1:
                zero = "TN" if upper else "FP"
            reasons[measure] = f"not estimable: {zero} = 0 at every site, so the estimate lies on the boundary"
    return reasons


def _signed_root(nll: float, nll_hat: float) -> float:
    return math.sqrt(max(0.0, 2.0 * (nll - nll_hat)))


def _maximise_near(likelihood: GlmmLikelihood, start: np.ndarray, free: list[int]) -> tuple[np.ndarray, float]:
    """Maximise over ``free`` from a good start (the previous profile point's maximiser): Newton steps with the
    analytic Hessian, L-BFGS-B from where they stopped if they do not settle."""
    if not free:
        return start.copy(), likelihood.negative(start)[0]
    theta, nll, converged = likelihood.newton(start, free, tolerance=1e-6)
    if not converged:
        theta, nll, _ = likelihood.maximise(theta, free, tolerance=1e-8, gtol=1e-3, maxiter=80)
    return theta, nll


def _profile_limit(
    likelihood: GlmmLikelihood,
    theta_hat: np.ndarray,
    nll_hat: float,
    free: list[int],
    index: int,
    direction: int,
    target: float,
    step: float,
    hess: np.ndarray,
) -> tuple[float, bool]:
    """Where the profile signed root reaches ``target`` on one side. Returns (limit, reached the parameter's
    bound).

    Steps outwards from the estimate (extrapolating the signed root, which is nearly linear in the parameter)
    until the target is bracketed, then regula falsi with the Illinois modification inside the bracket, so a
    step that overshoots is never followed by one outside the bracket; each point's inner maximisation starts
    from the nearest point already profiled. Venzon & Moolgavkar (1988) find the same point by Newton steps.
    """
    others = [i for i in free if i != index]
    low, high = BOUNDS[index]
    edge = high if direction > 0 else low
    estimate = float(theta_hat[index])
    # Warm start: the nearest profiled point's maximiser (continuation), with the means moved along the
    # quadratic approximation's path; the variance parameters' path is too curved for that guess to help.
    j = free.index(index)
    rest = [free.index(i) for i in others]
    try:
        slope = -np.linalg.solve(hess[np.ix_(rest, rest)], hess[rest, j])
    except np.linalg.LinAlgError:
        slope = np.zeros(len(rest))
    slope = np.where(np.array(others) < 2, slope, 0.0)
    limits = np.array([BOUNDS[i] for i in others]).T
    inside: list[tuple[float, float, np.ndarray]] = [(estimate, 0.0, theta_hat.copy())]  # signed root < target
    outside: tuple[float, float, np.ndarray] | None = None  # signed root > target
    below, above = -target, 0.0  # the bracket ends' signed root minus the target, Illinois-halved
    last = "inside"
    v = float(np.clip(estimate + direction * step, low, high))
    for _ in range(_ROOT_STEPS):
        near = inside[-1] if outside is None or abs(v - inside[-1][0]) <= abs(v - outside[0]) else outside
        start = near[2].copy()
        if others:
            start[others] = np.clip(near[2][others] + slope * (v - near[0]), *limits)
        start[index] = v
        theta, nll = _maximise_near(likelihood, start, others)
        r = _signed_root(nll, nll_hat)
        if abs(r - target) < _ROOT_TOLERANCE * target:
            return v, False
        if r < target:
            if abs(v - edge) < 1e-9:
                return v, True
            inside.append((v, r, theta))
            below, above = r - target, above * (0.5 if last == "inside" else 1.0)
            last = "inside"
        else:
            outside = (v, r, theta)
            below, above = below * (0.5 if last == "outside" else 1.0), r - target
            last = "outside"
        a_v, a_r = inside[-1][0], inside[-1][1]
        if outside is None:  # not bracketed yet: extrapolate from the last two points, 1.2 to 4 times as far
            b_v, b_r = inside[-2][0], inside[-2][1]
            distance = abs(a_v - estimate)
            ratio = (target - b_r) / (a_r - b_r) if a_r > b_r + 1e-9 else 4.0
            further = abs(b_v - estimate) + ratio * abs(a_v - b_v)
            new = estimate + direction * float(np.clip(further, 1.2 * distance, 4.0 * distance))
        else:  # regula falsi (Illinois) between the last point below the target and the last above it
            o_v = outside[0]
            if abs(o_v - a_v) < 1e-7:
                return o_v, False
            new = a_v - below * (o_v - a_v) / (above - below)
        v = float(np.clip(new, low, high))
    return (v if outside is None else 0.5 * (inside[-1][0] + outside[0])), False


def headline_accuracy(
    tables: Sequence[ReleasedTable], level: float = 0.95, points: int = 7, intervals: bool = True
) -> HeadlineFit:
    """The headline bivariate binomial GLMM with profile-likelihood intervals (see the module docstring).

    Parameters
    ----------
    tables : sequence of ReleasedTable
        Every site's released table (withheld cells as ``None``, with their ranges and rules).
    level : float, default 0.95
    points : int, default 7
        Gauss–Hermite points per dimension.
    intervals : bool, default True
        Compute the profile-likelihood intervals of tau and rho too (the summary point's are always
        computed).

    Returns
    -------
    HeadlineFit
        Never raises for data that cannot support the model: the reasons are in ``not_estimable``.
    """
    evidence, excluded = glmm_evidence(tables, "censor", minimum=0)
    site_ids = tuple(ev.site_id for ev in evidence)
    censored = tuple(ev.site_id for ev in evidence if ev.censored)
    not_estimable = _identifiability(evidence)
    k = len(evidence)

    def empty(reason: str) -> HeadlineFit:
        reasons = dict.fromkeys(("sensitivity", "specificity", *HETEROGENEITY), reason)
        return HeadlineFit.none_estimable(reasons, site_ids, tuple(excluded), censored)

    if k < _MIN_SITES:
        return empty(f"not estimable: {k} usable site(s); the bivariate random-effects model needs at least 4")
    if "sensitivity" in not_estimable and "specificity" in not_estimable:
        reasons = {**not_estimable, **dict.fromkeys(HETEROGENEITY, not_estimable["sensitivity"])}
        return HeadlineFit.none_estimable(reasons, site_ids, tuple(excluded), censored)
    try:
        with one_blas_thread():
            return _fit_and_profile(evidence, tables, excluded, points, level, intervals, not_estimable, censored)
    except (ValueError, ArithmeticError):  # a NaN interval or a singular system: say so, never the internal text
        return empty("not estimable: the model could not be fitted to these data")


def _fit_and_profile(
    evidence: list[SiteEvidence],
    tables: Sequence[ReleasedTable],
    excluded: list[SiteExclusion],
    points: int,
    level: float,
    intervals: bool,
    not_estimable: dict[str, str],
    censored: tuple[str, ...],
) -> HeadlineFit:
    k = len(evidence)
    site_ids = tuple(ev.site_id for ev in evidence)
    fit, likelihood, theta_hat, nll_hat, free, hess = glmm_fit(evidence, tables, excluded, points, level)
    df = k - 2
    q_mean = float(stats.t.isf((1 - level) / 2, df))
    q_var = float(stats.norm.isf((1 - level) / 2))
    try:
        cov = np.linalg.inv(hess)
        se = np.sqrt(np.clip(np.diag(cov), 1e-8, None))
    except np.linalg.LinAlgError:
        se = np.full(len(free), 0.5)
    step = {i: float(se[j]) for j, i in enumerate(free)}
    for name, i in (("sensitivity", 0), ("specificity", 1)):
        if abs(theta_hat[i]) > BOUNDS[i][1] - 1e-3 and name not in not_estimable:
            not_estimable[name] = f"not estimable: the estimate of {name} lies on the boundary (0 or 1)"

    # Parameters estimated on a bound (an SD of 0, a correlation of +-1) stay there while others are profiled.
    on_bound = [i for i in free if theta_hat[i] <= BOUNDS[i][0] + 1e-6 or theta_hat[i] >= BOUNDS[i][1] - 1e-6]
    inner = [i for i in free if i not in on_bound]
    inner_hess = hess[np.ix_([free.index(i) for i in inner], [free.index(i) for i in inner])]

    def limit(index: int, direction: int, target: float) -> tuple[float, bool]:
        # a first step of about the Wald half-width; the SE of a log SD or atanh correlation can be huge near 0
        s = min(max(step[index], 0.02), 3.0 if index < 2 else 0.5) * target
        if index in on_bound:  # profiled outward from its bound; no quadratic guess for the others' path
            block = np.zeros((len(inner) + 1, len(inner) + 1))
            block[:-1, :-1], block[-1, -1] = inner_hess, 1.0
            return _profile_limit(likelihood, theta_hat, nll_hat, [*inner, index], index, direction, target, s, block)
        return _profile_limit(likelihood, theta_hat, nll_hat, inner, index, direction, target, s, inner_hess)

    method = _MEAN_INTERVAL.format(df=df)
    summary: dict[str, Interval | None] = {"sensitivity": None, "specificity": None}
    for name, i in (("sensitivity", 0), ("specificity", 1)):
        if name in not_estimable:
            continue
        lo, hi = limit(i, -1, q_mean)[0], limit(i, +1, q_mean)[0]
        if i == 0:
            summary[name] = Interval(
                float(special.expit(theta_hat[0])), float(special.expit(lo)), float(special.expit(hi)), method, level
            )
        else:
            summary[name] = Interval(
                float(1 - special.expit(theta_hat[1])),
                float(1 - special.expit(hi)),
                float(1 - special.expit(lo)),
                method,
                level,
            )
    predictions = {"sensitivity": fit.sensitivity_prediction, "specificity": fit.specificity_prediction}
    for name in predictions:
        if summary[name] is None:
            predictions[name] = None
        elif predictions[name] is not None:
            predictions[name] = replace(predictions[name], method=PREDICTION_CONVENTION)  # type: ignore[arg-type]
    heterogeneity: dict[str, Interval | None] = {}
    for name, i in (("tau_logit_sensitivity", 2), ("tau_logit_fpr", 3)):
        zero = theta_hat[i] <= BOUNDS[i][0] + 1e-6
        sd = 0.0 if zero else math.exp(theta_hat[i])
        if not intervals:
            heterogeneity[name] = Interval(sd, None, None, "interval not computed", level)
            continue
        lo, lo_bound = (BOUNDS[i][0], True) if zero else limit(i, -1, q_var)
        hi, _ = limit(i, +1, q_var)
        label = _VARIANCE_INTERVAL + ("; estimate on the boundary 0" if zero else "")
        heterogeneity[name] = Interval(sd, 0.0 if lo_bound else math.exp(lo), math.exp(hi), label, level)
    if any(theta_hat[i] <= BOUNDS[i][0] + 1e-6 for i in (2, 3)):
        not_estimable["correlation"] = "not estimable: a between-site SD is estimated as 0"
        correlation = None
    elif not intervals:
        correlation = Interval(math.tanh(theta_hat[4]), None, None, "interval not computed", level)
    else:
        at_low, at_high = theta_hat[4] <= BOUNDS[4][0] + 1e-6, theta_hat[4] >= BOUNDS[4][1] - 1e-6
        lo, lo_bound = (BOUNDS[4][0], True) if at_low else limit(4, -1, q_var)
        hi, hi_bound = (BOUNDS[4][1], True) if at_high else limit(4, +1, q_var)
        correlation = Interval(
            -1.0 if at_low else 1.0 if at_high else math.tanh(theta_hat[4]),
            -1.0 if lo_bound else math.tanh(lo),
            1.0 if hi_bound else math.tanh(hi),
            _VARIANCE_INTERVAL + ("; estimate on the boundary" if at_low or at_high else ""),
            level,
        )
    shown_fit = replace(
        fit,
        sensitivity=summary["sensitivity"] or fit.sensitivity,
        specificity=summary["specificity"] or fit.specificity,
    )
    return HeadlineFit(
        METHOD,
        summary["sensitivity"],
        summary["specificity"],
        predictions["sensitivity"],
        predictions["specificity"],
        heterogeneity.get("tau_logit_sensitivity"),
        heterogeneity.get("tau_logit_fpr"),
        correlation,
        not_estimable,
        shown_fit if summary["sensitivity"] and summary["specificity"] else None,
        site_ids,
        tuple(excluded),
        censored,
        tuple(fit.notes),
        level,
    )
