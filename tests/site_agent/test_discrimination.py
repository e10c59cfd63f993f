"""AUC (Mann–Whitney) and DeLong standard errors and covariance, against published and reference values."""

from __future__ import annotations

import math

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from site_agent.analyses import Paired, Roc
from site_agent.analyses.histogram import ScoreHistogram, mann_whitney_delong
from site_agent.analyses.roc import DEFAULT_PROBABILITY_EDGES

from .conftest import Cancer
from .helpers import Policy, feed, statistics

# Hanley & McNeil (1982), Radiology 143:29-36, Table I: ratings 1 (definitely normal) .. 5 (definitely
# abnormal) of 58 normal and 51 abnormal CT images.
NORMAL = (33, 6, 6, 11, 2)
ABNORMAL = (3, 2, 2, 11, 33)


def rating_data() -> tuple[np.ndarray, np.ndarray]:
    ratings = np.arange(1, 6, dtype=np.float64)
    scores = np.concatenate([np.repeat(ratings, NORMAL), np.repeat(ratings, ABNORMAL)])
    outcome = np.concatenate([np.zeros(sum(NORMAL), dtype=np.int64), np.ones(sum(ABNORMAL), dtype=np.int64)])
    return scores, outcome


def structural_components(positive: np.ndarray, negative: np.ndarray) -> tuple[float, float, np.ndarray, np.ndarray]:
    """Independent check: DeLong et al. (1988) computed directly over all m×n pairs (O(mn)).

    psi(x, y) = 1 if x > y, 1/2 if x = y, 0 otherwise; V10(x_i) = mean_j psi(x_i, y_j),
    V01(y_j) = mean_i psi(x_i, y_j); Var = S10/m + S01/n with S the sample variances of V10 and V01.
    """
    psi = (positive[:, None] > negative[None, :]) + 0.5 * (positive[:, None] == negative[None, :])
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    auc = float(psi.mean())
    variance = v10.var(ddof=1) / len(positive) + v01.var(ddof=1) / len(negative)
    return auc, float(variance), v10, v01


def test_hanley_mcneil_rating_data() -> None:
    scores, outcome = rating_data()
    roc = feed(Roc((1.5, 2.5, 3.5, 4.5)), scores, outcome, pieces=5)
    counts = roc.counts(Policy(min_cell_size=1))
    auc, se = statistics(counts)["roc.auc"], statistics(counts)["roc.auc_se"]
    # Hanley & McNeil 1982, Table I: area 0.8932 (= 2642/2958, the Mann-Whitney statistic with ties 1/2).
    assert auc == pytest.approx(2642 / 2958, abs=1e-12)
    assert round(auc, 4) == 0.8932
    assert auc == pytest.approx(roc_auc_score(outcome, scores), abs=1e-12)  # scikit-learn on the expanded data
    reference_auc, variance, _, _ = structural_components(scores[outcome == 1], scores[outcome == 0])
    assert reference_auc == pytest.approx(auc, abs=1e-12)
    assert se == pytest.approx(math.sqrt(variance), abs=1e-12)
    assert round(se, 4) == 0.0307  # DeLong SE as stated in the issue brief (0.0307), from the direct computation
    # The released bands are Table I itself (k = 1: no merging needed).
    released = {name: counts.values[name] for name in counts.values}
    assert [released[f"roc.band[{j}].negative"] for j in range(5)] == list(NORMAL)
    assert [released[f"roc.band[{j}].positive"] for j in range(5)] == list(ABNORMAL)


def test_merged_bands_give_the_auc_of_the_released_bands() -> None:
    scores, outcome = rating_data()
    roc = feed(Roc((1.5, 2.5, 3.5, 4.5)), scores, outcome)
    counts = roc.counts(Policy(min_cell_size=5))
    # Abnormal counts 3, 2, 2 in ratings 1-3 and the normal 2 in rating 5 are below 5: merged with their
    # neighbour until safe, which leaves more than one band (a single band would give no AUC at all).
    bands = [(b.low, b.high, b.counts) for b in roc.bands]
    assert all(c == 0 or c >= 5 for _, _, pair in bands for c in pair) and 1 < len(bands) < 5
    assert sum(pair[0] for _, _, pair in bands) == 51 and sum(pair[1] for _, _, pair in bands) == 58
    # the AUC is the released bands' own (records in one band tied): scikit-learn on the band of each record
    band_of = np.searchsorted([b.high if b.high is not None else np.inf for b in roc.bands], scores, side="right")
    assert statistics(counts)["roc.auc"] == pytest.approx(roc_auc_score(outcome, band_of), abs=1e-12)
    assert statistics(counts)["roc.auc"] < 2642 / 2958  # ties within merged bands only lower it here


def test_delong_from_the_released_bands_matches_direct_computation(cancer: Cancer) -> None:
    roc = feed(Roc((0.2, 0.5, 0.8)), cancer.scores, cancer.outcome, pieces=3)
    derived = statistics(roc.counts(Policy()))
    band_of = np.searchsorted([0.2, 0.5, 0.8], cancer.scores, side="right").astype(float)
    positive, negative = band_of[cancer.outcome == 1], band_of[cancer.outcome == 0]
    auc, variance, _, _ = structural_components(positive, negative)
    assert derived["roc.auc"] == pytest.approx(roc_auc_score(cancer.outcome, band_of), abs=1e-12)
    assert derived["roc.auc"] == pytest.approx(auc, abs=1e-12)
    assert derived["roc.auc_se"] == pytest.approx(math.sqrt(variance), rel=1e-9)


def _index(values: np.ndarray, edges: tuple[float, ...]) -> np.ndarray:
    """Each record's band (0, 1, ...) among the bands cut by ``edges`` (low <= value < high)."""
    return np.searchsorted(np.asarray(edges, dtype=np.float64), values, side="right").astype(np.float64)


def _correlated_scores(n: int = 3000, seed: int = 1) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Two correlated logistic risk scores of one invented condition (prevalence about 10%)."""
    rng = np.random.default_rng(seed)
    outcome = (rng.random(n) < 0.1).astype(np.int64)
    shared = rng.normal(size=n)
    model = 1 / (1 + np.exp(-(-1.5 + 1.6 * outcome + 0.8 * shared + 0.5 * rng.normal(size=n))))
    compare = 1 / (1 + np.exp(-(-1.5 + 1.2 * outcome + 0.8 * shared + 0.6 * rng.normal(size=n))))
    return model, compare, outcome


@pytest.mark.parametrize("k", [1, 10])
def test_paired_statistics_are_those_of_the_released_bands(cancer: Cancer, k: int) -> None:
    """Every paired statistic is recomputed from the bands the release shows, by code that shares nothing with
    the site's: each record replaced by its band index (ties within a band), scikit-learn's roc_auc_score for
    the AUCs, the DeLong (1988) structural components over all m x n pairs for the variances, and the same
    over the joint cells for the AUCs' correlation. k = 1 on scikit-learn's breast-cancer data (nothing to
    merge); k = 10 on 3,000 invented records with two correlated scores (bands merged, a joint table of
    coarser bands)."""
    scores, compare_scores, outcome = (
        (cancer.scores, cancer.compare_scores, cancer.outcome) if k == 1 else _correlated_scores()
    )
    paired = Paired(0.5, 0.5, "0" * 64, DEFAULT_PROBABILITY_EDGES, DEFAULT_PROBABILITY_EDGES)
    feed(paired, scores, outcome, pieces=4, compare=compare_scores)
    counts = paired.counts(Policy(min_cell_size=k))
    derived = {name.removeprefix("paired."): value for name, value in statistics(counts).items()}
    diseased = outcome == 1
    own = [
        _index(s, tuple(b.low for b in bands[1:]))
        for s, bands in zip((scores, compare_scores), paired.own, strict=True)
    ]
    assert paired.has_joint
    joint = [_index(s, edges) for s, edges in zip((scores, compare_scores), paired.kept, strict=True)]
    for which, index in (("model", own[0]), ("compare", own[1])):
        auc, variance, _, _ = structural_components(index[diseased], index[~diseased])
        assert derived[f"auc_{which}"] == pytest.approx(roc_auc_score(outcome, index), abs=1e-12)
        assert derived[f"auc_{which}"] == pytest.approx(auc, abs=1e-12)
        assert derived[f"auc_{which}_se"] == pytest.approx(math.sqrt(variance), rel=1e-9)
    # DeLong et al. 1988: Cov = S10_ab/m + S01_ab/n over the structural components of the two (joint) indices.
    a = structural_components(joint[0][diseased], joint[0][~diseased])
    b = structural_components(joint[1][diseased], joint[1][~diseased])
    m, n = diseased.sum(), (~diseased).sum()
    covariance = np.cov(a[2], b[2], ddof=1)[0, 1] / m + np.cov(a[3], b[3], ddof=1)[0, 1] / n
    correlation = covariance / math.sqrt(a[1] * b[1])
    assert derived["auc_correlation"] == pytest.approx(correlation, rel=1e-9)
    se_model, se_compare = derived["auc_model_se"], derived["auc_compare_se"]
    assert derived["auc_covariance"] == pytest.approx(correlation * se_model * se_compare, rel=1e-9)
    difference_se = math.sqrt(se_model**2 + se_compare**2 - 2 * correlation * se_model * se_compare)
    assert derived["auc_difference"] == pytest.approx(derived["auc_model"] - derived["auc_compare"], abs=1e-15)
    assert derived["auc_difference_se"] == pytest.approx(difference_se, rel=1e-9)
    assert derived["auc_difference_ci_high"] - derived["auc_difference"] == pytest.approx(1.959964 * difference_se)
    if k == 1:  # nothing to merge: each model's bands are the requested ones (the comparison's threshold no edge)
        assert len(paired.own[0]) == len(paired.own[1]) + 1 == len(DEFAULT_PROBABILITY_EDGES) + 1
        return
    shown = [v for name, v in counts.values.items() if "_band[" in name or ".joint[" in name]
    assert all(v == 0 or v >= k for v in shown)  # every class total and threshold side is large here
    assert 2 <= len(paired.kept[0]) + 1 < len(paired.own[0])  # the joint table is coarser than the own bands
    # near the AUCs of the individual scores (scikit-learn), and a correlation below theirs (ties)
    assert derived["auc_model"] == pytest.approx(roc_auc_score(outcome, scores), abs=0.02)
    assert derived["auc_compare"] == pytest.approx(roc_auc_score(outcome, compare_scores), abs=0.02)


def test_a_withheld_joint_cell_withholds_the_correlation_but_not_the_aucs(cancer: Cancer) -> None:
    paired = Paired(0.5, 0.5, "0" * 64, DEFAULT_PROBABILITY_EDGES, DEFAULT_PROBABILITY_EDGES)
    feed(paired, cancer.scores, cancer.outcome, compare=cancer.compare_scores)
    counts = paired.counts(Policy(min_cell_size=10))
    released = dict(counts.values)
    released["paired.positive.joint[0][0]"] = None
    derived = {name: (value(released) if callable(value) else value) for name, (value, _) in counts.derived.items()}
    assert derived["paired.auc_model"] is not None and derived["paired.auc_compare_se"] is not None
    assert derived["paired.auc_correlation"] is None and derived["paired.auc_difference_se"] is None


def test_histogram_coarsens_past_its_cap_and_says_so() -> None:
    rng = np.random.default_rng(3)  # continuous scores with more distinct values than the cap
    outcome = rng.integers(0, 2, 20_000)
    scores = rng.normal(outcome * 1.0, 1.0)
    histogram = ScoreHistogram(max_keys=1000)
    for part in np.array_split(np.arange(len(outcome)), 10):
        histogram.add(scores[part], outcome[part])
    assert len(histogram.keys) <= 1000 and histogram.resolution is not None
    assert histogram.n_positive == int(outcome.sum()) and histogram.n_negative == int((1 - outcome).sum())
    result = mann_whitney_delong(histogram)
    assert result is not None
    assert result.auc == pytest.approx(roc_auc_score(outcome, scores), abs=2e-3)  # rounding to the grid only


def test_one_class_only_gives_no_auc() -> None:
    roc = feed(Roc((0.5,)), np.array([0.1, 0.7, 0.9]), np.array([1, 1, 1]))
    assert statistics(roc.counts(Policy()))["roc.auc"] is None


def test_every_band_withheld_gives_no_auc() -> None:
    # Four positives spread over three bands, minimum cell size 5: every band's positive count is withheld
    # and merging leaves one group, in which every record is tied. An AUC of 0.5 with SE 0 would describe the
    # suppression, not the model, so none is released (Mann-Whitney needs two ordered groups: Hanley and
    # McNeil 1982, from memory).
    scores = np.array([0.1, 0.4, 0.45, 0.8, 0.1, 0.2, 0.3, 0.35, 0.4, 0.6, 0.7, 0.75, 0.85, 0.9])
    outcome = np.array([1, 1, 1, 1, 0, 0, 0, 0, 0, 0, 0, 0, 0, 0])
    roc = feed(Roc((0.3, 0.6)), scores, outcome)
    derived = statistics(roc.counts(Policy(min_cell_size=5)))
    assert derived["roc.auc"] is None and derived["roc.auc_se"] is None
    # the same records with a cell size that lets two groups through still give their banded AUC
    two = statistics(feed(Roc((0.3, 0.6)), scores, outcome).counts(Policy(min_cell_size=1)))
    band_of = np.searchsorted([0.3, 0.6], scores, side="right")
    assert two["roc.auc"] == pytest.approx(roc_auc_score(outcome, band_of), abs=1e-12)
