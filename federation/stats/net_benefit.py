r"""Decision-curve analysis from the sites' released 2×2 tables: net benefit of screening by the model.

At a threshold probability :math:`p_t` — the risk at which a person would just accept further assessment,
so that :math:`p_t/(1-p_t)` is the number of unnecessary assessments one found case is worth — the net
benefit of screening by the model (positive when the predicted risk is at least :math:`p_t`) is

.. math:: \mathrm{NB} = \frac{TP}{n} - \frac{FP}{n}\,\frac{p_t}{1-p_t},

of assessing everyone :math:`\pi - (1-\pi)\,p_t/(1-p_t)` with :math:`\pi` the prevalence, and of assessing no
one 0 (Vickers & Elkin 2006). It needs the 2×2 at the threshold :math:`p_t` itself, so a decision curve is
drawn only at the thresholds the sites released (``--thresholds`` or ROC band edges) and only for a model
whose score is a predicted risk: nothing more is asked of a site.

Per site, the net benefit's variance follows from the multinomial distribution of (TP, FP, rest):
:math:`\mathrm{Var} = \{p_{TP}(1-p_{TP}) + w^2 p_{FP}(1-p_{FP}) + 2 w\, p_{TP} p_{FP}\}/n` with
:math:`w = p_t/(1-p_t)`; the sites' net benefits are pooled by random effects (REML, Hartung–Knapp–
Sidik–Jonkman interval, prediction interval), and so is each site's advantage over assessing everyone,
:math:`\mathrm{NB}_{model} - \mathrm{NB}_{all} = TN/n\cdot w - FN/n`. Net benefit depends on prevalence, which
differs between sites by design (community to referral), so the between-site spread is part of the answer.

References
----------
Vickers AJ, Elkin EB (2006). Decision curve analysis: a novel method for evaluating prediction models.
Med Decis Making 26:565–574.
Vickers AJ, Van Calster B, Steyerberg EW (2016). Net benefit approaches to the evaluation of prediction
models, molecular markers, and diagnostic tests. BMJ 352:i6.
Wynants L, Riley RD, Timmerman D, Van Calster B (2018). Random-effects meta-analysis of the clinical
utility of tests and prediction models. Stat Med 37:2034–2052.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Literal

from federation.stats.proportions import _check_level
from federation.stats.results import PooledEstimate
from federation.stats.serial import PoolingError, ResultRecord, SiteExclusion
from federation.stats.tables import ReleasedTable
from federation.stats.univariate import random_effects

__all__ = [
    "DecisionCurve",
    "DecisionPoint",
    "SiteNetBenefit",
    "decision_curve",
    "net_benefit",
    "net_benefit_variance",
    "site_net_benefit",
]


def _check_threshold_probability(value: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not 0 < value < 1:
        raise PoolingError(f"a threshold probability must lie strictly between 0 and 1, got {value!r}")
    return float(value)


def net_benefit(tp: int, fp: int, n: int, threshold_probability: float) -> float:
    r"""Net benefit of acting on the positives of a 2×2 at a threshold probability.

    Parameters
    ----------
    tp, fp : int
        True and false positives.
    n : int
        Everyone analysed (TP + FP + FN + TN), > 0.
    threshold_probability : float
        :math:`p_t` in (0, 1).

    Returns
    -------
    float
        :math:`TP/n - FP/n \cdot p_t/(1-p_t)`.

    References
    ----------
    Vickers AJ, Elkin EB (2006). Med Decis Making 26:565–574.
    """
    pt = _check_threshold_probability(threshold_probability)
    if n <= 0 or tp < 0 or fp < 0 or tp + fp > n:
        raise PoolingError("net benefit needs 0 <= TP + FP <= n and n > 0")
    return tp / n - fp / n * pt / (1 - pt)


def net_benefit_variance(tp: int, fp: int, n: int, threshold_probability: float) -> float:
    r"""Multinomial variance of :func:`net_benefit`.

    Parameters
    ----------
    tp, fp, n, threshold_probability
        As in :func:`net_benefit`.

    Returns
    -------
    float
        :math:`\{p_{TP}(1-p_{TP}) + w^2 p_{FP}(1-p_{FP}) + 2 w\,p_{TP}p_{FP}\}/n`, :math:`w = p_t/(1-p_t)`,
        with the proportions taken as (count + 1/2)/(n + 1) so that an empty cell does not give a zero variance.

    References
    ----------
    Wynants L, et al. (2018). Stat Med 37:2034–2052 (variance of net benefit for pooling).
    """
    pt = _check_threshold_probability(threshold_probability)
    if n <= 0:
        raise PoolingError("net benefit needs n > 0")
    w = pt / (1 - pt)
    a, b = (tp + 0.5) / (n + 1), (fp + 0.5) / (n + 1)
    return (a * (1 - a) + w * w * b * (1 - b) + 2 * w * a * b) / n


@dataclass(frozen=True)
class SiteNetBenefit(ResultRecord):
    """One site's net benefits at one threshold probability (``None`` when a needed count was withheld).

    Attributes
    ----------
    site_id : str
    model, screen_all : float or None
        Net benefit of screening by the model and of assessing everyone (assessing no one is 0).
    model_se : float or None
        Standard error of ``model``.
    advantage_over_all : float or None
        ``model - screen_all`` (= TN/n × w − FN/n).
    advantage_se : float or None
        Its standard error (the multinomial form of :func:`net_benefit_variance` on FN and TN).
    prevalence : float or None
    analysed : int or None
    """

    site_id: str
    model: float | None
    model_se: float | None
    screen_all: float | None
    advantage_over_all: float | None
    advantage_se: float | None
    prevalence: float | None
    analysed: int | None


def site_net_benefit(table: ReleasedTable, threshold_probability: float) -> SiteNetBenefit:
    """Net benefits of one site's released 2×2 at the threshold equal to ``threshold_probability``.

    Parameters
    ----------
    table : ReleasedTable
        The site's table at the score threshold :math:`p_t` (the model's score is a predicted risk).
    threshold_probability : float

    Returns
    -------
    SiteNetBenefit
        ``screen_all`` needs only the released margins; ``model`` needs TP and FP (or their complements).

    References
    ----------
    Vickers AJ, Elkin EB (2006). Med Decis Making 26:565–574.
    """
    pt = _check_threshold_probability(threshold_probability)
    w = pt / (1 - pt)
    positives = table.positives if table.positives is not None else _sum(table.tp, table.fn)
    negatives = table.negatives if table.negatives is not None else _sum(table.fp, table.tn)
    n = table.analysed if table.analysed is not None else _sum(positives, negatives)
    tp = table.tp if table.tp is not None else _difference(positives, table.fn)
    fp = table.fp if table.fp is not None else _difference(negatives, table.tn)
    if n is None or n == 0 or positives is None:
        return SiteNetBenefit(table.site_id, None, None, None, None, None, None, n)
    prevalence = positives / n
    screen_all = prevalence - (1 - prevalence) * w
    if tp is None or fp is None:
        return SiteNetBenefit(table.site_id, None, None, screen_all, None, None, prevalence, n)
    if not (0 <= tp <= positives and 0 <= fp <= n - positives):
        raise PoolingError(f"site {table.site_id!r}: the released cells do not add up to the released margins")
    model = net_benefit(tp, fp, n, pt)
    se = math.sqrt(net_benefit_variance(tp, fp, n, pt))
    # TN/n w - FN/n has the variance of the model's net benefit with (FN, TN) in place of (TP, FP).
    advantage_se = math.sqrt(net_benefit_variance(positives - tp, n - positives - fp, n, pt))
    return SiteNetBenefit(table.site_id, model, se, screen_all, model - screen_all, advantage_se, prevalence, n)


def _sum(a: int | None, b: int | None) -> int | None:
    return None if a is None or b is None else a + b


def _difference(total: int | None, part: int | None) -> int | None:
    return None if total is None or part is None else total - part


@dataclass(frozen=True)
class DecisionPoint(ResultRecord):
    """Net benefit at one threshold probability: per site, and pooled across sites.

    Attributes
    ----------
    threshold_probability : float
    sites : tuple of SiteNetBenefit
    model, screen_all, advantage_over_all : PooledEstimate or None
        Random-effects pooled net benefit of screening by the model, of assessing everyone, and of the
        model's advantage over assessing everyone (tau², I², prediction interval); ``None`` when fewer than
        two sites released what it needs.
    screen_none : float
        0 by definition.
    sites_not_pooled : tuple of SiteExclusion
    status : str
        ``"estimated"`` or ``"not estimable: <reason>"``.
    """

    threshold_probability: float
    sites: tuple[SiteNetBenefit, ...]
    model: PooledEstimate | None
    screen_all: PooledEstimate | None
    advantage_over_all: PooledEstimate | None
    screen_none: float
    sites_not_pooled: tuple[SiteExclusion, ...]
    status: str


@dataclass(frozen=True)
class DecisionCurve(ResultRecord):
    """Net benefit over the coordinator's range of threshold probabilities (released thresholds only).

    Attributes
    ----------
    points : tuple of DecisionPoint
        One per released threshold inside the range, in increasing order.
    range_low, range_high : float
        The coordinator's range of threshold probabilities.
    method : str
    level : float
    notes : tuple of str
    """

    points: tuple[DecisionPoint, ...]
    range_low: float
    range_high: float
    method: str
    level: float
    notes: tuple[str, ...] = ()


def _pool(
    values: Sequence[float], variances: Sequence[float], method: Literal["DL", "REML", "PM"], level: float
) -> PooledEstimate | None:
    if len(values) < 2:
        return None
    try:
        return random_effects(values, variances, method=method, interval="hksj", level=level)
    except ValueError:
        return None


def decision_curve(
    tables_by_threshold: Mapping[float, Sequence[ReleasedTable]],
    range_low: float = 0.01,
    range_high: float = 0.99,
    method: Literal["DL", "REML", "PM"] = "REML",
    level: float = 0.95,
) -> DecisionCurve:
    r"""Per-site and pooled net benefit at every released threshold inside ``[range_low, range_high]``.

    Parameters
    ----------
    tables_by_threshold : mapping of float to sequence of ReleasedTable
        The sites' released 2×2 tables at each score threshold; the score must be a predicted risk, so that
        the threshold is a threshold probability.
    range_low, range_high : float
        The coordinator's range of threshold probabilities, in (0, 1).
    method : {"DL", "REML", "PM"}, default "REML"
        Estimator of the between-site variance (:func:`federation.stats.univariate.random_effects`).
    level : float, default 0.95

    Returns
    -------
    DecisionCurve

    References
    ----------
    Vickers AJ, Elkin EB (2006). Med Decis Making 26:565–574. Wynants L, et al. (2018). Stat Med
    37:2034–2052 (random-effects pooling of net benefit).
    """
    low, high = _check_threshold_probability(range_low), _check_threshold_probability(range_high)
    if low > high:
        raise PoolingError("the range of threshold probabilities must run from low to high")
    level = _check_level(level)
    inside = sorted(float(t) for t in tables_by_threshold if low <= float(t) <= high)
    points = []
    for pt in inside:
        sites = []
        not_pooled = []
        for table in tables_by_threshold[pt]:
            result = site_net_benefit(table, pt)
            sites.append(result)
            if result.model is None:
                not_pooled.append(SiteExclusion(table.site_id, "counts needed for net benefit withheld"))
        w = pt / (1 - pt)
        usable = [s for s in sites if s.model is not None]
        model = _pool([s.model for s in usable], [s.model_se**2 for s in usable], method, level)  # type: ignore[misc,operator]
        # Assessing everyone: Var(pi - (1 - pi) w) = (1 + w)^2 pi (1 - pi) / n.
        with_all = [s for s in sites if s.screen_all is not None and s.analysed]
        screen_all = _pool(
            [s.screen_all for s in with_all],  # type: ignore[misc]
            [(1 + w) ** 2 * _smoothed(s.prevalence, s.analysed) for s in with_all],  # type: ignore[arg-type]
            method,
            level,
        )
        advantage = _pool(
            [s.advantage_over_all for s in usable],  # type: ignore[misc]
            [s.advantage_se**2 for s in usable],  # type: ignore[operator]
            method,
            level,
        )
        status = "estimated" if model is not None else "not estimable: fewer than 2 sites released the counts needed"
        points.append(DecisionPoint(pt, tuple(sites), model, screen_all, advantage, 0.0, tuple(not_pooled), status))
    notes = ()
    if not inside:
        notes = ("no released threshold lies inside the range of threshold probabilities",)
    return DecisionCurve(
        tuple(points),
        low,
        high,
        f"net benefit (Vickers & Elkin 2006) at each released threshold; {method} random effects with "
        "Hartung-Knapp-Sidik-Jonkman interval and prediction interval (Wynants et al. 2018)",
        level,
        notes,
    )


def _smoothed(prevalence: float, n: int) -> float:
    p = (prevalence * n + 0.5) / (n + 1)
    return p * (1 - p) / n
