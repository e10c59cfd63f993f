r"""Pooling agreement and per-site proportions across sites: Cohen's kappa, discordance, error rates by band.

- :func:`pool_kappa`: each site's Cohen's kappa with its large-sample SE (computed at the site; Fleiss, Cohen
  & Everitt 1969), pooled by random effects on the kappa scale with tau², I² and a prediction interval
  (Sun 2011 recommends the random-effects model for kappa across studies).
- :func:`pool_proportion`: a proportion per site (how often two reference standards disagree; how often the
  screen is wrong in a score-margin band) pooled on the logit scale by random effects.

Both pool with :func:`federation.stats.univariate.random_effects` (REML, Hartung–Knapp–Sidik–Jonkman
interval truncated at the Wald variance, prediction interval with t on k − 2 df).

References
----------
Fleiss JL, Cohen J, Everitt BS (1969). Large sample standard errors of kappa and weighted kappa. Psychol Bull
72:323–327. Sun S (2011). Meta-analysis of Cohen's kappa. Health Serv Outcomes Res Methodol 11:145–163.
Hamza TH, van Houwelingen HC, Stijnen T (2008). The binomial distribution of meta-analysis was preferred to
model within-study variability. J Clin Epidemiol 61:41–51.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Literal

from federation.stats.performance import PooledMeasure, _as_floats, _pool
from federation.stats.serial import PoolingError

__all__ = ["pool_kappa", "pool_proportion"]

Method = Literal["DL", "REML", "PM"]
IntervalMethod = Literal["wald", "hksj"]


def pool_kappa(
    site_ids: Sequence[str],
    kappa: Sequence[float | None],
    se: Sequence[float | None],
    measure: str = "Cohen's kappa",
    method: Method = "REML",
    interval: IntervalMethod = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    r"""Pool Cohen's kappa across sites by random effects.

    Parameters
    ----------
    site_ids : sequence of str
    kappa : sequence of float or None
        Each site's kappa (``None``: not released).
    se : sequence of float or None
        Its large-sample standard error, positive.
    measure : str
        Label (for example which pair of ratings agree).
    method, interval, level
        Passed to :func:`~federation.stats.univariate.random_effects` (default REML with truncated HKSJ).

    Returns
    -------
    PooledMeasure
        On the kappa (identity) scale; the pooled estimate and its limits are clipped to [-1, 1].

    Notes
    -----
    :math:`\hat\kappa = \sum w_i\kappa_i/\sum w_i` with :math:`w_i = 1/(\mathrm{SE}_i^2 + \hat\tau^2)`. A site
    with kappa of exactly 1 or a zero SE (perfect agreement) is not pooled: its variance is 0 and it would take
    all the weight.

    References
    ----------
    Sun S (2011). Health Serv Outcomes Res Methodol 11:145–163. Fleiss, Cohen & Everitt (1969).
    """
    n = len(site_ids)
    values, errors = _as_floats(kappa, n, "kappa"), _as_floats(se, n, "kappa standard errors")
    rows: list[tuple[float, float] | str] = []
    for k, s in zip(values, errors, strict=True):
        if k is None or not math.isfinite(k):
            rows.append("kappa not released (a count it rests on is withheld, or no second rating)")
        elif not -1 <= k <= 1:
            rows.append("kappa outside [-1, 1]")
        elif s is None or not math.isfinite(s) or s <= 0:
            rows.append("kappa standard error missing or zero (perfect agreement)")
        else:
            rows.append((k, s * s))
    return _pool(measure, "identity", site_ids, rows, lambda x: max(-1.0, min(1.0, x)), method, interval, level)


def pool_proportion(
    site_ids: Sequence[str],
    events: Sequence[int | None],
    totals: Sequence[int | None],
    measure: str = "proportion",
    method: Method = "REML",
    interval: IntervalMethod = "hksj",
    level: float = 0.95,
) -> PooledMeasure:
    r"""Pool a proportion (events out of a total per site) on the logit scale by random effects.

    Parameters
    ----------
    site_ids : sequence of str
    events, totals : sequence of int or None
        Per site; ``None`` where withheld.
    measure : str
        Label for the result.
    method, interval, level
        As in :func:`pool_kappa`.

    Returns
    -------
    PooledMeasure
        Back-transformed to a proportion.

    Notes
    -----
    :math:`y_i = \log\{x_i/(n_i - x_i)\}`, :math:`v_i = 1/x_i + 1/(n_i - x_i)`, with 0.5 added to both where
    either is 0 (named in ``notes``). A site with a withheld count or no participants is not pooled.
    """
    n = len(site_ids)
    if len(events) != n or len(totals) != n:
        raise PoolingError("events and totals need one value per site")
    rows: list[tuple[float, float] | str] = []
    corrected = []
    for site, x, total in zip(site_ids, events, totals, strict=True):
        if x is None or total is None:
            rows.append("a count is withheld")
        elif isinstance(x, bool) or isinstance(total, bool) or x < 0 or total <= 0 or x > total:
            rows.append("no participants, or counts that do not fit together")
        else:
            a, b = float(x), float(total - x)
            if 0 in (x, total - x):
                a, b = a + 0.5, b + 0.5
                corrected.append(site)
            rows.append((math.log(a / b), 1 / a + 1 / b))
    notes = [f"0.5 added to both counts at site(s) with a proportion of 0 or 1: {', '.join(corrected)}"]
    return _pool(
        measure,
        "logit",
        site_ids,
        rows,
        lambda x: 1 / (1 + math.exp(-x)),
        method,
        interval,
        level,
        notes if corrected else (),
    )
