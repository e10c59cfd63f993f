"""The simulation study of the pooling methods: what a simulated site releases, the Monte Carlo summaries, one
consortium's rows."""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import optimize, special

from federation.stats import site_evidence
from federation.stats.headline import headline_accuracy
from simulations.validate_stats import (
    REASONS,
    ROWS,
    Scenario,
    _plain_profile,
    release_table,
    row_key,
    run_one,
    summarise,
)
from tests.stats.test_bivariate import AUDITC
from tests.stats.test_headline import _independent_log_likelihood


def test_a_simulated_release_names_the_rule_of_each_withheld_cell() -> None:
    # 40 of 45 with the condition detected, minimum cell size 10. The site's rule (primary suppression of a
    # count in 1..k-1, then a complementary count so that it cannot be recomputed from its total; Hundepool et
    # al. 2012, Statistical Disclosure Control, ch. 4) hides FN = 5 and then TP; the release says which rule
    # hid which, as a real release's suppressed_by does (docs/formats.md).
    table = release_table("site", 40, 100, 5, 300, [0] * len(REASONS), 10, True)
    assert (table.tp, table.fn, table.positives) == (None, None, 45)
    assert table.suppressed_by == {"fn": "minimum_cell_size", "tp": "complementary"}
    # Worked by hand: FN in 1..9 leaves TP in 36..44, so the site says sensitivity is high.
    assert site_evidence(table).tp_values[0].tolist() == list(range(36, 45))
    # Without the rules the recipient cannot tell TP = 40 from TP = 5: both complete the total under the rule.
    older = release_table("site", 40, 100, 5, 300, [0] * len(REASONS), 10, True, name_rules=False)
    assert site_evidence(older).tp_values[0].tolist() == [*range(1, 10), *range(36, 45)]


def test_a_small_site_names_primary_and_complementary_counts_apart() -> None:
    # 8 with the condition (6 detected), 20 without (3 false positives), k = 10: every count in 1..9 is primary;
    # the total without the condition (20) is then hidden as the complement of the one with it (8).
    table = release_table("site", 6, 3, 2, 17, [0] * len(REASONS), 10, True)
    assert table.suppressed_by == {
        "tp": "minimum_cell_size",
        "fn": "minimum_cell_size",
        "fp": "minimum_cell_size",
        "positives": "minimum_cell_size",
        "negatives": "complementary",
    }
    assert site_evidence(table).allows(6, 3, 2, 17)


def _row(covered: bool, estimate: float = 0.0) -> dict:
    low, high = (-1.0, 1.0) if covered else (0.5, 1.0)
    return {
        "suppressed_sites": 0,
        "seconds": 0.0,
        **{
            row_key(method, interval): {
                "sites": 10,
                "sensitivity": (estimate, low, high),
                "specificity": (estimate, low, high),
            }
            for method, interval in ROWS
        },
    }


def test_coverage_and_bias_carry_their_monte_carlo_errors() -> None:
    # Morris, White & Crowther (2019), Using simulation studies to evaluate statistical methods, Stat Med
    # 38:2074-2102, Table 6: MCSE of coverage sqrt(p(1 - p) / n), of bias SD(estimates) / sqrt(n).
    scenario = Scenario(sensitivity=0.5, specificity=0.5)  # truth 0 on the logit scale
    estimates = np.linspace(-0.4, 0.4, 20)
    rows = [_row(i != 3, float(e)) for i, e in enumerate(estimates)]
    entry = summarise(rows, scenario)["headline [profile, t(k-2)]"]["sensitivity"]
    assert entry["coverage"] == pytest.approx(0.95)
    assert entry["coverage_mcse"] == pytest.approx(math.sqrt(0.95 * 0.05 / 20))
    probabilities = 1 / (1 + np.exp(-estimates))
    assert entry["bias"] == pytest.approx(float(probabilities.mean()) - 0.5, abs=1e-12)
    assert entry["bias_mcse"] == pytest.approx(float(probabilities.std(ddof=1)) / math.sqrt(20))


def test_one_consortium_fills_every_row_or_says_why_not() -> None:
    rows = run_one((Scenario(sites=6, min_size=100, max_size=400), 11))
    head = rows["headline"]
    for measure in ("sensitivity", "specificity"):
        estimate, low, high = head[measure]
        assert low < estimate < high
    assert rows["seconds"] > 0
    few = run_one((Scenario(sites=3), 11))
    assert "headline" not in few
    assert few["not_estimable"] == (
        "not estimable: 3 usable site(s); the bivariate random-effects model needs at least 4"
    )


def test_the_plain_profile_interval_sits_where_an_independent_likelihood_ratio_says() -> None:
    # AUDIT-C, 14 published studies (Kriston et al. 2008; the AuditC data of R's mada package). At each limit of
    # the comparison interval, the independent likelihood of tests/stats/test_headline.py (plain Gauss-Hermite
    # quadrature, no shared code) maximised over the other four parameters gives a likelihood-ratio statistic
    # equal to the chi-squared(1) 95% quantile, 1.96^2 (any table of the normal distribution).
    head = headline_accuracy(AUDITC)
    plain = _plain_profile(list(AUDITC), head)
    assert plain is not None and plain["sites"] == 14
    best = optimize.minimize(
        lambda t: -_independent_log_likelihood(t), np.array([2.0, -1.2, 0.0, -0.5, 0.5]), method="BFGS"
    )
    estimate, low, high = plain["sensitivity"]
    # nested inside the headline's t(12) interval, which is wider
    assert special.logit(head.sensitivity.ci_low) < low < estimate < high < special.logit(head.sensitivity.ci_high)
    for limit in (low, high):
        inner = optimize.minimize(
            lambda t, fixed=limit: -_independent_log_likelihood(np.r_[fixed, t]), best.x[1:], method="BFGS"
        )
        assert 2 * (inner.fun - best.fun) == pytest.approx(1.959964**2, abs=0.1)
