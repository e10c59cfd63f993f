"""How many sites of about n participants for a pooled interval no wider than a target width."""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

from scipy import stats

from federation.stats.serial import PoolingError, ResultRecord

from .scenario import MEASURES, PlanScenario, _check_probability
from .simulation import PlanResult, plan_consortium


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
