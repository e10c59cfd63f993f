"""Leave-one-site-out refits of the headline model: each warm-started refit is the maximum a fit from scratch
finds (the same GLMM fitted by L-BFGS-B from its own starting values, binomial_glmm), the full fit is the
headline's point, and a refit the remaining sites cannot support is a reason, not a number. The GLMM itself
is checked against independent computations in test_glmm.py, test_glmm_quadrature.py and test_headline.py."""

from __future__ import annotations

import json

import numpy as np
import pytest
from scipy import special

from federation.stats import LeaveOneOut, ReleasedTable, binomial_glmm, headline_leave_one_site_out
from federation.stats.glmm import glmm_evidence
from federation.stats.headline import headline_accuracy
from simulations.validate_stats import SCENARIOS, consortium


@pytest.fixture(scope="module")
def few_sites():
    # 8 invented sites through the site's own disclosure rule; several withhold cells.
    tables = consortium(SCENARIOS[2], np.random.default_rng(11))
    assert sum(not t.is_complete for t in tables) >= 2
    return tables


def test_each_refit_is_the_fit_without_that_site(few_sites) -> None:
    result = headline_leave_one_site_out(few_sites)
    evidence, _ = glmm_evidence(few_sites, "censor", minimum=0)
    assert [row.site_id for row in result.omitted] == [ev.site_id for ev in evidence]
    headline = headline_accuracy(few_sites)
    assert result.full_sensitivity.estimate == pytest.approx(headline.sensitivity.estimate, abs=1e-9)
    assert result.full_specificity.estimate == pytest.approx(headline.specificity.estimate, abs=1e-9)
    for index, row in enumerate(result.omitted):
        scratch = binomial_glmm([ev for i, ev in enumerate(evidence) if i != index])
        # both are maxima to their optimiser's tolerance
        assert special.logit(row.sensitivity.estimate) == pytest.approx(scratch.mean_logit_sensitivity, abs=2e-3)
        assert special.logit(1 - row.specificity.estimate) == pytest.approx(scratch.mean_logit_fpr, abs=2e-3)
        assert row.change_logit_sensitivity == pytest.approx(
            special.logit(row.sensitivity.estimate) - special.logit(headline.sensitivity.estimate), abs=1e-9
        )
        assert row.sensitivity.ci_low < row.sensitivity.estimate < row.sensitivity.ci_high
    largest = max(max(abs(r.change_logit_sensitivity), abs(r.change_logit_specificity)) for r in result.omitted)
    assert result.largest_change_logit == pytest.approx(largest)
    assert "headline model" in result.model
    assert LeaveOneOut.from_dict(json.loads(json.dumps(result.to_dict(), allow_nan=False))) == result


def test_a_refit_with_too_few_sites_left_gives_its_reason() -> None:
    tables = [ReleasedTable.complete(f"s{i}", 40 + 3 * i, 20 + 2 * i, 8 + i, 150 + 5 * i) for i in range(4)]
    result = headline_leave_one_site_out(tables)
    assert [row.reason for row in result.omitted] == ["3 sites left; the headline model needs at least 4"] * 4
    assert all(row.sensitivity is None and row.change_logit_sensitivity is None for row in result.omitted)
    assert result.most_influential is None
