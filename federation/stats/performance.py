r"""Pooling discrimination and calibration across sites.

A summary ROC curve from the sites' own score bands is in :mod:`federation.stats.multiple_threshold`.

Each measure is pooled on the scale on which its between-site distribution is closest to normal
(Snell et al. 2018): the c-statistic (AUC) on the logit scale, the observed:expected ratio on the log
scale, the calibration intercept and slope on their own scales. Pooling is random effects through
:func:`federation.stats.univariate.random_effects`, REML with Hartung–Knapp–Sidik–Jonkman intervals by
default (Debray et al. 2017), and the result is back-transformed.

References
----------
Debray TPA, Damen JAAG, Snell KIE, et al. (2017). A guide to systematic review and meta-analysis of
prediction model performance. BMJ 356:i6460. Snell KIE, Ensor J, Debray TPA, Moons KGM, Riley RD (2018).
Meta-analysis of prediction model performance across multiple studies: which scale helps ensure
between-study normality for the C-statistic and calibration measures? Stat Methods Med Res 27:3505–3522.
Debray TPA, Damen JAAG, Riley RD, et al. (2019). A framework for meta-analysis of prediction model studies
with binary and time-to-event outcomes. Stat Methods Med Res 28:2768–2786 (R package metamisc).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from typing import Literal

from federation.stats.proportions import _check_level
from federation.stats.results import PooledEstimate
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion
from federation.stats.univariate import random_effects

__all__ = [
    "PooledMeasure",
    "pool_auc",
    "pool_calibration_intercept",
    "pool_calibration_slope",
    "pool_observed_expected",
]

Method = Literal["DL", "REML", "PM"]
IntervalMethod = Literal["wald", "hksj"]


@dataclass(frozen=True)
class PooledMeasure(ResultRecord):
    """A performance measure pooled across sites, back-transformed to its natural scale.

    Attributes
    ----------
    measure : str
        What was pooled (``"AUC"``, ``"observed:expected ratio"``, ``"calibration intercept"``, ...).
    scale : str
        The analysis scale: ``"logit"``, ``"log"`` or ``"identity"``.
    estimate, ci_low, ci_high : float
        Pooled value and confidence interval on the natural scale.
    pi_low, pi_high : float or None
        Prediction interval for a new site on the natural scale (``None`` with fewer than 3 sites).
    pooled : PooledEstimate
        The pooled estimate on the analysis scale (tau², I², Q, method).
    sites_pooled : tuple of str
    sites_not_pooled : tuple of SiteExclusion
    notes : tuple of str
    """

    measure: str
    scale: str
    estimate: float
    ci_low: float
    ci_high: float
    pi_low: float | None
    pi_high: float | None
    pooled: PooledEstimate
    sites_pooled: tuple[str, ...]
    sites_not_pooled: tuple[SiteExclusion, ...] = ()
    notes: tuple[str, ...] = ()

    def summary(self) -> str:
        pct = f"{100 * self.pooled.level:g}%"
        pi = "undefined" if self.pi_low is None or self.pi_high is None else f"{self.pi_low:.3f} to {self.pi_high:.3f}"
        lines = [
            f"{self.measure} pooled on the {self.scale} scale ({self.pooled.method}, {self.pooled.interval_method}, "
            f"k = {self.pooled.n_studies})",
            f"  {self.estimate:.3f} ({pct} CI {self.ci_low:.3f} to {self.ci_high:.3f}; PI {pi})",
            f"  tau^2 {self.pooled.tau2:.4f}, I^2 {100 * (self.pooled.i2 or 0):.1f}%",
        ]
        lines.extend(f"  not pooled: {e.site_id} ({e.reason})" for e in self.sites_not_pooled)
        lines.extend(f"  note: {note}" for note in self.notes)
        return "\n".join(lines)


def _as_floats(values: Sequence[float | None], n: int, name: str) -> list[float | None]:
    if len(values) != n:
        raise PoolingError(f"got {len(values)} values of {name} for {n} sites")
    out: list[float | None] = []
    for v in values:
        if v is None or isinstance(v, bool):
            out.append(None)
            continue
        try:
            out.append(float(v))
        except (TypeError, ValueError):
            raise PoolingError(f"{name} must be numbers or None") from None
    return out


def _pool(
    measure: str,
    scale: str,
    site_ids: Sequence[str],
    rows: Sequence[tuple[float, float] | str],
    back: Callable[[float], float],
    method: Method,
    interval: IntervalMethod,
    level: float,
    notes: Sequence[str] = (),
) -> PooledMeasure:
    """Pool (estimate, variance) rows; a row that is a string is the reason that site is not pooled."""
    level = _check_level(level)
    kept, y, v, excluded = [], [], [], []
    for site, row in zip(site_ids, rows, strict=True):
        if isinstance(row, str):
            excluded.append(SiteExclusion(site, row))
        else:
            kept.append(site)
            y.append(row[0])
            v.append(row[1])
    if len(kept) < 2:
        raise PoolingError(f"pooling {measure} needs at least 2 sites with usable values, got {len(kept)}")
    pooled = random_effects(y, v, method=method, interval=interval, level=level)
    pi = (None, None) if pooled.pi_low is None else (back(pooled.pi_low), back(pooled.pi_high))  # type: ignore[arg-type]
    return PooledMeasure(
        measure=measure,
        scale=scale,
        estimate=back(pooled.estimate),
        ci_low=back(pooled.ci_low),
        ci_high=back(pooled.ci_high),
        pi_low=pi[0],
        pi_high=pi[1],
        pooled=pooled,
        sites_pooled=tuple(kept),
        sites_not_pooled=tuple(excluded),
        notes=tuple(notes),
    )


def _finite_positive(value: float | None) -> bool:
    return value is not None and math.isfinite(value) and value > 0


def pool_auc(
    site_ids: Sequence[str],
    auc: Sequence[float | None],
    se: Sequence[float | None],
    method: Method = "REML",
    interval: IntervalMethod = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    r"""Pool the AUC (c-statistic) on the logit scale.

    Parameters
    ----------
    site_ids : sequence of str
    auc : sequence of float or None
        Each site's AUC, strictly between 0 and 1 (``None``: not released).
    se : sequence of float or None
        Its standard error (for example DeLong's), positive.
    method, interval, level
        Passed to :func:`~federation.stats.univariate.random_effects` (default REML with HKSJ).

    Returns
    -------
    PooledMeasure

    Notes
    -----
    :math:`\theta = \mathrm{logit}(c)`, :math:`\mathrm{var}(\theta) = \mathrm{SE}(c)^2 / \{c(1-c)\}^2`
    (delta method; Debray et al. 2017, Table 2; metamisc ``ccalc``). A site without an AUC, with an AUC
    of 0 or 1, or with a zero or missing SE is not pooled (its reason is listed).

    References
    ----------
    Debray et al. (2017), BMJ 356:i6460. Snell et al. (2018), Stat Methods Med Res 27:3505.
    """
    n = len(site_ids)
    values, errors = _as_floats(auc, n, "auc"), _as_floats(se, n, "auc standard errors")
    rows: list[tuple[float, float] | str] = []
    for c, s in zip(values, errors, strict=True):
        if c is None or not math.isfinite(c):
            rows.append("no AUC released")
        elif not 0 < c < 1:
            rows.append("AUC of 0 or 1: undefined on the logit scale")
        elif not _finite_positive(s):
            rows.append("AUC standard error missing or zero")
        else:
            rows.append((math.log(c / (1 - c)), (s / (c * (1 - c))) ** 2))  # type: ignore[operator]
    return _pool("AUC", "logit", site_ids, rows, lambda x: 1 / (1 + math.exp(-x)), method, interval, level)


def pool_observed_expected(
    site_ids: Sequence[str],
    observed: Sequence[float | None],
    expected: Sequence[float | None],
    n: Sequence[float | None],
    method: Method = "REML",
    interval: IntervalMethod = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    r"""Pool the observed:expected (O:E) ratio on the log scale.

    Parameters
    ----------
    site_ids : sequence of str
    observed : sequence of int or None
        Observed events O.
    expected : sequence of float or None
        Expected events E (the sum of predicted risks), positive.
    n : sequence of int or None
        Participants N.
    method, interval, level
        As in :func:`pool_auc`.

    Returns
    -------
    PooledMeasure

    Notes
    -----
    :math:`\theta = \log(O/E)`, :math:`\mathrm{SE}(\theta) = \sqrt{(1 - O/N)/O}` (Debray et al. 2017,
    Table 2; metamisc ``oecalc`` with O, E and N). A site with no events has 0.5 added to O and N (as
    metamisc's ``add = 1/2``), named in ``notes``; a site with O = N, or without O, E or N, is not pooled.

    References
    ----------
    Debray et al. (2017), BMJ 356:i6460. Debray et al. (2019), Stat Methods Med Res 28:2768.
    """
    k = len(site_ids)
    o_values = _as_floats(observed, k, "observed events")
    e_values = _as_floats(expected, k, "expected events")
    n_values = _as_floats(n, k, "participants")
    rows: list[tuple[float, float] | str] = []
    corrected = []
    for site, o, e, total in zip(site_ids, o_values, e_values, n_values, strict=True):
        if o is None or e is None or total is None:
            rows.append("observed or expected events, or participants, not released")
        elif not (math.isfinite(o) and math.isfinite(e) and math.isfinite(total)) or o < 0 or total <= 0:
            rows.append("observed or expected events, or participants, not valid numbers")
        elif e <= 0:
            rows.append("expected events are 0: log O:E undefined")
        elif o >= total:
            rows.append("every participant had the event: SE of log O:E is 0")
        else:
            if o == 0:
                o, total = 0.5, total + 0.5
                corrected.append(site)
            rows.append((math.log(o / e), (1 - o / total) / o))
    notes = [f"0.5 added to observed events and participants of site(s) with no events: {', '.join(corrected)}"]
    return _pool(
        "observed:expected ratio", "log", site_ids, rows, math.exp, method, interval, level, notes if corrected else ()
    )


def _pool_identity(
    measure: str,
    site_ids: Sequence[str],
    estimates: Sequence[float | None],
    se: Sequence[float | None],
    method: Method,
    interval: IntervalMethod,
    level: float,
) -> PooledMeasure:
    k = len(site_ids)
    values, errors = _as_floats(estimates, k, measure), _as_floats(se, k, f"{measure} standard errors")
    rows: list[tuple[float, float] | str] = []
    for value, s in zip(values, errors, strict=True):
        if value is None or not math.isfinite(value):
            rows.append(f"no {measure} released")
        elif not _finite_positive(s):
            rows.append(f"{measure} standard error missing or zero")
        else:
            rows.append((value, s * s))  # type: ignore[operator]
    return _pool(measure, "identity", site_ids, rows, lambda x: x, method, interval, level)


def pool_calibration_intercept(
    site_ids: Sequence[str],
    estimates: Sequence[float | None],
    se: Sequence[float | None],
    method: Method = "REML",
    interval: IntervalMethod = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    """Pool calibration-in-the-large (logistic intercept with the linear predictor as offset), identity scale.

    References
    ----------
    Van Calster B, Nieboer D, Vergouwe Y, et al. (2016). A calibration hierarchy for risk models was
    defined: from utopia to empirical data. J Clin Epidemiol 74:167–176. Debray et al. (2017), BMJ 356:i6460.
    """
    return _pool_identity("calibration intercept", site_ids, estimates, se, method, interval, level)


def pool_calibration_slope(
    site_ids: Sequence[str],
    estimates: Sequence[float | None],
    se: Sequence[float | None],
    method: Method = "REML",
    interval: IntervalMethod = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    """Pool the calibration slope (logistic coefficient of the linear predictor), identity scale.

    References
    ----------
    Van Calster et al. (2016), J Clin Epidemiol 74:167. Snell et al. (2018), Stat Methods Med Res 27:3505.
    """
    return _pool_identity("calibration slope", site_ids, estimates, se, method, interval, level)
