r"""Planning a validation study: how wide the pooled intervals will be, and how many sites it takes.

The coordinator states what it expects — sensitivity, specificity, a range of prevalence across sites,
the between-site standard deviations :math:`\tau` of logit sensitivity and logit specificity (from a pilot
or a guess), the sites' sizes and their minimum cell size — and :func:`plan_consortium` simulates whole
consortia from that: each site's prevalence uniform over the range, its participants with the condition
binomial, its true logit sensitivity and specificity drawn from the bivariate normal random-effects
distribution, its 2×2 binomial; each simulated table is then withheld as a site would
(:func:`withhold_table`) and the consortium is pooled with the headline model, the exact binomial GLMM
with withheld cells interval-censored (:func:`federation.stats.glmm.glmm_accuracy`). The plan reports the
width of the pooled confidence intervals and of the prediction intervals (median and 10th–90th
percentiles over the simulated consortia), how often the model could be fitted, and the share of sites
whose tables come back partly withheld. :func:`sites_needed` inverts it: the fewest sites of about ``n``
participants for a pooled interval no wider than ``w``. For a single site, :func:`buderer_sample_size`
gives the closed form of Buderer (1996).

References
----------
Buderer NMF (1996). Statistical methodology: I. Incorporating the prevalence of disease into the sample
size calculation for sensitivity and specificity. Acad Emerg Med 3:895–900.
Chu H, Cole SR (2006). Bivariate meta-analysis of sensitivity and specificity with sparse data: a
generalized linear mixed model approach. J Clin Epidemiol 59:1331–1332.
Burton A, Altman DG, Royston P, Holder RL (2006). The design of simulation studies in medical statistics.
Stat Med 25:4279–4292.
Riley RD, Ensor J, Snell KIE, et al. (2021). Calculating the sample size required for developing a
clinical prediction model / external validation. Stat Med 40:4230–4251 (simulation-based planning of
validation studies).
Hundepool A, et al. (2012). Statistical Disclosure Control. Wiley, ch. 4 (primary and secondary cell
suppression).
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
from scipy import special, stats
from threadpoolctl import threadpool_limits

from federation.stats.glmm import glmm_accuracy
from federation.stats.proportions import _check_level, wilson
from federation.stats.serial import PoolingError, ResultRecord
from federation.stats.tables import ReleasedTable

__all__ = [
    "PlanScenario",
    "PlanResult",
    "SitesNeeded",
    "WidthSummary",
    "buderer_sample_size",
    "plan_consortium",
    "simulate_consortium",
    "scaled_width",
    "sites_needed",
    "withhold_table",
]

MEASURES = ("sensitivity", "specificity")
# Relations between the counts of one 2×2 release (total, parts), in the order a site checks them.
_RELATIONS = (("analysed", ("positives", "negatives")), ("positives", ("tp", "fn")), ("negatives", ("fp", "tn")))
_TOTALS = frozenset(total for total, _ in _RELATIONS)


def _check_probability(name: str, value: float, open_interval: bool = True) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        raise PoolingError(f"{name} must be a number")
    low_ok = value > 0 if open_interval else value >= 0
    high_ok = value < 1 if open_interval else value <= 1
    if not (low_ok and high_ok):
        raise PoolingError(f"{name} must lie strictly between 0 and 1, got {value:g}")
    return float(value)


def buderer_sample_size(
    expected: float, half_width: float, prevalence: float, measure: str = "sensitivity", level: float = 0.95
) -> int:
    r"""Participants one site needs so that the Wald interval of sensitivity or specificity has a given half-width.

    Parameters
    ----------
    expected : float
        Expected sensitivity (or specificity), in (0, 1).
    half_width : float
        Wanted half-width :math:`W` of the interval (the interval is :math:`\hat p \pm W`).
    prevalence : float
        Expected prevalence of the condition among participants, in (0, 1).
    measure : {"sensitivity", "specificity"}
    level : float, default 0.95

    Returns
    -------
    int
        :math:`N = \lceil z^2 p(1-p) / (W^2 \pi) \rceil` for sensitivity and
        :math:`\lceil z^2 p(1-p) / (W^2 (1-\pi)) \rceil` for specificity, with :math:`z` the
        :math:`(1+\text{level})/2` normal quantile.

    References
    ----------
    Buderer NMF (1996). Acad Emerg Med 3:895–900, equations for TP + FN and N.
    """
    expected = _check_probability("expected", expected)
    half_width = _check_probability("half_width", half_width)
    prevalence = _check_probability("prevalence", prevalence)
    level = _check_level(level)
    if measure not in MEASURES:
        raise PoolingError(f"measure must be 'sensitivity' or 'specificity', got {measure!r}")
    z = stats.norm.ppf(0.5 + level / 2)
    per_class = z * z * expected * (1 - expected) / half_width**2
    share = prevalence if measure == "sensitivity" else 1 - prevalence
    # Round before the ceiling so that a product that is whole in exact arithmetic is not pushed up by float error.
    return math.ceil(round(per_class / share, 9))


def withhold_table(
    site_id: str, tp: int, fp: int, fn: int, tn: int, min_cell_size: int, allow_zero: bool = True
) -> ReleasedTable:
    """The 2×2 table as a site's minimum-cell-size rule would release it.

    Primary suppression withholds every count in 1..k−1 (and 0 when zeros may not be shown); secondary
    suppression then withholds, in each relation (analysed = with + without the condition; with the
    condition = TP + FN; without = FP + TN) that has exactly one withheld member, one more shown member,
    chosen without looking at values — a part before the total, a leaf before a count that is itself a
    total, then by name — until none is left with one. This is the rule
    the site agent applies to the 2×2 and the flow; the site's disclosure audit across earlier releases may
    withhold more, which a plan cannot foresee.

    Parameters
    ----------
    site_id : str
    tp, fp, fn, tn : int
        The full table.
    min_cell_size : int
        The site policy's minimum cell size k (>= 1).
    allow_zero : bool, default True

    Returns
    -------
    ReleasedTable
        With ``None`` for each withheld count, the released margins and the policy's rule, ready for the
        censored likelihood.

    References
    ----------
    Hundepool A, et al. (2012). Statistical Disclosure Control. Wiley, ch. 4.
    """
    if isinstance(min_cell_size, bool) or not isinstance(min_cell_size, int) or min_cell_size < 1:
        raise PoolingError("min_cell_size must be a whole number of at least 1")
    counts = {"tp": int(tp), "fp": int(fp), "fn": int(fn), "tn": int(tn)}
    if min(counts.values()) < 0:
        raise PoolingError(f"site {site_id!r}: counts must be non-negative")
    counts["positives"] = counts["tp"] + counts["fn"]
    counts["negatives"] = counts["fp"] + counts["tn"]
    counts["analysed"] = counts["positives"] + counts["negatives"]
    withheld = {
        name for name, value in counts.items() if (0 < value < min_cell_size) or (value == 0 and not allow_zero)
    }
    changed = True
    while changed:
        changed = False
        for total, parts in _RELATIONS:
            members = (total, *parts)
            hidden = [m for m in members if m in withheld]
            shown = [m for m in members if m not in withheld]
            if len(hidden) == 1 and shown:
                # The site's value-free order: a part before the total, a leaf before a count that is itself a
                # total, then the name (site_agent/disclosure.py).
                withheld.add(min(shown, key=lambda m: (m == total, m in _TOTALS, m)))
                changed = True
    released = {name: (None if name in withheld else value) for name, value in counts.items()}
    return ReleasedTable(
        site_id,
        released["tp"],
        released["fp"],
        released["fn"],
        released["tn"],
        positives=released["positives"],
        negatives=released["negatives"],
        analysed=released["analysed"],
        min_cell_size=min_cell_size,
        allow_zero=allow_zero,
    )


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
    With two or more sites each consortium is pooled with the exact binomial GLMM, withheld cells
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
            "Gauss-Hermite points, Wald intervals with t on k-2 df, prediction intervals (Higgins et al. 2009)"
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


@dataclass(frozen=True)
class SitesNeeded(ResultRecord):
    """The answer to "how many sites of about n participants for an interval no wider than w".

    Attributes
    ----------
    participants : int
        Participants per site.
    target_width : float
        The widest acceptable interval (full width, upper minus lower limit).
    measures : tuple of str
        The measures whose pooled confidence interval must meet the target.
    sites : int or None
        The fewest sites whose median simulated width meets the target; ``None`` when even
        ``max_sites`` do not.
    plans : tuple of PlanResult
        Every number of sites tried, in increasing order (the curve the plot draws).
    max_sites : int
    notes : tuple of str
    """

    participants: int
    target_width: float
    measures: tuple[str, ...]
    sites: int | None
    plans: tuple[PlanResult, ...]
    max_sites: int
    notes: tuple[str, ...] = ()


def _meets(plan: PlanResult, measures: Sequence[str], target: float) -> bool:
    for measure in measures:
        median = plan.width(measure).median
        if median is None or median > target:
            return False
    return True


def scaled_width(width: float, sites_from: int, sites_to: int) -> float:
    r"""A pooled interval's width carried from one number of sites to another.

    The pooled estimate's standard error on the logit scale falls as :math:`1/\sqrt{k}` when sites of the
    same size are added, and the interval uses t on :math:`k - 2` degrees of freedom, so
    :math:`w(k) \approx w(k_0)\, t_{k-2} \sqrt{k_0} / (t_{k_0-2} \sqrt{k})`.

    Parameters
    ----------
    width : float
        Width at ``sites_from`` sites.
    sites_from, sites_to : int
        Numbers of sites (>= 2).

    Returns
    -------
    float
    """
    quantile_from = stats.t.ppf(0.975, max(sites_from - 2, 1))
    quantile_to = stats.t.ppf(0.975, max(sites_to - 2, 1))
    return width * quantile_to / quantile_from * math.sqrt(sites_from / sites_to)


def _predicted_sites(anchor: PlanResult, measures: Sequence[str], target: float, max_sites: int) -> int | None:
    """The fewest sites whose width, scaled from ``anchor``, meets ``target`` (None: not within max_sites)."""
    k0 = anchor.scenario.n_sites
    medians = [anchor.width(m).median for m in measures]
    if any(m is None for m in medians):
        return None
    for k in range(2, max_sites + 1):
        if all(scaled_width(m, k0, k) <= target for m in medians):  # type: ignore[arg-type]
            return k
    return None


def sites_needed(
    scenario: PlanScenario,
    participants: int,
    target_width: float,
    measures: Sequence[str] = MEASURES,
    simulations: int = 20,
    seed: int | None = 2026,
    max_sites: int = 100,
    points: int = 5,
    known: Sequence[PlanResult] = (),
) -> SitesNeeded:
    """The fewest sites of ``participants`` each whose pooled interval is no wider than ``target_width``.

    "No wider than" means the median simulated width (:func:`plan_consortium`). The search simulates the
    scenario's own number of sites first, predicts the answer by :func:`scaled_width`, simulates there, and
    repeats from the nearest simulated plan until it has simulated two neighbouring numbers of sites, the
    smaller too wide and the larger narrow enough; the same seed at every step keeps the simulated widths
    comparable. Simulation noise can make the answer differ by a site between seeds; more simulations
    settle it.

    Parameters
    ----------
    scenario : PlanScenario
        Its ``site_sizes`` are replaced by ``participants`` at every site; its number of sites starts the search.
    participants : int
        Participants per site (>= 1).
    target_width : float
        Widest acceptable full width of the pooled confidence interval, in (0, 1).
    measures : sequence of {"sensitivity", "specificity"}, default both
    simulations, seed, points
        As in :func:`plan_consortium`.
    max_sites : int, default 100
        Largest number of sites tried.
    known : sequence of PlanResult, optional
        Plans already simulated with the same scenario, participants, simulations, seed and points (reused).

    Returns
    -------
    SitesNeeded

    References
    ----------
    Buderer NMF (1996). Acad Emerg Med 3:895–900 (the single-site closed form this generalises).
    """
    if isinstance(participants, bool) or not isinstance(participants, int) or participants < 1:
        raise PoolingError("participants must be a whole number of at least 1")
    target_width = _check_probability("target_width", target_width)
    measures = tuple(measures)
    if not measures or any(m not in MEASURES for m in measures):
        raise PoolingError("measures must name sensitivity and/or specificity")
    if isinstance(max_sites, bool) or not isinstance(max_sites, int) or not 2 <= max_sites <= 500:
        raise PoolingError("max_sites must be a whole number between 2 and 500")
    tried: dict[int, PlanResult] = {}
    for result in known:
        if result.scenario == scenario.with_sites(result.scenario.n_sites, participants):
            tried[result.scenario.n_sites] = result

    def plan(k: int) -> PlanResult:
        if k not in tried:
            tried[k] = plan_consortium(scenario.with_sites(k, participants), simulations, seed, points)
        return tried[k]

    def answer() -> int | None:
        meeting = [k for k in tried if _meets(tried[k], measures, target_width)]
        if not meeting:
            return None
        best = min(meeting)
        return best if best == 2 or (best - 1 in tried) else None

    anchor = plan(min(max(scenario.n_sites, 2), max_sites))
    for _ in range(4):
        found = answer()
        if found is not None:
            break
        predicted = _predicted_sites(anchor, measures, target_width, max_sites)
        if predicted is None:
            predicted = max_sites
        if predicted in tried:  # the prediction sits on a simulated point: step to its neighbour
            predicted = predicted - 1 if _meets(tried[predicted], measures, target_width) else predicted + 1
        if not 2 <= predicted <= max_sites or predicted in tried:
            break
        anchor = plan(predicted)
    # Close the bracket by bisection between the largest too-wide and the smallest narrow-enough number.
    while answer() is None:
        meeting = sorted(k for k in tried if _meets(tried[k], measures, target_width))
        if not meeting:
            if max_sites in tried:
                break
            plan(max_sites)
            continue
        failing = [k for k in tried if k < meeting[0]]
        low = max(failing) if failing else 1
        plan(max(2, (low + meeting[0]) // 2) if meeting[0] - low > 1 else meeting[0] - 1)
    sites = answer()
    notes = ()
    if sites is None:
        notes = (f"even {max_sites} sites of {participants} participants do not reach the target width",)
    return SitesNeeded(
        participants, target_width, measures, sites, tuple(tried[k] for k in sorted(tried)), max_sites, notes
    )
