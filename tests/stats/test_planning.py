"""Checks of study planning: Buderer's (1996) closed form against statsmodels and published values, the
single-site simulation against an exact expectation computed with statsmodels' Wilson interval, the
coordinator-side minimum-cell-size rule against the site agent's own suppression, and the multi-site plan
against the width the binomial information gives."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import stats
from statsmodels.stats.proportion import proportion_confint, samplesize_confint_proportion

from federation.stats import PoolingError
from federation.stats.planning import (
    PlanResult,
    PlanScenario,
    buderer_sample_size,
    plan_consortium,
    scaled_width,
    simulate_consortium,
    sites_needed,
    withhold_table,
)
from site_agent.counts import Relation
from site_agent.disclosure import suppress


@pytest.mark.parametrize(
    ("expected", "half_width", "prevalence", "measure"),
    [(0.90, 0.05, 0.10, "sensitivity"), (0.80, 0.10, 0.30, "sensitivity"), (0.85, 0.03, 0.20, "specificity")],
)
def test_buderer_matches_statsmodels_sample_size_for_a_proportion(expected, half_width, prevalence, measure) -> None:
    # statsmodels' samplesize_confint_proportion gives the participants with (or without) the condition for a
    # normal-approximation interval of half-width W; Buderer divides by the prevalence (or 1 - prevalence).
    per_class = samplesize_confint_proportion(expected, half_width, alpha=0.05, method="normal")
    share = prevalence if measure == "sensitivity" else 1 - prevalence
    assert buderer_sample_size(expected, half_width, prevalence, measure) == math.ceil(per_class / share - 1e-9)


def test_buderer_published_values() -> None:
    # Sensitivity 0.90, precision +/- 0.05, 95% confidence: 139 participants with the condition, so 1383 in all
    # at prevalence 0.10 and 2766 at prevalence 0.05 (Buderer 1996, Acad Emerg Med 3:895-900, and the tables
    # built on it by Malhotra & Indrayan 2010, Indian J Ophthalmol 58:519-522; from memory).
    assert buderer_sample_size(0.90, 0.05, 0.10) == 1383
    assert buderer_sample_size(0.90, 0.05, 0.05) == 2766
    # Specificity 0.90, +/- 0.05, prevalence 0.10: 138.3 / 0.9 -> 154 (same sources, from memory).
    assert buderer_sample_size(0.90, 0.05, 0.10, "specificity") == 154


def test_buderer_refuses_bad_input() -> None:
    with pytest.raises(PoolingError, match="prevalence"):
        buderer_sample_size(0.9, 0.05, 0.0)
    with pytest.raises(PoolingError, match="measure"):
        buderer_sample_size(0.9, 0.05, 0.1, "ppv")


def _expected_wilson_width(n: int, prevalence: float, sensitivity: float) -> float:
    """E[width of the Wilson interval of TP / (TP + FN)] with TP + FN ~ Bin(n, prevalence), TP ~ Bin(TP + FN, Se),
    summed exactly over the binomial support with statsmodels' proportion_confint(method="wilson")."""
    total = 0.0
    margins = np.arange(1, n + 1)
    weights = stats.binom.pmf(margins, n, prevalence)
    for margin, weight in zip(margins, weights, strict=True):
        if weight < 1e-12:
            continue
        tp = np.arange(margin + 1)
        low, high = proportion_confint(tp, margin, alpha=0.05, method="wilson")
        total += weight * float(np.sum(stats.binom.pmf(tp, margin, sensitivity) * (high - low)))
    return total


def test_single_site_plan_reproduces_buderer_and_an_exact_expectation() -> None:
    sensitivity, half_width, prevalence = 0.80, 0.05, 0.20
    n = buderer_sample_size(sensitivity, half_width, prevalence)  # 1230
    assert n == 1230
    scenario = PlanScenario(sensitivity, 0.90, prevalence, prevalence, 0.0, 0.0, (n,), min_cell_size=10)
    plan = plan_consortium(scenario, simulations=2000, seed=7)
    exact = _expected_wilson_width(n, prevalence, sensitivity)
    # Buderer's N gives an interval about 2W wide (Wilson is slightly narrower than Wald near 0.8).
    assert exact == pytest.approx(2 * half_width, abs=0.002)
    # Monte Carlo error of the mean over 2000 simulations is about 0.0001.
    assert plan.sensitivity_ci.mean == pytest.approx(exact, abs=0.0006)
    assert plan.sensitivity_prediction.computed == 0
    assert plan.share_sites_withheld == 0.0


@pytest.mark.parametrize("allow_zero", [True, False])
def test_withholding_matches_the_site_agents_suppression(allow_zero: bool) -> None:
    # The site agent's own primary and secondary suppression (site_agent.disclosure.suppress) on the 2x2 and
    # the flow's analysed counts, against the coordinator-side rule, over many tables with small cells.
    relations = [
        Relation("flow.analysed", ("flow.analysed_positive", "flow.analysed_negative")),
        Relation("flow.analysed_positive", ("confusion[0].tp", "confusion[0].fn")),
        Relation("flow.analysed_negative", ("confusion[0].fp", "confusion[0].tn")),
    ]
    names = {
        "tp": "confusion[0].tp",
        "fp": "confusion[0].fp",
        "fn": "confusion[0].fn",
        "tn": "confusion[0].tn",
        "positives": "flow.analysed_positive",
        "negatives": "flow.analysed_negative",
        "analysed": "flow.analysed",
    }
    rng = np.random.default_rng(3)
    withheld_somewhere = 0
    for _ in range(1500):
        tp, fp, fn, tn = (int(v) for v in rng.integers(0, 25, size=4))
        counts = {
            names["tp"]: tp,
            names["fp"]: fp,
            names["fn"]: fn,
            names["tn"]: tn,
            names["positives"]: tp + fn,
            names["negatives"]: fp + tn,
            names["analysed"]: tp + fp + fn + tn,
        }
        released, _ = suppress(counts, relations, 10, allow_zero)
        table = withhold_table("s", tp, fp, fn, tn, 10, allow_zero)
        ours = {
            "tp": table.tp,
            "fp": table.fp,
            "fn": table.fn,
            "tn": table.tn,
            "positives": table.positives,
            "negatives": table.negatives,
            "analysed": table.analysed,
        }
        assert ours == {short: released[long] for short, long in names.items()}
        withheld_somewhere += not table.is_complete
    assert withheld_somewhere > 1000


def test_simulated_sites_are_nested_across_consortium_sizes() -> None:
    scenario = PlanScenario(0.85, 0.8, 0.05, 0.3, 0.5, 0.5, (200,) * 3)
    small = simulate_consortium(scenario, seed=5, simulation=2)
    large = simulate_consortium(scenario.with_sites(5, 200), seed=5, simulation=2)
    assert large[:3] == small


def test_multisite_width_matches_the_binomial_information() -> None:
    # No heterogeneity and large sites: the GLMM's SE of the mean logit sensitivity is the fixed-effect one,
    # 1 / sqrt(sum n1 Se (1 - Se)), and the interval (t on k - 2 df, back-transformed) is about
    # 2 t SE Se (1 - Se) wide on the probability scale (delta method; Agresti, Categorical Data Analysis, 3.1).
    sites, size, prevalence, sensitivity = 4, 2000, 0.30, 0.85
    scenario = PlanScenario(sensitivity, 0.80, prevalence, prevalence, 0.0, 0.0, (size,) * sites)
    plan = plan_consortium(scenario, simulations=6, seed=11)
    se_logit = 1 / math.sqrt(sites * size * prevalence * sensitivity * (1 - sensitivity))
    expected = 2 * stats.t.ppf(0.975, sites - 2) * se_logit * sensitivity * (1 - sensitivity)
    assert plan.fitted == 6
    assert plan.sensitivity_ci.median == pytest.approx(expected, rel=0.2)
    assert plan.share_sites_withheld == 0.0
    assert PlanResult.from_dict(plan.to_dict()) == plan


@pytest.mark.parametrize("sites", [2, 3])
def test_a_consortium_the_report_would_not_pool_is_not_pooled_in_the_plan(sites: int) -> None:
    # Found by following the coordinator's guide: with 3 sites the plan showed widths and "5 of 5 fitted" while
    # the report says "not estimable ... needs at least 4" (federation/stats/headline.py).
    scenario = PlanScenario(0.85, 0.80, 0.30, 0.30, 0.3, 0.3, (800,) * sites)
    plan = plan_consortium(scenario, simulations=3, seed=1)
    assert plan.fitted == 0 and plan.sensitivity_ci.median is None
    reason = "the report's headline model needs at least 4 sites"
    assert plan.notes[0] == f"not fitted in 3 of 3 simulated consortia: {reason}"


def test_small_sites_are_partly_withheld_and_still_pooled() -> None:
    # Prevalence 5% at 150 participants: about 7 with the condition, so FN (and often TP) fall below 10.
    scenario = PlanScenario(0.85, 0.80, 0.05, 0.05, 0.3, 0.3, (150,) * 4 + (1500,) * 2, min_cell_size=10)
    plan = plan_consortium(scenario, simulations=3, seed=1)
    assert plan.share_sites_withheld >= 4 / 6 - 1e-9
    assert plan.fitted >= 2
    assert plan.sensitivity_ci.median is not None and 0 < plan.sensitivity_ci.median < 1


def test_scaled_width_follows_one_over_root_k() -> None:
    # Between 10 and 40 sites the t quantile changes from t_8 to t_38 (scipy) and the SE halves.
    expected = 0.2 * stats.t.ppf(0.975, 38) / stats.t.ppf(0.975, 8) * 0.5
    assert scaled_width(0.2, 10, 40) == pytest.approx(expected)


def test_sites_needed_brackets_its_answer() -> None:
    scenario = PlanScenario(0.85, 0.80, 0.20, 0.30, 0.3, 0.3, (400,) * 6)
    result = sites_needed(scenario, 400, 0.12, measures=("sensitivity",), simulations=4, seed=3, max_sites=30)
    assert result.sites is not None
    by_sites = {p.scenario.n_sites: p for p in result.plans}
    assert by_sites[result.sites].sensitivity_ci.median <= 0.12
    if result.sites > 2:
        assert by_sites[result.sites - 1].sensitivity_ci.median > 0.12
