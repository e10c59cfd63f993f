"""What the coordinator expects of the consortium (:class:`PlanScenario`) and whole consortia simulated from it."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import special

from federation.stats.proportions import _check_level
from federation.stats.serial import PoolingError, ResultRecord
from federation.stats.tables import ReleasedTable

from .withholding import withhold_table

MEASURES = ("sensitivity", "specificity")


def _check_probability(name: str, value: float, open_interval: bool = True) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise PoolingError(f"{name} must be a number")
    low_ok = value > 0 if open_interval else value >= 0
    high_ok = value < 1 if open_interval else value <= 1
    if not (low_ok and high_ok):
        raise PoolingError(f"{name} must lie strictly between 0 and 1, got {value:g}")
    return float(value)


@dataclass(frozen=True)
class PlanScenario(ResultRecord):
    """What the coordinator expects of the consortium.

    Attributes
    ----------
    sensitivity, specificity : float
        Expected pooled (median across sites) sensitivity and specificity.
    prevalence_low, prevalence_high : float
        Range of the sites' prevalence; each simulated site draws its prevalence uniformly from it.
    tau_sensitivity, tau_specificity : float
        Between-site standard deviations of logit sensitivity and logit specificity.
    correlation : float
        Between-site correlation of logit sensitivity and logit specificity (a threshold effect makes it
        negative).
    site_sizes : tuple of int
        Participants expected at each site.
    min_cell_size : int
        The sites' minimum cell size.
    allow_zero : bool
        Whether the sites show counts of 0.
    level : float
        Confidence level of the intervals planned for.
    """

    sensitivity: float
    specificity: float
    prevalence_low: float
    prevalence_high: float
    tau_sensitivity: float
    tau_specificity: float
    site_sizes: tuple[int, ...]
    min_cell_size: int = 10
    correlation: float = 0.0
    allow_zero: bool = True
    level: float = 0.95

    def __post_init__(self) -> None:
        super().__post_init__()
        _check_probability("sensitivity", self.sensitivity)
        _check_probability("specificity", self.specificity)
        _check_probability("prevalence_low", self.prevalence_low)
        _check_probability("prevalence_high", self.prevalence_high)
        if self.prevalence_low > self.prevalence_high:
            raise PoolingError("the prevalence range must run from low to high")
        for name in ("tau_sensitivity", "tau_specificity"):
            value = getattr(self, name)
            if isinstance(value, bool) or not isinstance(value, int | float) or not 0 <= value <= 5:
                raise PoolingError(f"{name} must be a number between 0 and 5 (logit scale)")
        if isinstance(self.correlation, bool) or not -0.99 <= self.correlation <= 0.99:
            raise PoolingError("correlation must lie between -0.99 and 0.99")
        if not self.site_sizes or any(isinstance(n, bool) or not isinstance(n, int) or n < 1 for n in self.site_sizes):
            raise PoolingError("site sizes must be whole numbers of at least 1, one per site")
        if isinstance(self.min_cell_size, bool) or not isinstance(self.min_cell_size, int) or self.min_cell_size < 1:
            raise PoolingError("min_cell_size must be a whole number of at least 1")
        _check_level(self.level)

    @property
    def n_sites(self) -> int:
        return len(self.site_sizes)

    def with_sites(self, n_sites: int, participants: int) -> PlanScenario:
        """The same expectations for ``n_sites`` sites of ``participants`` each."""
        values = {name: getattr(self, name) for name in self.__dataclass_fields__}
        values["site_sizes"] = (int(participants),) * int(n_sites)
        return PlanScenario(**values)


def simulate_consortium(scenario: PlanScenario, seed: int, simulation: int = 0) -> list[ReleasedTable]:
    """One simulated consortium: each site's 2×2, withheld by the minimum-cell-size rule.

    Site ``i`` of simulation ``s`` draws from its own stream, seeded by ``(seed, s, i)``, so a consortium
    of k + 1 sites is the consortium of k sites with one more (common random numbers across the number
    of sites, which keeps the search of :func:`sites_needed` smooth).

    Parameters
    ----------
    scenario : PlanScenario
    seed : int
        Seed of the plan (>= 0).
    simulation : int, default 0
        Which simulated consortium of the plan.

    Returns
    -------
    list of ReleasedTable
        One per site, in the order of ``scenario.site_sizes``.
    """
    s1, s2, rho = scenario.tau_sensitivity, scenario.tau_specificity, scenario.correlation
    chol = np.linalg.cholesky(np.array([[1.0, rho], [rho, 1.0]]))
    tables = []
    for i, size in enumerate(scenario.site_sizes):
        rng = np.random.default_rng((seed, simulation, i))
        prevalence = rng.uniform(scenario.prevalence_low, scenario.prevalence_high)
        with_condition = int(rng.binomial(size, prevalence))
        effect = chol @ rng.standard_normal(2)
        sensitivity = special.expit(special.logit(scenario.sensitivity) + s1 * effect[0])
        specificity = special.expit(special.logit(scenario.specificity) + s2 * effect[1])
        tp = int(rng.binomial(with_condition, sensitivity))
        tn = int(rng.binomial(size - with_condition, specificity))
        fp = size - with_condition - tn
        tables.append(
            withhold_table(
                f"site-{i + 1}", tp, fp, with_condition - tp, tn, scenario.min_cell_size, scenario.allow_zero
            )
        )
    return tables
