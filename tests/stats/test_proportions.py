"""Checks of federation.stats.proportions against published tables and independent implementations."""

from __future__ import annotations

import json
from collections.abc import Callable

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import stats
from statsmodels.stats.contingency_tables import Table2x2
from statsmodels.stats.proportion import proportion_confint

from federation.stats import (
    Interval,
    clopper_pearson,
    diagnostic_odds_ratio,
    jeffreys,
    likelihood_ratios,
    predictive_values,
    wilson,
    wilson_cc,
)

# Published limits are given to 4 decimals, so agreement means |ours - published| <= half a unit in
# the 4th decimal (plus float noise).
FOUR_DECIMALS = 0.5e-4 + 1e-12


def _close_to_table(interval: Interval, low: float, high: float) -> None:
    assert abs(interval.ci_low - low) <= FOUR_DECIMALS, (interval.ci_low, low)
    assert abs(interval.ci_high - high) <= FOUR_DECIMALS, (interval.ci_high, high)


@st.composite
def counts(draw: st.DrawFn) -> tuple[int, int]:
    n = draw(st.integers(min_value=1, max_value=2000))
    return draw(st.integers(min_value=0, max_value=n)), n


levels = st.sampled_from([0.8, 0.9, 0.95, 0.99])


# --- Wilson score interval --------------------------------------------------------------------------


# Newcombe RG (1998) Stat Med 17:857-872, Table I, method 3 (Wilson score), 95%.
@pytest.mark.parametrize(
    ("x", "n", "low", "high"),
    [
        (81, 263, 0.2553, 0.3662),
        (15, 148, 0.0624, 0.1605),
        (0, 20, 0.0, 0.1611),
        (1, 29, 0.0061, 0.1718),
    ],
)
def test_wilson_matches_newcombe_table_1(x: int, n: int, low: float, high: float) -> None:
    _close_to_table(wilson(x, n), low, high)


# statsmodels.stats.proportion.proportion_confint(method="wilson").
@settings(max_examples=200, deadline=None)
@given(counts(), levels)
def test_wilson_matches_statsmodels(count: tuple[int, int], level: float) -> None:
    x, n = count
    expected = proportion_confint(x, n, alpha=1 - level, method="wilson")
    result = wilson(x, n, level)
    assert result.estimate == pytest.approx(x / n)
    assert (result.ci_low, result.ci_high) == pytest.approx(expected, abs=1e-12)


def test_wilson_limits_are_exact_at_the_boundaries() -> None:
    # Wilson (1927): the score interval for x = 0 starts at 0 and for x = n ends at 1, exactly.
    assert wilson(0, 37).ci_low == 0.0
    assert wilson(37, 37).ci_high == 1.0


# --- Wilson score interval with continuity correction ---------------------------------------------


# Newcombe (1998) Table I, method 4 (score with continuity correction), 95% (from memory).
@pytest.mark.parametrize(
    ("x", "n", "low", "high"),
    [
        (81, 263, 0.2535, 0.3682),
        (15, 148, 0.0598, 0.1644),
        (0, 20, 0.0, 0.2005),
        (1, 29, 0.0018, 0.1963),
    ],
)
def test_wilson_cc_matches_newcombe_table_1(x: int, n: int, low: float, high: float) -> None:
    _close_to_table(wilson_cc(x, n), low, high)


@settings(max_examples=200, deadline=None)
@given(counts(), levels)
def test_wilson_cc_contains_wilson(count: tuple[int, int], level: float) -> None:
    # Newcombe (1998), section 2: the continuity correction widens the score interval on both sides.
    x, n = count
    plain, corrected = wilson(x, n, level), wilson_cc(x, n, level)
    assert corrected.ci_low <= plain.ci_low + 1e-12
    assert corrected.ci_high >= plain.ci_high - 1e-12
    assert 0.0 <= corrected.ci_low <= x / n <= corrected.ci_high <= 1.0


# --- Clopper-Pearson --------------------------------------------------------------------------------


# Newcombe (1998) Table I, method 5 (exact), 95% (from memory). The brief quoted 15/148 as
# 0.0579-0.1617; the lower limit does not reproduce (the defining equation gives 0.057844, which
# rounds to 0.0578, and statsmodels agrees), so only its upper limit is compared here and the lower
# limit is checked against the definition in test_clopper_pearson_solves_its_defining_equations.
@pytest.mark.parametrize(
    ("x", "n", "low", "high"),
    [(81, 263, 0.2527, 0.3676), (0, 20, 0.0, 0.1684), (1, 29, 0.0009, 0.1776)],
)
def test_clopper_pearson_matches_newcombe_table_1(x: int, n: int, low: float, high: float) -> None:
    _close_to_table(clopper_pearson(x, n), low, high)


def test_clopper_pearson_15_of_148_upper_limit_matches_newcombe_table_1() -> None:
    # Newcombe (1998) Table I, method 5, 15/148 upper limit 0.1617 (from memory).
    assert abs(clopper_pearson(15, 148).ci_high - 0.1617) <= FOUR_DECIMALS


# statsmodels.stats.proportion.proportion_confint(method="beta").
@settings(max_examples=200, deadline=None)
@given(counts(), levels)
def test_clopper_pearson_matches_statsmodels(count: tuple[int, int], level: float) -> None:
    x, n = count
    expected = proportion_confint(x, n, alpha=1 - level, method="beta")
    result = clopper_pearson(x, n, level)
    assert (result.ci_low, result.ci_high) == pytest.approx(expected, abs=1e-12)


@pytest.mark.parametrize(("x", "n"), [(15, 148), (81, 263), (1, 29), (7, 7), (3, 1000)])
def test_clopper_pearson_solves_its_defining_equations(x: int, n: int) -> None:
    # Clopper & Pearson (1934): P(X >= x | p_low) = alpha/2 and P(X <= x | p_high) = alpha/2,
    # evaluated with scipy's binomial distribution rather than the beta quantiles used in the code.
    result = clopper_pearson(x, n)
    if x > 0:
        assert stats.binom.sf(x - 1, n, result.ci_low) == pytest.approx(0.025, rel=1e-9)
    if x < n:
        assert stats.binom.cdf(x, n, result.ci_high) == pytest.approx(0.025, rel=1e-9)


# --- Jeffreys ---------------------------------------------------------------------------------------


# statsmodels.stats.proportion.proportion_confint(method="jeffreys") for 0 < x < n; statsmodels does
# not apply the Brown-Cai-DasGupta (2001) boundary modification that we do at x = 0 and x = n.
@settings(max_examples=200, deadline=None)
@given(counts(), levels)
def test_jeffreys_matches_statsmodels_inside(count: tuple[int, int], level: float) -> None:
    x, n = count
    result = jeffreys(x, n, level)
    low, high = proportion_confint(x, n, alpha=1 - level, method="jeffreys")
    if 0 < x:
        assert result.ci_low == pytest.approx(low, abs=1e-12)
    if x < n:
        assert result.ci_high == pytest.approx(high, abs=1e-12)


def test_jeffreys_boundary_modification() -> None:
    # Brown, Cai & DasGupta (2001) Stat Sci 16:101, section 4.1.2: lower = 0 at x = 0, upper = 1 at x = n.
    assert jeffreys(0, 20).ci_low == 0.0
    assert jeffreys(20, 20).ci_high == 1.0
    assert jeffreys(0, 20).ci_high == pytest.approx(stats.beta.ppf(0.975, 0.5, 20.5), abs=1e-12)


# --- Predictive values ------------------------------------------------------------------------------


def test_predictive_values_at_study_prevalence_equal_the_table_ratios() -> None:
    # Altman & Bland (1994) BMJ 309:102, liver scan: tp 231, fp 32, fn 27, tn 54 (from memory);
    # at the study's own prevalence, Bayes' theorem must give PPV = 231/263 and NPV = 54/81.
    tp, fp, fn, tn = 231, 32, 27, 54
    ppv, npv = predictive_values(tp / (tp + fn), tn / (tn + fp), (tp + fn) / (tp + fp + fn + tn))
    assert ppv == pytest.approx(231 / 263, rel=1e-12)
    assert npv == pytest.approx(54 / 81, rel=1e-12)


def test_predictive_values_undefined_is_none() -> None:
    # With sensitivity 0 and specificity 1 nobody tests positive, so the PPV is 0/0.
    ppv, npv = predictive_values(0.0, 1.0, 0.3)
    assert ppv is None and npv == pytest.approx(0.7)


@pytest.mark.parametrize(("se", "sp", "prev"), [(1.2, 0.9, 0.1), (0.9, -0.1, 0.1), (0.9, 0.9, float("nan"))])
def test_predictive_values_reject_values_outside_unit_interval(se: float, sp: float, prev: float) -> None:
    with pytest.raises(ValueError, match="must lie in"):
        predictive_values(se, sp, prev)


# --- Likelihood ratios and diagnostic odds ratio ----------------------------------------------------


TABLES = [
    (231, 32, 27, 54),
    (90, 30, 10, 170),
    (12, 0, 3, 40),
    (0, 5, 20, 30),
    (7, 3, 0, 25),
]


def _haldane(tp: int, fp: int, fn: int, tn: int) -> tuple[float, float, float, float]:
    # Haldane-Anscombe: 0.5 added to every cell when any is 0. statsmodels' Table2x2(shift_zeros=True)
    # replaces only the zero cells by 0.5 (despite its docstring), so the shift is done here and
    # statsmodels gets a table without zeros.
    shift = 0.5 if 0 in (tp, fp, fn, tn) else 0.0
    return tp + shift, fp + shift, fn + shift, tn + shift


# statsmodels Table2x2 risk ratio with its log-method interval. LR+ is the risk ratio of a positive
# test, diseased vs healthy; LR- that of a negative test.
@pytest.mark.parametrize(("tp", "fp", "fn", "tn"), TABLES)
def test_likelihood_ratios_match_statsmodels_risk_ratios(tp: int, fp: int, fn: int, tn: int) -> None:
    positive, negative = likelihood_ratios(tp, fp, fn, tn)
    a, b, c, d = _haldane(tp, fp, fn, tn)
    reference_positive = Table2x2(np.array([[a, c], [b, d]]), shift_zeros=False)
    reference_negative = Table2x2(np.array([[c, a], [d, b]]), shift_zeros=False)
    assert positive.estimate == pytest.approx(reference_positive.riskratio, rel=1e-12)
    assert (positive.ci_low, positive.ci_high) == pytest.approx(reference_positive.riskratio_confint(), rel=1e-12)
    assert negative.estimate == pytest.approx(reference_negative.riskratio, rel=1e-12)
    assert (negative.ci_low, negative.ci_high) == pytest.approx(reference_negative.riskratio_confint(), rel=1e-12)
    assert ("0.5 added" in positive.method) == (0 in (tp, fp, fn, tn))


# statsmodels Table2x2 odds ratio and its Woolf (log) interval.
@pytest.mark.parametrize(("tp", "fp", "fn", "tn"), TABLES)
def test_diagnostic_odds_ratio_matches_statsmodels(tp: int, fp: int, fn: int, tn: int) -> None:
    result = diagnostic_odds_ratio(tp, fp, fn, tn, level=0.9)
    a, b, c, d = _haldane(tp, fp, fn, tn)
    reference = Table2x2(np.array([[a, c], [b, d]]), shift_zeros=False)
    assert result.estimate == pytest.approx(reference.oddsratio, rel=1e-12)
    assert (result.ci_low, result.ci_high) == pytest.approx(reference.oddsratio_confint(alpha=0.1), rel=1e-12)
    assert ("0.5 added" in result.method) == (0 in (tp, fp, fn, tn))


def test_diagnostic_odds_ratio_zero_cell_by_hand() -> None:
    # Glas et al. (2003): with a zero cell, 0.5 is added to all four cells: (7.5*25.5)/(3.5*0.5).
    result = diagnostic_odds_ratio(7, 3, 0, 25)
    assert result.estimate == pytest.approx(7.5 * 25.5 / (3.5 * 0.5), rel=1e-12)
    assert "0.5 added to every cell" in result.method


def test_diagnostic_odds_ratio_by_hand() -> None:
    # Glas et al. (2003) J Clin Epidemiol 56:1129, eq. for DOR = (TP/FN)/(FP/TN): worked by hand,
    # (90*170)/(30*10) = 51, SE(log) = sqrt(1/90 + 1/30 + 1/10 + 1/170).
    result = diagnostic_odds_ratio(90, 30, 10, 170)
    assert result.estimate == pytest.approx(51.0, rel=1e-12)
    se = np.sqrt(1 / 90 + 1 / 30 + 1 / 10 + 1 / 170)
    assert result.ci_low == pytest.approx(51.0 * np.exp(-1.959963984540054 * se), rel=1e-12)


# --- Input validation and serialisation -------------------------------------------------------------


@pytest.mark.parametrize(
    ("x", "n", "message"),
    [
        (5, 0, "n must be positive"),
        (6, 5, "cannot exceed"),
        (-1, 5, "negative"),
        (1.5, 5, "whole-number"),
        (True, 5, "whole-number"),
        ("3", 5, "whole-number"),
    ],
)
@pytest.mark.parametrize("function", [wilson, wilson_cc, clopper_pearson, jeffreys])
def test_bad_counts_raise(function: Callable[..., Interval], x: object, n: object, message: str) -> None:
    with pytest.raises(ValueError, match=message):
        function(x, n)


@pytest.mark.parametrize("level", [0.0, 1.0, 95, float("nan")])
def test_bad_level_raises(level: float) -> None:
    with pytest.raises(ValueError, match="level"):
        wilson(3, 10, level)


def test_table_without_diseased_participants_raises() -> None:
    with pytest.raises(ValueError, match="no participants with the condition"):
        likelihood_ratios(0, 4, 0, 10)


def test_whole_number_floats_and_numpy_integers_are_accepted() -> None:
    assert wilson(15.0, np.int64(148)) == wilson(15, 148)


def test_interval_json_round_trip() -> None:
    interval = clopper_pearson(1, 29, 0.9)
    restored = Interval.from_dict(json.loads(json.dumps(interval.to_dict(), allow_nan=False)))
    assert restored == interval
    assert "90% CI" in interval.summary()


def test_interval_refuses_nan() -> None:
    with pytest.raises(ValueError, match="use None"):
        Interval(float("nan"), 0.0, 1.0, "test")
