r"""Deeks' funnel plot asymmetry test for diagnostic accuracy (small-site effects).

Regression of each site's log diagnostic odds ratio on :math:`1/\sqrt{\mathrm{ESS}}`, weighted by the
effective sample size :math:`\mathrm{ESS} = 4 n_1 n_0/(n_1 + n_0)` (:math:`n_1`, :math:`n_0`: participants
with and without the condition). A slope different from 0 (t test on k − 2 df; Deeks et al. suggest
p < 0.10) means small sites report systematically different accuracy: publication-like bias, or sites
whose size goes with their case mix or their threshold.

References
----------
Deeks JJ, Macaskill P, Irwig L (2005). The performance of tests of publication bias and other sample size
effects in systematic reviews of diagnostic test accuracy was assessed. J Clin Epidemiol 58:882–893.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import stats

from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion

__all__ = ["FunnelAsymmetry", "deeks_funnel_test"]


@dataclass(frozen=True)
class FunnelAsymmetry(ResultRecord):
    """Deeks' test: intercept and slope of log DOR on 1/sqrt(ESS), and the test that the slope is 0.

    ``test`` is ``{"statistic", "distribution", "df", "p"}`` for the slope.
    """

    intercept: float
    intercept_se: float
    slope: float
    slope_se: float
    test: dict[str, float | int | str]
    sites_pooled: tuple[str, ...]
    effective_sample_size: tuple[float, ...]
    log_diagnostic_odds_ratio: tuple[float, ...]
    sites_not_pooled: tuple[SiteExclusion, ...] = ()
    notes: tuple[str, ...] = ()
    method: str = (
        "Deeks' funnel plot asymmetry test: weighted least squares of log DOR on 1/sqrt(effective sample size), "
        "weights the effective sample size, t test of the slope on k-2 df"
    )

    def summary(self) -> str:
        t = self.test
        return (
            f"Deeks' funnel asymmetry test (k = {len(self.sites_pooled)}): slope {self.slope:.3f} "
            f"(SE {self.slope_se:.3f}), t({t['df']}) = {t['statistic']:.3f}, p = {t['p']:.3g}"
        )


def deeks_funnel_test(
    site_ids: Sequence[str],
    tp: Sequence[int | None],
    fp: Sequence[int | None],
    fn: Sequence[int | None],
    tn: Sequence[int | None],
) -> FunnelAsymmetry:
    r"""Deeks' funnel plot asymmetry test from each site's 2×2 table.

    Parameters
    ----------
    site_ids : sequence of str
    tp, fp, fn, tn : sequence of int or None
        Per site; a site with a withheld cell, or without participants in one class, is not used.

    Returns
    -------
    FunnelAsymmetry

    Notes
    -----
    :math:`\ln\mathrm{DOR}_i = \ln\{(tp\,tn)/(fp\,fn)\}` with 0.5 added to every cell of a table with a zero
    cell; :math:`\mathrm{ESS}_i = 4 n_{1i} n_{0i}/(n_{1i} + n_{0i})`. Fit :math:`\ln\mathrm{DOR}_i = a + b /
    \sqrt{\mathrm{ESS}_i}` by least squares weighted by :math:`\mathrm{ESS}_i` with the residual variance
    estimated; test :math:`b = 0` with :math:`t = \hat b/\mathrm{SE}(\hat b)` on :math:`k - 2` df.

    References
    ----------
    Deeks, Macaskill & Irwig (2005), J Clin Epidemiol 58:882–893.
    """
    n = len(site_ids)
    if not (len(tp) == len(fp) == len(fn) == len(tn) == n):
        raise PoolingError("every cell needs one value per site")
    kept, y, ess, excluded, corrected = [], [], [], [], []
    for i, site in enumerate(site_ids):
        cells = (tp[i], fp[i], fn[i], tn[i])
        if any(c is None for c in cells):
            excluded.append(SiteExclusion(site, "a cell of the 2x2 table is withheld"))
            continue
        a, b, c, d = (float(x) for x in cells)  # type: ignore[arg-type]
        if a + c == 0 or b + d == 0:
            excluded.append(SiteExclusion(site, "no participants with (or without) the condition"))
            continue
        n1, n0 = a + c, b + d
        if min(a, b, c, d) == 0:
            a, b, c, d = a + 0.5, b + 0.5, c + 0.5, d + 0.5
            corrected.append(site)
        kept.append(site)
        y.append(math.log(a * d / (b * c)))
        ess.append(4 * n1 * n0 / (n1 + n0))
    k = len(kept)
    if k < 3:
        raise PoolingError(f"Deeks' test needs at least 3 sites with complete tables, got {k}")
    values, weights = np.array(y), np.array(ess)
    x = np.column_stack([np.ones(k), 1 / np.sqrt(weights)])
    if np.ptp(x[:, 1]) == 0:
        raise PoolingError("every site has the same effective sample size: the slope is not estimable")
    xtwx = x.T @ (weights[:, None] * x)
    beta = np.linalg.solve(xtwx, x.T @ (weights * values))
    residual = values - x @ beta
    df = k - 2
    scale = float(np.sum(weights * residual**2) / df)
    cov = scale * np.linalg.inv(xtwx)
    se = np.sqrt(np.diag(cov))
    notes = [f"0.5 added to every cell of site(s) with a zero cell: {', '.join(corrected)}"] if corrected else []
    if scale == 0:
        raise PoolingError("the log diagnostic odds ratios lie exactly on a line: no residual variance")
    statistic = float(beta[1] / se[1])
    return FunnelAsymmetry(
        intercept=float(beta[0]),
        intercept_se=float(se[0]),
        slope=float(beta[1]),
        slope_se=float(se[1]),
        test={"statistic": statistic, "distribution": "t", "df": df, "p": float(2 * stats.t.sf(abs(statistic), df))},
        sites_pooled=tuple(kept),
        effective_sample_size=tuple(float(e) for e in ess),
        log_diagnostic_odds_ratio=tuple(float(v) for v in y),
        sites_not_pooled=tuple(excluded),
        notes=tuple(notes),
    )
