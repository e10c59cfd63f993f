"""Checks of threshold choice on scikit-learn's bundled breast-cancer data (Wolberg et al., UCI): the records
are split at random into sites of one population, so the pooled sensitivity and specificity at each threshold
must agree with scikit-learn's recall on all records, and the chosen threshold with the one scikit-learn's
ROC curve gives among the released thresholds."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression
from sklearn.metrics import recall_score
from sklearn.pipeline import make_pipeline
from sklearn.preprocessing import StandardScaler

from federation.stats import PoolingError, ReleasedTable, SiteEvidence
from federation.stats.planning import withhold_table
from federation.stats.threshold import CAUTION, ThresholdChoice, choose_threshold, pool_by_threshold

THRESHOLDS = (0.2, 0.35, 0.5, 0.65, 0.8)
N_SITES = 5


def _data() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    data = load_breast_cancer()
    x, y = data.data[:, :4], 1 - data.target  # the condition is malignancy
    risk = make_pipeline(StandardScaler(), LogisticRegression(max_iter=1000)).fit(x, y).predict_proba(x)[:, 1]
    site = np.random.default_rng(4).permutation(len(y)) % N_SITES
    return risk, y, site


def _tables(min_cell_size: int | None = None) -> dict[float, list[ReleasedTable]]:
    risk, y, site = _data()
    out: dict[float, list[ReleasedTable]] = {}
    for threshold in THRESHOLDS:
        rows = []
        for s in range(N_SITES):
            called, truth = risk[site == s] >= threshold, y[site == s] == 1
            cells = [int(np.sum(called & truth)), int(np.sum(called & ~truth)), int(np.sum(~called & truth))]
            cells.append(int(np.sum(~called & ~truth)))
            if min_cell_size is None:
                rows.append(ReleasedTable.complete(f"site-{s}", *cells))
            else:
                rows.append(withhold_table(f"site-{s}", *cells, min_cell_size))
        out[threshold] = rows
    return out


@pytest.fixture(scope="module")
def pooled():
    return pool_by_threshold(_tables())


def test_pooled_accuracy_agrees_with_scikit_learn_recall(pooled) -> None:
    risk, y, _ = _data()
    for result in pooled:
        assert result.estimated
        called = (risk >= result.threshold).astype(int)
        sensitivity = recall_score(y, called)
        specificity = recall_score(1 - y, 1 - called)
        # One population split at random: little heterogeneity, so the GLMM's summary point is close to the
        # overall proportion (differences come from the random effects' shrinkage, well under 0.03).
        assert result.sensitivity.estimate == pytest.approx(sensitivity, abs=0.03)
        assert result.specificity.estimate == pytest.approx(specificity, abs=0.03)
        assert result.sensitivity.ci_low < sensitivity < result.sensitivity.ci_high
        assert result.tau_logit_sensitivity is not None and result.tau_logit_sensitivity < 0.8
    estimates = [r.sensitivity.estimate for r in pooled]
    assert estimates == sorted(estimates, reverse=True)  # sensitivity falls as the threshold rises


def test_youden_choice_matches_scikit_learn_on_released_thresholds(pooled) -> None:
    risk, y, _ = _data()
    youden = {}
    for threshold in THRESHOLDS:
        called = (risk >= threshold).astype(int)
        youden[threshold] = recall_score(y, called) + recall_score(1 - y, 1 - called) - 1
    best = max(youden, key=youden.get)
    choice = choose_threshold(_tables(), "youden", pooled=pooled, bootstrap=6, seed=1)
    assert choice.status == "estimated"
    assert choice.threshold == best
    assert choice.ci_low <= choice.threshold <= choice.ci_high
    assert choice.replicates == 6 and sum(choice.bootstrap_share.values()) == pytest.approx(
        1 - choice.replicates_without_choice / 6
    )
    assert choice.caution == CAUTION and "optimistic" in CAUTION and "clinicians" in CAUTION
    assert ThresholdChoice.from_dict(choice.to_dict()) == choice


def test_target_sensitivity_picks_the_highest_threshold_that_reaches_it(pooled) -> None:
    risk, y, _ = _data()
    target = 0.85
    reaching = [t for t in THRESHOLDS if recall_score(y, (risk >= t).astype(int)) >= target + 0.03]
    choice = choose_threshold(_tables(), "target_sensitivity", target, pooled=pooled, bootstrap=0)
    assert choice.threshold >= max(reaching)
    assert choice.sensitivity.estimate >= target
    higher = [p for p in pooled if p.threshold > choice.threshold]
    assert all(p.sensitivity.estimate < target for p in higher)
    assert choice.ci_low is None  # no bootstrap asked for


def test_unreachable_target_is_not_estimable(pooled) -> None:
    choice = choose_threshold(_tables(), "target_sensitivity", 0.9999, pooled=pooled, bootstrap=0)
    assert choice.status.startswith("not estimable: no threshold reaches")
    assert choice.threshold is None


def test_withheld_cells_are_censored_and_bounded_by_the_other_thresholds(pooled) -> None:
    # With a minimum cell size of 5 (common practice) every site withholds TP and FN at threshold 0.2 (FN falls
    # below 5), which alone leaves TP either small or large; the site's TP released at higher thresholds tells
    # which. Every site stays in the pool, and the full tables' estimates lie inside the intervals from the
    # withheld ones and close to their estimates.
    tables = _tables(min_cell_size=5)
    assert all(t.suppressed == ("tp", "fn") for t in tables[0.2])
    full = {r.threshold: r for r in pooled}
    for result in pool_by_threshold(tables):
        assert result.estimated and len(result.sites_pooled) == N_SITES
        for measure in ("sensitivity", "specificity"):
            censored, complete = getattr(result, measure), getattr(full[result.threshold], measure)
            assert censored.ci_low < complete.estimate < censored.ci_high
            assert censored.estimate == pytest.approx(complete.estimate, abs=0.015)


def test_without_the_other_thresholds_a_withheld_pair_is_ambiguous() -> None:
    # The same tables at 0.2 alone: TP small and TP large are equally allowed by the rule, and the model
    # cannot tell them apart (the estimate lands far from scikit-learn's recall or is not estimable).
    alone = pool_by_threshold({0.2: _tables(min_cell_size=5)[0.2]})[0]
    risk, y, _ = _data()
    recall = recall_score(y, (risk >= 0.2).astype(int))
    assert not alone.estimated or abs(alone.sensitivity.estimate - recall) > 0.1


def test_bad_criterion_is_refused() -> None:
    with pytest.raises(PoolingError, match="criterion"):
        choose_threshold(_tables(), "accuracy")
    with pytest.raises(PoolingError, match="target sensitivity"):
        choose_threshold(_tables(), "target_sensitivity", None)


def test_interval_evidence_inside_a_band_keeps_the_site(pooled) -> None:
    # A site whose ROC bands merged across 0.5 knows only that TP(0.5) lies between TP(0.65) and TP(0.35) (and FP
    # likewise): given as interval evidence, the site stays in the pool and the estimate moves little.
    tables = _tables()
    site = tables[0.5][0]
    upper, lower = tables[0.35][0], tables[0.65][0]
    interval = SiteEvidence(
        site.site_id,
        np.ones(1),
        np.array([site.positives]),
        np.array([site.negatives]),
        (np.arange(lower.tp, upper.tp + 1),),
        (np.arange(lower.fp, upper.fp + 1),),
        censored=True,
    )
    mixed = {0.5: [interval, *tables[0.5][1:]], 0.8: tables[0.8]}
    result = pool_by_threshold(mixed)[0]
    full = {r.threshold: r for r in pooled}[0.5]
    assert result.estimated and len(result.sites_pooled) == N_SITES
    assert result.sensitivity.estimate == pytest.approx(full.sensitivity.estimate, abs=0.02)
    assert result.specificity.estimate == pytest.approx(full.specificity.estimate, abs=0.02)
