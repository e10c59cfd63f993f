r"""Subgroups and comparisons: meta-regression, subgroup differences, and paired comparison of two models.

- :func:`meta_regression`: meta-regression with a random site effect :math:`y_i = x_i^\top\beta + u_i + e_i`,
  :math:`u_i \sim N(0, \tau^2)`, :math:`e_i \sim N(0, v_i)`, with REML (or DL) for :math:`\tau^2`, a joint
  test that the moderators' coefficients are all zero and Cochran's Q of the residuals (checked against
  the worked examples of Viechtbauer 2010).
- :func:`subgroup_analysis`: a pooled estimate per subgroup, and the test of subgroup difference as a
  meta-regression on subgroup indicators (a common between-site variance).
- :func:`paired_difference`: per site, the difference in sensitivity (or specificity) of two models read
  on the same participants, with the variance of a difference of paired proportions; pooled.
- :func:`pool_auc_difference`: per site, the AUC difference with its paired DeLong variance; pooled.

References
----------
Viechtbauer W (2010). Conducting meta-analyses in R with the metafor package. J Stat Softw 36(3):1–48.
Thompson SG, Higgins JPT (2002). How should meta-regression analyses be undertaken and interpreted?
Stat Med 21:1559–1573. Borenstein M, Hedges LV, Higgins JPT, Rothstein HR (2009). Introduction to
Meta-Analysis, ch. 19. DeLong ER, DeLong DM, Clarke-Pearson DL (1988). Comparing the areas under two or
more correlated receiver operating characteristic curves. Biometrics 44:837–845.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import stats

from federation.stats.performance import PooledMeasure, _pool
from federation.stats.proportions import _check_level, _whole_number
from federation.stats.results import PooledEstimate
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion
from federation.stats.univariate import random_effects

__all__ = [
    "MetaRegression",
    "SubgroupAnalysis",
    "SubgroupEstimate",
    "meta_regression",
    "paired_difference",
    "pool_auc_difference",
    "subgroup_analysis",
]

_TOLERANCE = 1e-10
_MAX_ITERATIONS = 1000


HARTUNG_KNAPP = "hartung-knapp"
WALD = "wald"
_TEST_NAMES = {"z": WALD, "knha": HARTUNG_KNAPP, WALD: WALD, HARTUNG_KNAPP: HARTUNG_KNAPP}


@dataclass(frozen=True)
class JointTest(ResultRecord):
    """A test that several coefficients are all zero (e.g. that the subgroups do not differ).

    Attributes
    ----------
    statistic : float
        The F statistic (Hartung–Knapp) or the chi-squared statistic (Wald).
    distribution : str
        ``"F"`` or ``"chi-squared"``: the reference distribution of ``statistic``.
    df : tuple of int
        Its degrees of freedom: (numerator, denominator) for F, one number for chi-squared.
    p : float
        The p-value.
    """

    statistic: float
    distribution: str
    df: tuple[int, ...]
    p: float

    def sentence(self, what: str) -> str:
        """``what: F(1, 5) = 2.31, p = 0.19`` (the statistic with its degrees of freedom)."""
        symbol = "F" if self.distribution == "F" else "χ²"
        return f"{what}: {symbol}({', '.join(str(d) for d in self.df)}) = {self.statistic:.2f}, p = {self.p:.2g}"


@dataclass(frozen=True)
class ResidualHeterogeneity(ResultRecord):
    """Cochran's Q of what the moderators leave unexplained, on ``df`` = k − p degrees of freedom."""

    q: float
    df: int
    p: float

    def sentence(self) -> str:
        return f"Heterogeneity left unexplained: Q = {self.q:.2f} on {self.df} df, p = {self.p:.2g}"


@dataclass(frozen=True)
class MetaRegression(ResultRecord):
    """A fitted meta-regression with a random site effect.

    Attributes
    ----------
    method : str
        ``"REML"`` or ``"DL"`` (estimator of the residual tau²).
    test : str
        ``"wald"`` (normal and chi-squared) or ``"hartung-knapp"`` (Hartung–Knapp: t and F).
    names : tuple of str
        Coefficient names (the first is the intercept).
    coefficients, se, ci_low, ci_high, statistics, p_values : tuple of float
        Per coefficient.
    tau2 : float
        Residual between-study variance.
    moderators : JointTest
        Test that every coefficient but the intercept is zero (chi-squared on m df, or F on (m, k − p) df
        with Hartung–Knapp).
    residual_heterogeneity : ResidualHeterogeneity
        Cochran's Q of the residuals (weights 1/v) on k − p degrees of freedom.
    i2 : float
        Residual I²: tau² / (tau² + the typical within-site variance).
    r2 : float or None
        Proportion of tau² accounted for, relative to the intercept-only model (``None`` if that tau² is 0).
    n_studies : int
    level : float
    """

    method: str
    test: str
    names: tuple[str, ...]
    coefficients: tuple[float, ...]
    se: tuple[float, ...]
    ci_low: tuple[float, ...]
    ci_high: tuple[float, ...]
    statistics: tuple[float, ...]
    p_values: tuple[float, ...]
    tau2: float
    moderators: JointTest
    residual_heterogeneity: ResidualHeterogeneity
    i2: float
    r2: float | None
    n_studies: int
    level: float = 0.95

    def summary(self) -> str:
        test = "Hartung–Knapp" if self.test == HARTUNG_KNAPP else "Wald"
        explained = "not estimable: no between-site variance to explain" if self.r2 is None else f"{100 * self.r2:.0f}%"
        lines = [
            f"Meta-regression over {self.n_studies} sites with a random site effect ({self.method} estimate of "
            f"the between-site variance, {test} tests)",
            f"  between-site variance left: tau² = {self.tau2:.4f} (I² {100 * self.i2:.0f}%); "
            f"share of it the moderators explain: {explained}",
            "  " + self.residual_heterogeneity.sentence(),
            "  " + self.moderators.sentence("All moderators together"),
        ]
        for i, name in enumerate(self.names):
            lines.append(
                f"  {name:<24} {self.coefficients[i]: .4f}  SE {self.se[i]:.4f}  "
                f"({self.ci_low[i]:.4f} to {self.ci_high[i]:.4f})  p = {self.p_values[i]:.2g}"
            )
        return "\n".join(lines)


def _wls(
    y: NDArray[np.float64], x: NDArray[np.float64], w: NDArray[np.float64]
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    xtwx = x.T @ (w[:, None] * x)
    cov = np.linalg.inv(xtwx)
    return cov @ (x.T @ (w * y)), cov


def _projection(x: NDArray[np.float64], w: NDArray[np.float64]) -> NDArray[np.float64]:
    wx = w[:, None] * x
    return np.diag(w) - wx @ np.linalg.inv(x.T @ wx) @ wx.T


def _tau2_reml_regression(y: NDArray[np.float64], v: NDArray[np.float64], x: NDArray[np.float64]) -> float:
    """REML by Fisher scoring, truncated at 0 (metafor's algorithm for rma.uni with moderators)."""
    tau2 = _tau2_dl_regression(y, v, x)
    for _ in range(_MAX_ITERATIONS):
        p = _projection(x, 1.0 / (v + tau2))
        py = p @ y
        new = max(0.0, tau2 + float((py @ py - np.trace(p)) / np.sum(p * p)))
        if abs(new - tau2) <= _TOLERANCE * max(1.0, tau2):
            return new
        tau2 = new
    return tau2


def _tau2_dl_regression(y: NDArray[np.float64], v: NDArray[np.float64], x: NDArray[np.float64]) -> float:
    """Method-of-moments estimator for meta-regression (Raudenbush 2009), floored at 0."""
    p0 = _projection(x, 1.0 / v)
    qe = float(y @ p0 @ y)
    return max(0.0, (qe - (y.size - x.shape[1])) / float(np.trace(p0)))


def meta_regression(
    estimates: ArrayLike,
    variances: ArrayLike,
    moderators: ArrayLike,
    names: Sequence[str] | None = None,
    method: Literal["REML", "DL"] = "REML",
    test: Literal["wald", "hartung-knapp", "z", "knha"] = "wald",
    level: float = 0.95,
    knha_truncation: bool = True,
) -> MetaRegression:
    r"""Meta-regression with a random site effect, an intercept and the given moderators.

    Parameters
    ----------
    estimates, variances : array_like of shape (k,)
        Per-study estimates and within-study variances (positive).
    moderators : array_like of shape (k,) or (k, m)
        Moderator values; an intercept column is added.
    names : sequence of str, optional
        Names of the moderators (the intercept is ``"intercept"``).
    method : {"REML", "DL"}, default "REML"
    test : {"wald", "hartung-knapp"}, default "wald"
        ``"wald"``: normal and chi-squared tests. ``"hartung-knapp"``: Hartung–Knapp adjustment,
        :math:`\mathrm{Var}(\hat\beta) = s^2 (X^\top W X)^{-1}` with
        :math:`s^2 = \max\{1, \sum w_i (y_i - x_i^\top\hat\beta)^2 / (k - p)\}` (the ad hoc truncation of
        Knapp & Hartung 2003, so the tests are never more liberal than the Wald variance; ``knha_truncation=False``
        gives the untruncated form), t and F tests. ``"z"`` and ``"knha"`` are accepted as older spellings.
    level : float, default 0.95

    Returns
    -------
    MetaRegression

    Notes
    -----
    :math:`\hat\beta = (X^\top W X)^{-1} X^\top W y` with :math:`W = \mathrm{diag}\{1/(v_i + \hat\tau^2)\}`;
    the joint test of the non-intercept coefficients uses
    :math:`\hat\beta_{(2)}^\top \mathrm{Var}(\hat\beta_{(2)})^{-1} \hat\beta_{(2)}` (divided by their number
    for F); the residual heterogeneity is :math:`Q = y^\top P_0 y` with the fixed-effects projection :math:`P_0`;
    residual :math:`I^2 = \hat\tau^2/(\hat\tau^2 + (k-p)/\mathrm{tr}\,P_0)`.

    References
    ----------
    Viechtbauer (2010), J Stat Softw 36(3), section 3.3. Knapp G, Hartung J (2003). Improved tests for a
    random effects meta-regression with a single covariate. Stat Med 22:2693–2710.
    """
    y = np.asarray(estimates, dtype=float).ravel()
    v = np.asarray(variances, dtype=float).ravel()
    mods = np.asarray(moderators, dtype=float)
    mods = mods.reshape(-1, 1) if mods.ndim == 1 else mods
    if y.shape != v.shape or mods.shape[0] != y.size:
        raise PoolingError("estimates, variances and moderators must describe the same studies")
    if not (np.all(np.isfinite(y)) and np.all(np.isfinite(v)) and np.all(np.isfinite(mods))):
        raise PoolingError("estimates, variances and moderators must be finite")
    if np.any(v <= 0):
        raise PoolingError("variances must be positive")
    level = _check_level(level)
    if method not in ("REML", "DL") or test not in _TEST_NAMES:
        raise PoolingError("method must be 'REML' or 'DL' and test 'wald' or 'hartung-knapp'")
    test = _TEST_NAMES[test]  # type: ignore[assignment]
    x = np.column_stack([np.ones(y.size), mods])
    k, p = x.shape
    if k <= p:
        raise PoolingError(f"meta-regression with {p} coefficients needs more than {p} studies, got {k}")
    if np.linalg.matrix_rank(x) < p:
        raise PoolingError("the moderators are collinear (or a subgroup indicator is constant)")
    labels = ("intercept", *(names or (f"moderator {j + 1}" for j in range(p - 1))))
    if len(labels) != p:
        raise PoolingError(f"got {len(labels) - 1} names for {p - 1} moderators")
    tau2 = _tau2_reml_regression(y, v, x) if method == "REML" else _tau2_dl_regression(y, v, x)
    w = 1.0 / (v + tau2)
    beta, cov = _wls(y, x, w)
    df = k - p
    if test == HARTUNG_KNAPP:
        residual = y - x @ beta
        factor = float(np.sum(w * residual**2) / df)
        cov = cov * (max(1.0, factor) if knha_truncation else factor)
    se = np.sqrt(np.diag(cov))
    stat = beta / se
    alpha = 1 - level
    if test == HARTUNG_KNAPP:
        critical = float(stats.t.isf(alpha / 2, df))
        pvals = 2 * stats.t.sf(np.abs(stat), df)
    else:
        critical = float(stats.norm.isf(alpha / 2))
        pvals = 2 * stats.norm.sf(np.abs(stat))
    b2, c2 = beta[1:], cov[1:, 1:]
    joint = float(b2 @ np.linalg.solve(c2, b2))
    m = p - 1
    if test == HARTUNG_KNAPP:
        joint /= m
        joint_p = float(stats.f.sf(joint, m, df))
    else:
        joint_p = float(stats.chi2.sf(joint, m))
    p0 = _projection(x, 1.0 / v)
    q_residual = float(y @ p0 @ y)
    typical = df / float(np.trace(p0))
    tau2_intercept = (
        random_effects(y, v, method=method).tau2 if method in ("REML", "DL") else tau2  # same estimator, no mods
    )
    r2 = None if tau2_intercept <= 0 else max(0.0, (tau2_intercept - tau2) / tau2_intercept)
    return MetaRegression(
        method=method,
        test=test,
        names=tuple(labels),
        coefficients=tuple(float(b) for b in beta),
        se=tuple(float(s) for s in se),
        ci_low=tuple(float(b - critical * s) for b, s in zip(beta, se, strict=True)),
        ci_high=tuple(float(b + critical * s) for b, s in zip(beta, se, strict=True)),
        statistics=tuple(float(s) for s in stat),
        p_values=tuple(float(pv) for pv in pvals),
        tau2=float(tau2),
        moderators=JointTest(
            statistic=joint,
            distribution="F" if test == HARTUNG_KNAPP else "chi-squared",
            df=(m, df) if test == HARTUNG_KNAPP else (m,),
            p=joint_p,
        ),
        residual_heterogeneity=ResidualHeterogeneity(q=q_residual, df=df, p=float(stats.chi2.sf(q_residual, df))),
        i2=float(tau2 / (tau2 + typical)),
        r2=r2,
        n_studies=k,
        level=level,
    )


@dataclass(frozen=True)
class SubgroupEstimate(ResultRecord):
    """The pooled estimate within one subgroup (``pooled`` is ``None`` when it has fewer than 2 sites)."""

    subgroup: str
    sites: tuple[str, ...]
    pooled: PooledEstimate | None
    reason: str | None = None


@dataclass(frozen=True)
class SubgroupAnalysis(ResultRecord):
    """Pooled estimates per subgroup and the test of the difference between subgroups.

    ``between_subgroups`` tests whether the subgroups' pooled values differ, ``residual_heterogeneity`` is
    what differences between sites leave within subgroups, and ``regression`` is the meta-regression on
    indicators of every subgroup but the first that both come from (its coefficients are each subgroup's
    difference from the first). All three are ``None`` when fewer than two subgroups, or too few sites,
    allow the test; ``reason`` then says why.
    """

    measure: str
    scale: str
    subgroups: tuple[SubgroupEstimate, ...]
    between_subgroups: JointTest | None
    residual_heterogeneity: ResidualHeterogeneity | None
    regression: MetaRegression | None
    reason: str | None
    sites_not_pooled: tuple[SiteExclusion, ...] = ()

    def summary(self) -> str:
        lines = [f"{self.measure} by subgroup ({self.scale} scale)"]
        for sub in self.subgroups:
            if sub.pooled is None:
                lines.append(f"  {sub.subgroup}: not pooled ({sub.reason})")
            else:
                lines.append(
                    f"  {sub.subgroup}: {sub.pooled.estimate:.4f} "
                    f"({sub.pooled.ci_low:.4f} to {sub.pooled.ci_high:.4f}),"
                    f" k = {sub.pooled.n_studies}"
                )
        if self.between_subgroups is not None:
            lines.append("  " + self.between_subgroups.sentence("Difference between subgroups"))
        else:
            lines.append(f"  Difference between subgroups: not estimable: {self.reason}")
        return "\n".join(lines)


def subgroup_analysis(
    site_ids: Sequence[str],
    estimates: Sequence[float | None],
    variances: Sequence[float | None],
    subgroups: Sequence[str],
    measure: str = "estimate",
    scale: str = "identity",
    method: Literal["REML", "DL"] = "REML",
    interval: Literal["wald", "hksj"] = "hksj",
    level: float = 0.95,
) -> SubgroupAnalysis:
    """Pooled estimate per subgroup and a mixed-effects test of subgroup difference.

    Parameters
    ----------
    site_ids : sequence of str
        One entry per (site, subgroup) estimate; a site may appear once per subgroup.
    estimates, variances : sequence of float or None
        On an additive analysis scale (for example logit sensitivity); ``None`` = not available.
    subgroups : sequence of str
        The subgroup of each estimate; subgroups are reported in order of first appearance.
    measure, scale : str
        Labels for the result.
    method : {"REML", "DL"}, default "REML"
    interval : {"wald", "hksj"}, default "hksj"
        Per-subgroup intervals; with ``"hksj"`` the difference test is Hartung–Knapp's F test.
    level : float, default 0.95

    Returns
    -------
    SubgroupAnalysis

    Notes
    -----
    The difference test fits :func:`meta_regression` with an indicator for every subgroup but the first
    and a common residual tau² (Borenstein et al. 2009, ch. 19, "mixed-effects model, pooled tau²").
    With two subgroups it tests whether their pooled values differ; with more, whether any does.
    """
    n = len(site_ids)
    if not (len(estimates) == len(variances) == len(subgroups) == n):
        raise PoolingError("site_ids, estimates, variances and subgroups must have the same length")
    kept: list[int] = []
    excluded: list[SiteExclusion] = []
    for i in range(n):
        y, v = estimates[i], variances[i]
        if y is None or v is None or not math.isfinite(y) or not math.isfinite(v):
            excluded.append(SiteExclusion(site_ids[i], f"no usable estimate in subgroup {subgroups[i]!r}"))
        elif v <= 0:
            excluded.append(SiteExclusion(site_ids[i], f"zero variance in subgroup {subgroups[i]!r}"))
        else:
            kept.append(i)
    order = list(dict.fromkeys(subgroups[i] for i in kept))
    results = []
    for name in order:
        members = [i for i in kept if subgroups[i] == name]
        sites = tuple(site_ids[i] for i in members)
        if len(members) < 2:
            results.append(SubgroupEstimate(name, sites, None, "fewer than 2 sites"))
            continue
        pooled = random_effects(
            [estimates[i] for i in members], [variances[i] for i in members], method, interval, level
        )
        results.append(SubgroupEstimate(name, sites, pooled))
    regression, reason = None, None
    if len(order) < 2:
        reason = "fewer than 2 subgroups with usable estimates"
    elif len(kept) <= len(order):
        reason = "too few sites for a meta-regression on the subgroup indicators"
    else:
        indicators = np.array([[1.0 if subgroups[i] == g else 0.0 for g in order[1:]] for i in kept])
        regression = meta_regression(
            [estimates[i] for i in kept],
            [variances[i] for i in kept],
            indicators,
            names=[f"{g} vs {order[0]}" for g in order[1:]],
            method=method,
            test=HARTUNG_KNAPP if interval == "hksj" else WALD,
            level=level,
        )
    return SubgroupAnalysis(
        measure,
        scale,
        tuple(results),
        regression.moderators if regression else None,
        regression.residual_heterogeneity if regression else None,
        regression,
        reason,
        tuple(excluded),
    )


def _paired_row(both: object, first: object, second: object, neither: object) -> tuple[float, float, bool] | str:
    cells = [_whole_number(c) if c is not None else None for c in (both, first, second, neither)]
    if any(c is None for c in cells):
        return "a count of the paired table is withheld or missing"
    a, b, c, d = cells  # type: ignore[misc]
    if min(a, b, c, d) < 0:  # type: ignore[operator]
        return "a cell of the paired table is negative"
    n = a + b + c + d  # type: ignore[operator]
    if n == 0:
        return "no participants in this group"
    diff = (b - c) / n  # type: ignore[operator]
    var = ((b + c) - (b - c) ** 2 / n) / n**2  # type: ignore[operator]
    if var > 0:
        return diff, var, False
    # No discordant pairs (or all in one direction): variance 0. Fallback: 0.5 added to both discordant cells.
    b2, c2, n2 = b + 0.5, c + 0.5, n + 1.0  # type: ignore[operator]
    return (b2 - c2) / n2, ((b2 + c2) - (b2 - c2) ** 2 / n2) / n2**2, True


def paired_difference(
    site_ids: Sequence[str],
    both: Sequence[int | None],
    first_only: Sequence[int | None],
    second_only: Sequence[int | None],
    neither: Sequence[int | None],
    measure: str = "difference in sensitivity (first model minus second)",
    method: Literal["DL", "REML", "PM"] = "REML",
    interval: Literal["wald", "hksj"] = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    r"""Pool per-site differences of two paired proportions (two models read on the same participants).

    Parameters
    ----------
    site_ids : sequence of str
    both, first_only, second_only, neither : sequence of int or None
        The paired 2×2 per site: participants both models call "correct" (positive among those with the
        condition, for sensitivity; negative among those without, for specificity), only the first,
        only the second, neither.
    measure : str
        Label for the result.
    method, interval, level
        As in :func:`~federation.stats.univariate.random_effects` (default REML with HKSJ).

    Returns
    -------
    PooledMeasure
        On the identity (risk-difference) scale.

    Notes
    -----
    With :math:`b` = first only, :math:`c` = second only and :math:`n` participants, the difference is
    :math:`(b - c)/n` and its variance :math:`\{(b + c) - (b - c)^2/n\}/n^2`, the multinomial variance of
    :math:`p_1 - p_2` for paired proportions (Agresti 2013, Categorical Data Analysis, §11.1.1). When it
    is 0 (no discordant pairs) 0.5 is added to both discordant cells (fallback named in ``notes``).
    """
    n = len(site_ids)
    if not (len(both) == len(first_only) == len(second_only) == len(neither) == n):
        raise PoolingError("every paired cell needs one value per site")
    rows: list[tuple[float, float] | str] = []
    corrected = []
    for i in range(n):
        row = _paired_row(both[i], first_only[i], second_only[i], neither[i])
        if isinstance(row, str):
            rows.append(row)
        else:
            rows.append((row[0], row[1]))
            if row[2]:
                corrected.append(site_ids[i])
    notes = (
        [f"no discordant pairs (variance 0): 0.5 added to both discordant cells at {', '.join(corrected)}"]
        if corrected
        else []
    )
    return _pool(measure, "identity", site_ids, rows, lambda x: x, method, interval, level, notes)


def pool_auc_difference(
    site_ids: Sequence[str],
    auc_first: Sequence[float | None],
    auc_second: Sequence[float | None],
    se_first: Sequence[float | None],
    se_second: Sequence[float | None],
    covariance: Sequence[float | None],
    method: Literal["DL", "REML", "PM"] = "REML",
    interval: Literal["wald", "hksj"] = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    r"""Pool per-site AUC differences of two models read on the same participants.

    Parameters
    ----------
    site_ids : sequence of str
    auc_first, auc_second : sequence of float or None
    se_first, se_second : sequence of float or None
        DeLong standard errors.
    covariance : sequence of float or None
        Paired DeLong covariance of the two AUCs.
    method, interval, level
        As in :func:`~federation.stats.univariate.random_effects`.

    Returns
    -------
    PooledMeasure

    Notes
    -----
    :math:`d = \mathrm{AUC}_1 - \mathrm{AUC}_2`,
    :math:`\mathrm{var}(d) = \mathrm{SE}_1^2 + \mathrm{SE}_2^2 - 2\,\mathrm{cov}_{12}` (DeLong et al. 1988).
    A site whose variance is not positive (identical scores) is not pooled.
    """
    n = len(site_ids)
    columns = [auc_first, auc_second, se_first, se_second, covariance]
    if any(len(c) != n for c in columns):
        raise PoolingError("every AUC input needs one value per site")
    rows: list[tuple[float, float] | str] = []
    for i in range(n):
        values = [c[i] for c in columns]
        if any(v is None or not math.isfinite(float(v)) for v in values):
            rows.append("AUCs, standard errors or covariance not released")
            continue
        a, b, sa, sb, cov = (float(v) for v in values)  # type: ignore[arg-type]
        var = sa * sa + sb * sb - 2 * cov
        if var <= 0:
            rows.append("variance of the AUC difference is not positive (the two scores rank alike)")
        else:
            rows.append((a - b, var))
    return _pool(
        "AUC difference (first model minus second)", "identity", site_ids, rows, lambda x: x, method, interval, level
    )
