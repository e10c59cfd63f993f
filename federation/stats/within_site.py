r"""Subgroup contrasts estimated inside each site, then pooled (not ecological).

Comparing pooled sensitivity in one subgroup with pooled sensitivity in another mixes within-site
differences with between-site differences (sites with more older children may also be referral clinics).
Here each site contributes the difference between its own subgroup levels,

.. math:: d_i = \mathrm{logit}\,\hat p_{iL} - \mathrm{logit}\,\hat p_{iR}, \qquad
          v_i = \frac{1}{x_{iL}} + \frac{1}{n_{iL} - x_{iL}} + \frac{1}{x_{iR}} + \frac{1}{n_{iR} - x_{iR}},

(the levels hold different participants, so the two logits are independent), and the :math:`d_i` are pooled
by random effects. Only sites with both levels contribute: the comparison is within sites by construction.

References
----------
Fisher DJ, Carpenter JR, Morris TP, Freeman SC, Tierney JF (2017). Meta-analytical methods to identify who
benefits most from treatments: daft, deluded, or deft approach? BMJ 356:j573. Riley RD, Debray TPA, Fisher D,
et al. (2020). Individual participant data meta-analysis to examine interactions between treatment effect and
participant-level covariates. Stat Med 39:2115–2137.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Literal

from scipy import stats

from federation.stats.performance import PooledMeasure, _pool
from federation.stats.serial import PoolingError, ResultRecord

__all__ = ["WithinSiteContrast", "within_site_auc_contrasts", "within_site_contrasts"]


@dataclass(frozen=True)
class WithinSiteContrast(ResultRecord):
    """One level against the reference level, estimated within sites and pooled.

    ``pooled`` is on the odds-ratio scale (exp of the pooled logit difference). ``between_subgroups`` tests
    that the within-site difference is 0 (``{statistic, distribution, df, p}``); ``residual_heterogeneity``
    is Cochran's Q of the site differences (``{q, df, p}``).
    """

    measure: str
    level: str
    reference: str
    pooled: PooledMeasure
    logit_difference: float
    logit_difference_ci_low: float
    logit_difference_ci_high: float
    between_subgroups: dict[str, float | int | str]
    residual_heterogeneity: dict[str, float | int]
    sentence: str


def _logit(x: int, n: int) -> tuple[float, float]:
    a, b = float(x), float(n - x)
    if 0 in (x, n - x):
        a, b = a + 0.5, b + 0.5
    return math.log(a / b), 1 / a + 1 / b


def within_site_contrasts(
    site_ids: Sequence[str],
    levels: Sequence[str],
    events: Sequence[int | None],
    totals: Sequence[int | None],
    measure: str = "sensitivity",
    reference: str | None = None,
    method: Literal["DL", "REML", "PM"] = "REML",
    interval: Literal["wald", "hksj"] = "hksj",
    level: float = 0.95,
) -> tuple[WithinSiteContrast, ...]:
    r"""Every level against a reference level, with the difference estimated inside each site and pooled.

    Parameters
    ----------
    site_ids, levels : sequence of str
        One entry per (site, level).
    events, totals : sequence of int or None
        For sensitivity: true positives and participants with the condition in that level (``None``: withheld).
    measure : str
        Label (``"sensitivity"``, ``"specificity"``).
    reference : str, optional
        The reference level; default the level present at most sites (the first such in order).
    method, interval, level
        As in :func:`~federation.stats.univariate.random_effects` (default REML with truncated HKSJ).

    Returns
    -------
    tuple of WithinSiteContrast
        One per non-reference level with at least 2 sites having both levels.

    Notes
    -----
    Each site's logit (0.5 added to both counts where one is 0) and variance as in the module docstring; the
    differences are pooled by :func:`~federation.stats.univariate.random_effects`. The test of no difference
    is :math:`t = \hat d/\mathrm{SE}` on :math:`k - 1` df with HKSJ (``z`` with Wald).
    """
    n = len(site_ids)
    if not (len(levels) == len(events) == len(totals) == n):
        raise PoolingError("site_ids, levels, events and totals must have the same length")
    usable: dict[str, dict[str, tuple[float, float]]] = {}
    for site, name, x, total in zip(site_ids, levels, events, totals, strict=True):
        if x is None or total is None or total <= 0 or not 0 <= x <= total:
            continue
        usable.setdefault(name, {})[site] = _logit(int(x), int(total))
    return _contrasts(site_ids, levels, usable, measure, reference, method, interval, level)


def within_site_auc_contrasts(
    site_ids: Sequence[str],
    levels: Sequence[str],
    auc: Sequence[float | None],
    se: Sequence[float | None],
    reference: str | None = None,
    method: Literal["DL", "REML", "PM"] = "REML",
    interval: Literal["wald", "hksj"] = "hksj",
    level: float = 0.95,
) -> tuple[WithinSiteContrast, ...]:
    r"""Every level's AUC against the reference level's, the difference estimated inside each site and pooled.

    Parameters
    ----------
    site_ids, levels : sequence of str
        One entry per (site, level).
    auc, se : sequence of float or None
        Each level's AUC at the site and its (DeLong) standard error (``None``: not released).
    reference, method, interval, level
        As in :func:`within_site_contrasts`.

    Returns
    -------
    tuple of WithinSiteContrast
        ``pooled`` is the ratio of the AUCs' odds, :math:`\exp(\mathrm{logit}\,c_L - \mathrm{logit}\,c_R)`.

    Notes
    -----
    On the logit scale (Debray et al. 2017): :math:`\mathrm{var}(\mathrm{logit}\,c) = \mathrm{SE}^2/\{c(1-c)\}^2`;
    the levels hold different participants, so the variance of the difference is the sum.

    References
    ----------
    Debray TPA, Damen JAAG, Snell KIE, et al. (2017). BMJ 356:i6460.
    """
    n = len(site_ids)
    if not (len(levels) == len(auc) == len(se) == n):
        raise PoolingError("site_ids, levels, auc and se must have the same length")
    usable: dict[str, dict[str, tuple[float, float]]] = {}
    for site, name, c, s in zip(site_ids, levels, auc, se, strict=True):
        if c is None or s is None or not 0 < c < 1 or not s > 0 or not math.isfinite(s):
            continue
        usable.setdefault(name, {})[site] = (math.log(c / (1 - c)), (s / (c * (1 - c))) ** 2)
    return _contrasts(site_ids, levels, usable, "AUC", reference, method, interval, level)


def _contrasts(
    site_ids: Sequence[str],
    levels: Sequence[str],
    usable: dict[str, dict[str, tuple[float, float]]],
    measure: str,
    reference: str | None,
    method: Literal["DL", "REML", "PM"],
    interval: Literal["wald", "hksj"],
    level: float,
) -> tuple[WithinSiteContrast, ...]:
    """Pool, for each level against ``reference``, the within-site differences of (logit, variance) pairs."""
    order = list(dict.fromkeys(levels))
    if reference is None:
        present = [name for name in order if name in usable]
        if not present:
            raise PoolingError(f"no level has a usable {measure} at any site")
        reference = max(present, key=lambda name: (len(usable[name]), -order.index(name)))
    if reference not in usable:
        raise PoolingError(f"the reference level {reference!r} has no usable {measure} at any site")
    out = []
    for name in order:
        if name == reference or name not in usable:
            continue
        both = [s for s in dict.fromkeys(site_ids) if s in usable[name] and s in usable[reference]]
        if len(both) < 2:
            continue
        rows: list[tuple[float, float] | str] = [
            (usable[name][s][0] - usable[reference][s][0], usable[name][s][1] + usable[reference][s][1]) for s in both
        ]
        pooled = _pool(
            f"odds ratio of {measure}, {name} vs {reference} (within sites)",
            "log",
            both,
            rows,
            math.exp,
            method,
            interval,
            level,
        )
        inner = pooled.pooled
        statistic = inner.estimate / inner.se
        if inner.interval_method == "hksj":
            df: int | None = inner.n_studies - 1
            p = float(2 * stats.t.sf(abs(statistic), df))
            test = {"statistic": statistic, "distribution": "t", "df": df, "p": p}
            shown = f"t({df}) = {statistic:.2f}"
        else:
            p = float(2 * stats.norm.sf(abs(statistic)))
            test = {"statistic": statistic, "distribution": "normal", "df": 0, "p": p}
            shown = f"z = {statistic:.2f}"
        sentence = (
            f"{measure[:1].upper()}{measure[1:]}, {name} vs {reference}, within {len(both)} sites: odds ratio "
            f"{pooled.estimate:.2f} ({100 * level:g}% CI {pooled.ci_low:.2f} to {pooled.ci_high:.2f}); "
            f"difference between subgroups: {shown}, p = {p:.3g}"
        )
        out.append(
            WithinSiteContrast(
                measure=measure,
                level=name,
                reference=reference,
                pooled=pooled,
                logit_difference=inner.estimate,
                logit_difference_ci_low=inner.ci_low,
                logit_difference_ci_high=inner.ci_high,
                between_subgroups=test,
                residual_heterogeneity={"q": inner.q, "df": inner.q_df, "p": inner.q_pvalue},
                sentence=sentence,
            )
        )
    return tuple(out)
