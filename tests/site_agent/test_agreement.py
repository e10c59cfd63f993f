"""Cohen's kappa of each pair (model, reference, second reference) against scikit-learn and statsmodels."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score
from statsmodels.stats.inter_rater import cohens_kappa

from site_agent.analyses import Agreement
from site_agent.analyses.agreement import cohen_kappa

from .conftest import Cancer
from .helpers import Policy, feed


def test_kappa_of_each_pair_equals_scikit_learn(cancer: Cancer) -> None:
    reference2 = cancer.second.copy()
    reference2[::50] = -1  # a few records without a second reading
    agreement = feed(Agreement((0.5,)), cancer.scores, cancer.outcome, pieces=3, reference2=reference2)
    counts = agreement.counts(Policy())
    derived = {name: value for name, (value, _) in counts.derived.items()}
    known = reference2 >= 0
    raters = {
        "model": (cancer.scores >= 0.5).astype(int)[known],
        "reference": cancer.outcome[known],
        "reference2": reference2[known],
    }
    for pair in ("model_reference", "model_reference2", "reference_reference2"):
        first, second = pair.split("_", 1)
        expected = cohen_kappa_score(raters[first], raters[second])  # scikit-learn
        assert derived[f"agreement[0].{pair}.kappa"] == pytest.approx(expected, abs=1e-12)
        table = np.array([[np.sum((raters[first] == a) & (raters[second] == b)) for b in (1, 0)] for a in (1, 0)])
        # statsmodels' asymptotic SE (Fleiss, Cohen & Everitt 1969).
        assert derived[f"agreement[0].{pair}.kappa_se"] == pytest.approx(cohens_kappa(table).std_kappa, rel=1e-9)
    missing = sum(
        counts.values[f"agreement[0].model{m}_reference{r}_reference2missing"] for m in (1, 0) for r in (1, 0)
    )
    assert missing == int((~known).sum())


def test_kappa_undefined_when_both_raters_agree_on_one_category() -> None:
    assert cohen_kappa(np.array([[0, 0], [0, 12]])) is None


def test_without_a_second_reference_nothing_is_counted() -> None:
    agreement = feed(Agreement((0.5,)), np.array([0.2, 0.8]), np.array([0, 1]))
    assert agreement.counts(Policy()).values == {}
    assert agreement.render({}, {}) == {"available": False, "reason": "this site maps no second reference standard"}
