"""The plan by simulation: interval widths over simulated consortia, pooled with the headline model."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from threadpoolctl import threadpool_limits

from federation.stats.glmm import glmm_accuracy
from federation.stats.headline import _MIN_SITES
from federation.stats.proportions import wilson
from federation.stats.serial import PoolingError, ResultRecord
from federation.stats.tables import ReleasedTable

from .scenario import MEASURES, PlanScenario, simulate_consortium


@dataclass(frozen=True)
class WidthSummary(ResultRecord):
    """The width of one interval over the simulated consortia where it could be computed.

    Attributes
    ----------
    median, p10, p90 : float or None
        Median and 10th and 90th percentiles of the width (``None`` when never computable).
    mean : float or None
    computed : int
        Simulated consortia in which the interval could be computed.
    """

    median: float | None
    p10: float | None
    p90: float | None
    mean: float | None
    computed: int

    @classmethod
    def of(cls, widths: Sequence[float]) -> WidthSummary:
        values = np.asarray([w for w in widths if w is not None and math.isfinite(w)], dtype=float)
        if values.size == 0:
            return cls(None, None, None, None, 0)
        p10, median, p90 = np.percentile(values, [10, 50, 90])
        return cls(float(median), float(p10), float(p90), float(values.mean()), int(values.size))


@dataclass(frozen=True)
class PlanResult(ResultRecord):
    """What a planned consortium is expected to give (see :func:`plan_consortium`).

    Attributes
    ----------
    scenario : PlanScenario
    simulations : int
        Consortia simulated.
    fitted : int
        Consortia in which the pooling model could be fitted.
    sensitivity_ci, specificity_ci : WidthSummary
        Width of the pooled confidence intervals.
    sensitivity_prediction, specificity_prediction : WidthSummary
        Width of the prediction intervals for a new site.
    sensitivity_coverage, specificity_coverage : float or None
        Share of fitted consortia whose confidence interval held the true value (a check of the model
        under the scenario; it should be close to ``level``).
    share_sites_withheld : float
        Share of simulated site tables with at least one withheld count.
    share_sites_not_pooled : float
        Share of simulated sites that the model could not use at all.
    method : str
    seed : int or None
    notes : tuple of str
    """

    scenario: PlanScenario
    simulations: int
    fitted: int
    sensitivity_ci: WidthSummary
    specificity_ci: WidthSummary
    sensitivity_prediction: WidthSummary
    specificity_prediction: WidthSummary
    sensitivity_coverage: float | None
    specificity_coverage: float | None
    share_sites_withheld: float
    share_sites_not_pooled: float
    method: str
    seed: int
    notes: tuple[str, ...] = ()

    def width(self, measure: str, interval: str = "ci") -> WidthSummary:
        """The width summary of ``measure`` ("sensitivity"/"specificity"), ``interval`` "ci" or "prediction"."""
        return getattr(self, f"{measure}_{'ci' if interval == 'ci' else 'prediction'}")


def _single_site(table: ReleasedTable, level: float) -> tuple[float | None, float | None]:
    widths: list[float | None] = []
    for events, others in ((table.tp, table.fn), (table.tn, table.fp)):
        if events is None or others is None or events + others == 0:
            widths.append(None)
            continue
        interval = wilson(events, events + others, level)
        widths.append(interval.ci_high - interval.ci_low)  # type: ignore[operator]
    return widths[0], widths[1]


def _check_simulations(simulations: int) -> int:
    if isinstance(simulations, bool) or not isinstance(simulations, int) or not 1 <= simulations <= 100_000:
        raise PoolingError("simulations must be a whole number between 1 and 100000")
    return simulations


def plan_consortium(
    scenario: PlanScenario, simulations: int = 40, seed: int | None = 2026, points: int = 5
) -> PlanResult:
    r"""Expected widths of the pooled and prediction intervals for a planned consortium, by simulation.

    Parameters
    ----------
    scenario : PlanScenario
        The expected accuracy, prevalence range, heterogeneity, site sizes and minimum cell size.
    simulations : int, default 40
        Consortia to simulate. The percentiles of the widths settle with a few dozen; the coverage needs
        hundreds.
    seed : int or None, default 2026
        Seed of the random numbers (the same seed gives the same plan; ``None`` draws one, recorded in
        the result).
    points : int, default 5
        Gauss–Hermite points per dimension for the GLMM (5 keeps a plan quick; the report's analysis uses 7).

    Returns
    -------
    PlanResult

    Notes
    -----
    With four or more sites (the report's headline model needs as many; with two or three, neither it nor the
    plan pools) each consortium is pooled with the exact binomial GLMM, withheld cells
    interval-censored (Chu & Cole 2006; :func:`federation.stats.glmm.glmm_accuracy`), whose intervals are
    Wald intervals on the logit scale with t on k − 2 degrees of freedom and whose prediction intervals
    use :math:`\hat\tau^2 + \mathrm{SE}^2` (Higgins et al. 2009). With one site the interval is the Wilson
    interval the report shows for a site, and there is no prediction interval; Buderer's (1996) formula
    (:func:`buderer_sample_size`) is the closed form for that case.

    References
    ----------
    Burton A, et al. (2006). Stat Med 25:4279–4292 (design of simulation studies).
    """
    simulations = _check_simulations(simulations)
    if seed is None:
        seed = int(np.random.default_rng().integers(2**31))
    if isinstance(seed, bool) or not isinstance(seed, int) or seed < 0:
        raise PoolingError("seed must be a whole number of at least 0")
    widths: dict[str, list[float | None]] = {f"{m}_{i}": [] for m in MEASURES for i in ("ci", "prediction")}
    covered = {m: 0 for m in MEASURES}
    fitted = 0
    withheld_sites = 0
    not_pooled_sites = 0
    failures: dict[str, int] = {}
    truth = {
        "sensitivity": scenario.sensitivity,
        "specificity": scenario.specificity,
    }
    for simulation in range(simulations):
        tables = simulate_consortium(scenario, seed, simulation)
        withheld_sites += sum(not t.is_complete for t in tables)
        if 1 < scenario.n_sites < _MIN_SITES:
            # the report's headline model is not fitted on so few sites (federation.stats.headline): neither is the
            # plan's (found by following the coordinator's guide: the plan showed widths the report never gives)
            reason = f"the report's headline model needs at least {_MIN_SITES} sites"
            failures[reason] = failures.get(reason, 0) + 1
            not_pooled_sites += scenario.n_sites
            continue
        if scenario.n_sites == 1:
            se_width, sp_width = _single_site(tables[0], scenario.level)
            widths["sensitivity_ci"].append(se_width)
            widths["specificity_ci"].append(sp_width)
            not_pooled_sites += int(se_width is None or sp_width is None)
            continue
        try:
            # Tiny matrices: one BLAS thread is several times faster than many on a busy machine.
            with np.errstate(invalid="ignore", divide="ignore", over="ignore"), threadpool_limits(1, "blas"):
                fit = glmm_accuracy(tables, suppressed="censor", points=points, level=scenario.level)
        except ValueError as error:  # PoolingError, or an estimate the model could not make finite
            reason = str(error) if isinstance(error, PoolingError) else "the model gave no finite interval"
            failures[reason] = failures.get(reason, 0) + 1
            not_pooled_sites += scenario.n_sites
            continue
        fitted += 1
        not_pooled_sites += len(fit.sites_not_pooled)
        for measure in MEASURES:
            interval = getattr(fit, measure)
            widths[f"{measure}_ci"].append(interval.ci_high - interval.ci_low)
            covered[measure] += int(interval.ci_low <= truth[measure] <= interval.ci_high)
            prediction = getattr(fit, f"{measure}_prediction")
            widths[f"{measure}_prediction"].append(
                None if prediction is None else prediction.ci_high - prediction.ci_low
            )
    notes = [f"not fitted in {n} of {simulations} simulated consortia: {reason}" for reason, n in failures.items()]
    if scenario.n_sites == 1:
        method = "one site: Wilson interval of the site's sensitivity and specificity; no prediction interval"
    else:
        method = (
            f"exact binomial GLMM (Chu & Cole 2006), withheld cells interval-censored, {points}x{points} "
            "Gauss-Hermite points, Wald intervals with t on k-2 df, prediction intervals (Higgins et al. 2009); the "
            "report fits the same model with 7 points and profile-likelihood intervals, so its widths differ a little"
        )
        notes.append("a site whose disclosure audit withholds more than its minimum cell size requires is not foreseen")
    total_sites = simulations * scenario.n_sites
    return PlanResult(
        scenario=scenario,
        simulations=simulations,
        fitted=fitted if scenario.n_sites > 1 else simulations,
        sensitivity_ci=WidthSummary.of(widths["sensitivity_ci"]),
        specificity_ci=WidthSummary.of(widths["specificity_ci"]),
        sensitivity_prediction=WidthSummary.of(widths["sensitivity_prediction"]),
        specificity_prediction=WidthSummary.of(widths["specificity_prediction"]),
        sensitivity_coverage=covered["sensitivity"] / fitted if fitted else None,
        specificity_coverage=covered["specificity"] / fitted if fitted else None,
        share_sites_withheld=withheld_sites / total_sites,
        share_sites_not_pooled=not_pooled_sites / total_sites,
        method=method,
        seed=seed,
        notes=tuple(notes),
    )
