"""Bounds on a site's AUC when some ROC band counts are withheld, checked against every table the withheld
counts allow, each scored by scikit-learn's ``roc_auc_score`` (an independent Mann-Whitney AUC with ties
counted ½), on scikit-learn's bundled breast cancer data (Street, Wolberg & Mangasarian 1993; UCI)."""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.metrics import roc_auc_score

from federation.protocol.documents import ConfusionTable, Release
from federation.ranges import auc_range, auc_ranges, subgroup_auc_ranges
from federation.stats import auc_bounds as bounds_module
from federation.stats.auc_bounds import auc_bounds

K = 5  # the minimum cell size of these checks


def _bands() -> tuple[np.ndarray, np.ndarray]:
    """Band counts of the first 90 records scored by their mean radius, malignant = with the condition."""
    data = load_breast_cancer()
    radius = data.data[:90, list(data.feature_names).index("mean radius")]
    malignant = data.target[:90] == 0  # scikit-learn codes malignant as 0
    edges = [11.0, 12.0, 13.0, 14.0, 15.5, 17.0, 19.0]
    band = np.searchsorted(edges, radius, side="right")
    positive = np.bincount(band[malignant], minlength=len(edges) + 1)
    negative = np.bincount(band[~malignant], minlength=len(edges) + 1)
    return positive, negative


def _pieces(value: int, rule: str | None, total: int) -> list[tuple[int, int]]:
    if rule is None:
        return [(value, value)]
    if rule == "small":  # minimum cell size, zeros shown: 1..k-1
        return [(1, K - 1)]
    return [(0, 0), (K, total)]  # complementary: 0, or at least k


def _completions(cells: list[list[tuple[int, int]]], total: int) -> list[tuple[int, ...]]:
    """Every table of one class the pieces and the total allow (enumerated)."""
    ranges = [[v for low, high in pieces for v in range(low, high + 1)] for pieces in cells]
    return [t for t in itertools.product(*ranges) if sum(t) == total]


def _sklearn_auc(positive: tuple[int, ...], negative: tuple[int, ...]) -> float:
    labels = np.repeat([1] * len(positive) + [0] * len(negative), [*positive, *negative])
    scores = np.repeat(list(range(len(positive))) * 2, [*positive, *negative])
    return float(roc_auc_score(labels, scores))


def _every_auc(
    cells_pos: list, cells_neg: list, n_pos: int, n_neg: int, below_edge: tuple[int, int] | None = None
) -> list[float]:
    """scikit-learn's AUC of every table the pieces and totals allow (with ``below_edge``, only those with that
    many of each class in the first four bands: a 2x2 table at the edge above band 3)."""
    tables = [_completions(cells_pos, n_pos), _completions(cells_neg, n_neg)]
    if below_edge is not None:
        tables = [[t for t in found if sum(t[:4]) == fixed] for found, fixed in zip(tables, below_edge, strict=True)]
    return [_sklearn_auc(p, n) for p in tables[0] for n in tables[1]]


def test_the_data_has_small_bands_to_withhold() -> None:
    positive, negative = _bands()
    # read from the data: 61 of the first 90 records are malignant, by band
    assert positive.tolist() == [1, 2, 3, 9, 12, 8, 13, 13]
    assert negative.tolist() == [9, 5, 6, 8, 1, 0, 0, 0]


@pytest.mark.parametrize(
    "hidden_positive, hidden_negative",
    [
        ({0: "small", 3: "complementary"}, {4: "small", 6: "complementary"}),
        ({}, {1: "complementary", 3: "complementary", 4: "small", 7: "complementary"}),
        ({1: "small", 5: "complementary", 6: "complementary"}, {0: "complementary", 2: "complementary"}),
    ],
)
def test_the_bounds_are_the_smallest_and_largest_auc_of_every_table_allowed(
    hidden_positive: dict[int, str], hidden_negative: dict[int, str]
) -> None:
    positive, negative = _bands()
    n_pos, n_neg = int(positive.sum()), int(negative.sum())
    # each withheld count must be one its rule could have withheld
    for counts, hidden in ((positive, hidden_positive), (negative, hidden_negative)):
        for j, rule in hidden.items():
            assert (1 <= counts[j] < K) if rule == "small" else (counts[j] == 0 or counts[j] >= K)
    cells_pos = [_pieces(int(v), hidden_positive.get(j), n_pos) for j, v in enumerate(positive)]
    cells_neg = [_pieces(int(v), hidden_negative.get(j), n_neg) for j, v in enumerate(negative)]
    found = auc_bounds(cells_pos, cells_neg, n_pos, n_neg)
    assert found is not None
    every = _every_auc(cells_pos, cells_neg, n_pos, n_neg)
    assert len(every) >= 2
    assert found[0] == pytest.approx(min(every), abs=1e-12)
    assert found[1] == pytest.approx(max(every), abs=1e-12)
    truth = _sklearn_auc(tuple(positive), tuple(negative))
    assert found[0] <= truth <= found[1]
    assert found[0] < found[1]


def test_beyond_the_choices_tried_the_bounds_widen_but_still_hold(monkeypatch: pytest.MonkeyPatch) -> None:
    # Four bands of negatives, each withheld as "0, or at least 5" with at most 6 (its range), hold 16: three
    # of them 5, 5 and 6 (hand-worked). Their hulls 0..6 also admit 6, 6, 4 and 0.
    positive, _ = _bands()
    n_pos = int(positive.sum())
    cells_pos = [[(int(v), int(v))] for v in positive]
    cells_neg = [[(0, 0), (5, 6)]] * 4 + [[(1, 1)], [(0, 0)], [(0, 0)], [(0, 0)]]
    exact = auc_bounds(cells_pos, cells_neg, n_pos, 17)
    every = [_sklearn_auc(tuple(positive), n) for n in _completions(cells_neg, 17)]
    assert exact == pytest.approx((min(every), max(every)), abs=1e-12)
    monkeypatch.setattr(bounds_module, "MAX_CHOICES", 3)  # four such counts: their hulls are used instead
    wide = auc_bounds(cells_pos, cells_neg, n_pos, 17)
    assert exact is not None and wide is not None
    assert wide[0] <= exact[0] and exact[1] < wide[1]


def test_counts_that_contradict_their_total_give_no_bounds() -> None:
    # two bands of positives withheld as 1..4 cannot hold the 20 the total leaves them
    assert auc_bounds([[(1, 4)], [(1, 4)], [(12, 12)]], [[(3, 3)], [(3, 3)], [(3, 3)]], 32, 9) is None
    assert auc_bounds([[(3, 3)]], [[(0, 0)]], 3, 0) is None


def test_a_two_by_two_table_at_a_band_edge_narrows_the_bounds_to_the_tables_it_allows() -> None:
    # A released 2x2 table at radius 14.0 (the edge above band 3) fixes how many of each class lie below it.
    positive, negative = _bands()
    n_pos, n_neg = int(positive.sum()), int(negative.sum())
    hidden_positive = {0: "small", 2: "small", 3: "complementary", 5: "complementary"}
    hidden_negative = {1: "complementary", 3: "complementary", 4: "small"}
    cells_pos = [_pieces(int(v), hidden_positive.get(j), n_pos) for j, v in enumerate(positive)]
    cells_neg = [_pieces(int(v), hidden_negative.get(j), n_neg) for j, v in enumerate(negative)]
    fn, tn = int(positive[:4].sum()), int(negative[:4].sum())
    cumulative = tuple(
        [(fixed, fixed) if j == 3 else (0, total) for j in range(7)] + [(total, total)]
        for fixed, total in ((fn, n_pos), (tn, n_neg))
    )
    narrow = auc_bounds(cells_pos, cells_neg, n_pos, n_neg, cumulative)
    wide = auc_bounds(cells_pos, cells_neg, n_pos, n_neg)
    every = _every_auc(cells_pos, cells_neg, n_pos, n_neg, below_edge=(fn, tn))
    assert narrow == pytest.approx((min(every), max(every)), abs=1e-12)
    assert narrow is not None and wide is not None
    assert wide[0] < narrow[0] and narrow[1] < wide[1]
    assert narrow[0] <= _sklearn_auc(tuple(positive), tuple(negative)) <= narrow[1]


def _pairs_auc(positive: tuple[int, ...], negative: tuple[int, ...]) -> float:
    """The AUC by its definition: the share of (with, without) pairs ordered rightly, ties ½ (Hanley &
    McNeil 1982), over every pair of records."""
    with_ = np.repeat(np.arange(len(positive)), positive)
    without = np.repeat(np.arange(len(negative)), negative)
    order = np.subtract.outer(with_, without)
    return float(((order > 0) + 0.5 * (order == 0)).mean())


def test_random_tables_with_ranges_on_their_cumulative_counts() -> None:
    # Random small tables (their own making), some counts withheld by the rules above and each cumulative
    # count known only to a random range around its value: the bounds are the extremes of every table.
    rng = np.random.default_rng(12)
    checked = 0
    for _ in range(60):
        bands = int(rng.integers(3, 6))
        tables = [rng.integers(0, 8, size=bands) for _ in range(2)]
        if tables[0].sum() == 0 or tables[1].sum() == 0:
            continue
        cells, cumulative = [], []
        for table in tables:
            total = int(table.sum())
            hide = rng.random(bands) < 0.5
            cells.append(
                [
                    _pieces(int(v), ("small" if 1 <= v < K else "complementary") if hide[j] else None, total)
                    for j, v in enumerate(table)
                ]
            )
            below = np.cumsum(table)
            slack = rng.integers(0, 4, size=(bands, 2))
            cumulative.append(
                [(max(0, int(below[j] - slack[j, 0])), int(below[j] + slack[j, 1])) for j in range(bands - 1)]
                + [(total, total)]
            )
        found = auc_bounds(cells[0], cells[1], int(tables[0].sum()), int(tables[1].sum()), tuple(cumulative))
        allowed = [
            [
                t
                for t in _completions(cells[c], int(tables[c].sum()))
                if all(low <= s <= high for s, (low, high) in zip(np.cumsum(t), cumulative[c], strict=True))
            ]
            for c in (0, 1)
        ]
        every = [_pairs_auc(p, n) for p in allowed[0] for n in allowed[1]]
        assert found == pytest.approx((min(every), max(every)), abs=1e-12)
        checked += 1
    assert checked >= 50


def test_a_release_gets_the_bounds_of_every_table_its_counts_and_rules_allow() -> None:
    # The bands above as a site would release them, with its 2x2 table at radius 14.0 (a band edge) shown and
    # five band counts withheld by their rules: federation.ranges reads the ranges and rules from the release.
    positive, negative = _bands()
    edges = [11.0, 12.0, 13.0, 14.0, 15.5, 17.0, 19.0]
    hidden_positive = {0: "small", 2: "small", 3: "complementary"}
    hidden_negative = {1: "complementary", 4: "small"}
    rule_names = {"small": "minimum_cell_size", "complementary": "complementary"}
    bands, rules = [], {}
    for j, (p, n) in enumerate(zip(positive.tolist(), negative.tolist(), strict=True)):
        low = None if j == 0 else edges[j - 1]
        high = None if j == len(edges) else edges[j]
        band = {"low": low, "high": high, "positive": p, "negative": n}
        for key, hidden in (("positive", hidden_positive), ("negative", hidden_negative)):
            if j in hidden:
                band[key] = None
                rules[f"band[{j}].{key}"] = rule_names[hidden[j]]
        bands.append(band)
    n_pos, n_neg = int(positive.sum()), int(negative.sum())
    fn, tn = int(positive[:4].sum()), int(negative[:4].sum())
    cells = {"tp": n_pos - fn, "fp": n_neg - tn, "fn": fn, "tn": tn}
    flow = {"read": 90, "analysed": 90, "analysed_positive": n_pos, "analysed_negative": n_neg, "excluded": {}}
    roc = {"bands": bands, "positive": n_pos, "negative": n_neg, "auc": None, "suppressed_by": rules}
    policy = {"min_cell_size": K, "allow_zero": True}
    release = Release(
        "study",
        "r1",
        "b" * 64,
        "s1",
        "2026-12-01T00:00:00Z",
        policy,
        flow,
        (ConfusionTable(14.0, cells),),
        extra={"roc": roc},
    )
    found = auc_range(release)
    assert auc_ranges(release) == {None: found}  # the whole release's and the levels' together: the same
    cells_pos = [_pieces(int(v), hidden_positive.get(j), n_pos) for j, v in enumerate(positive)]
    cells_neg = [_pieces(int(v), hidden_negative.get(j), n_neg) for j, v in enumerate(negative)]
    every = _every_auc(cells_pos, cells_neg, n_pos, n_neg, below_edge=(fn, tn))
    assert len(every) >= 2
    assert found == pytest.approx((min(every), max(every)), abs=1e-12)
    # a release that shows its AUC gets none
    shown = dataclasses.replace(release, extra={"roc": {**roc, "auc": 0.8}})
    assert auc_range(shown) is None


def _texture_levels() -> list[tuple[np.ndarray, np.ndarray]]:
    """The bands above within two levels of mean texture (below 19, then 19 or more): positives, negatives."""
    data = load_breast_cancer()
    radius = data.data[:90, list(data.feature_names).index("mean radius")]
    texture = data.data[:90, list(data.feature_names).index("mean texture")]
    malignant = data.target[:90] == 0
    band = np.searchsorted([11.0, 12.0, 13.0, 14.0, 15.5, 17.0, 19.0], radius, side="right")
    levels = []
    for inside in (texture < 19.0, texture >= 19.0):
        levels.append(tuple(np.bincount(band[inside & c], minlength=8) for c in (malignant, ~malignant)))
    return levels


def _subgroup_release(hidden: list[dict[str, dict[int, str]]], totals_shown: tuple[bool, bool]) -> Release:
    """A release whose only ROC bands are those within the two texture levels (each level's counts ``hidden``
    by their rules; a level that hides none shows its AUC), with the whole 2x2 table at radius 14.0 and the flow
    shown; each level's class totals shown or withheld as ``totals_shown`` says."""
    edges = [11.0, 12.0, 13.0, 14.0, 15.5, 17.0, 19.0]
    rule_names = {"small": "minimum_cell_size", "complementary": "complementary"}
    levels = []
    for index, ((positive, negative), shown) in enumerate(zip(_texture_levels(), totals_shown, strict=True)):
        bands, rules = [], {}
        for j, (p, n) in enumerate(zip(positive.tolist(), negative.tolist(), strict=True)):
            band = {"low": None if j == 0 else edges[j - 1], "high": None if j == len(edges) else edges[j]}
            for key, value in (("positive", p), ("negative", n)):
                rule = hidden[index][key].get(j)
                band[key] = None if rule else value
                if rule:
                    rules[f"band[{j}].{key}"] = rule_names[rule]
            bands.append(band)
        n_pos, n_neg = (int(positive.sum()), int(negative.sum())) if shown else (None, None)
        roc = {"bands": bands, "positive": n_pos, "negative": n_neg, "auc": None, "suppressed_by": rules}
        if not any(hidden[index].values()):
            roc["auc"] = _sklearn_auc(tuple(positive), tuple(negative))
        label = {"low": None, "high": 19.0} if index == 0 else {"low": 19.0, "high": None}
        levels.append({"level": label, "analysed_positive": n_pos, "analysed_negative": n_neg, "roc": roc})
    positive, negative = (sum(level[c] for level in _texture_levels()) for c in (0, 1))
    n_pos, n_neg = int(positive.sum()), int(negative.sum())
    fn, tn = int(positive[:4].sum()), int(negative[:4].sum())
    cells = {"tp": n_pos - fn, "fp": n_neg - tn, "fn": fn, "tn": tn}
    flow = {"read": 90, "analysed": 90, "analysed_positive": n_pos, "analysed_negative": n_neg, "excluded": {}}
    subgroups = {"variables": [{"variable": "texture", "levels": levels}]}
    return Release(
        "study",
        "r1",
        "b" * 64,
        "s1",
        "2026-12-01T00:00:00Z",
        {"min_cell_size": K, "allow_zero": True},
        flow,
        (ConfusionTable(14.0, cells),),
        extra={"subgroups": subgroups},
    )


NONE_HIDDEN: dict[str, dict[int, str]] = {"positive": {}, "negative": {}}
HIDDEN_IN_LEVEL = {
    "positive": {1: "small", 3: "small", 6: "complementary"},
    "negative": {0: "complementary", 4: "small"},
}


def test_a_subgroup_level_gets_the_bounds_of_every_table_its_counts_and_rules_allow() -> None:
    # The first texture level withholds five band counts by their rules and its class totals; the second level
    # is shown in full, so the flow pins the first level's totals and the 2x2 table its counts below 14.0.
    (positive, negative), (other_pos, other_neg) = _texture_levels()
    # read from the data: the level below texture 19 holds 17 malignant and 21 benign records, by band
    assert positive.tolist() == [0, 1, 1, 2, 1, 2, 7, 3]
    assert negative.tolist() == [7, 2, 5, 6, 1, 0, 0, 0]
    for counts, hidden in ((positive, HIDDEN_IN_LEVEL["positive"]), (negative, HIDDEN_IN_LEVEL["negative"])):
        for j, rule in hidden.items():
            assert (1 <= counts[j] < K) if rule == "small" else (counts[j] == 0 or counts[j] >= K)
    found = subgroup_auc_ranges(_subgroup_release([HIDDEN_IN_LEVEL, NONE_HIDDEN], (False, True)))
    assert auc_ranges(_subgroup_release([HIDDEN_IN_LEVEL, NONE_HIDDEN], (False, True))) == found
    assert set(found) == {("texture", 0)}  # the second level shows its AUC
    n_pos, n_neg = int(positive.sum()), int(negative.sum())
    cells_pos = [_pieces(int(v), HIDDEN_IN_LEVEL["positive"].get(j), n_pos) for j, v in enumerate(positive)]
    cells_neg = [_pieces(int(v), HIDDEN_IN_LEVEL["negative"].get(j), n_neg) for j, v in enumerate(negative)]
    every = _every_auc(
        cells_pos, cells_neg, n_pos, n_neg, below_edge=(int(positive[:4].sum()), int(negative[:4].sum()))
    )
    assert len(every) >= 2
    assert found[("texture", 0)] == pytest.approx((min(every), max(every)), abs=1e-12)
    truth = _sklearn_auc(tuple(positive), tuple(negative))
    assert min(every) <= truth <= max(every) and min(every) < max(every)


def test_a_subgroup_level_whose_class_totals_nothing_pins_gets_no_bounds() -> None:
    # Both levels withhold their class totals and the second also a band count of each class (1 and 3
    # records: minimum cell size), so the flow gives only sums and neither level's totals are known: no bounds
    # are guessed.
    other = {"positive": {0: "small"}, "negative": {1: "small"}}
    _, (other_pos, other_neg) = _texture_levels()
    assert other_pos[0] in range(1, K) and other_neg[1] in range(1, K)
    assert subgroup_auc_ranges(_subgroup_release([HIDDEN_IN_LEVEL, other], (False, False))) == {}
    # with the first level's totals shown, the flow pins the second level's too: each gets bounds that hold the
    # AUC of its own bands (scikit-learn; the second level's is then exact: one count of each class withheld)
    found = subgroup_auc_ranges(_subgroup_release([HIDDEN_IN_LEVEL, other], (True, False)))
    assert set(found) == {("texture", 0), ("texture", 1)}
    for index, (positive, negative) in enumerate(_texture_levels()):
        low, high = found[("texture", index)]
        assert low - 1e-12 <= _sklearn_auc(tuple(positive), tuple(negative)) <= high + 1e-12
