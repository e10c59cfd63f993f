"""Band merging: every shown count is 0 or at least k, with as many bands as possible."""

from __future__ import annotations

import itertools

import numpy as np
import pytest

from site_agent.banding import ScoreAxis, bands_at_cuts, is_safe, merge_bands, merged_bands

from .helpers import chunk


def brute_force_runs(table: np.ndarray, k: int, allow_zero: bool) -> int:
    """Independent check: the largest number of safe runs over all 2^(B-1) partitions (0 if none is safe)."""
    bands = table.shape[0]
    best = 0
    for cuts in itertools.product([False, True], repeat=bands - 1):
        bounds = [0, *(i + 1 for i, cut in enumerate(cuts) if cut), bands]
        sums = [table[a:b].sum(axis=0) for a, b in zip(bounds, bounds[1:], strict=False)]
        if all(is_safe(int(c), k, allow_zero) for s in sums for c in s):
            best = max(best, len(sums))
    return best


def test_hand_worked_example() -> None:
    # positives 12, 3, 4, 15 and negatives 30, 20, 0, 11 with k = 10: bands 1-2 hold 3 and 4 positives.
    table = np.array([[12, 30], [3, 20], [4, 0], [15, 11]])
    runs = merge_bands(table, 10)
    sums = [table[a:b].sum(axis=0).tolist() for a, b in runs]
    assert sums == [[12, 30], [22, 31]] or sums == [[19, 50], [15, 11]]
    assert len(runs) == brute_force_runs(table, 10, True) == 2


@pytest.mark.parametrize("seed", range(40))
def test_dynamic_programme_finds_the_most_safe_runs(seed: int) -> None:
    rng = np.random.default_rng(seed)
    bands, k = int(rng.integers(1, 9)), int(rng.choice([3, 5, 10]))
    table = rng.choice([0, 1, 2, 4, 7, 12, 30], size=(bands, 2))
    allow_zero = bool(seed % 4)
    runs = merge_bands(table, k, allow_zero)
    assert runs[0][0] == 0 and runs[-1][1] == bands
    assert all(a[1] == b[0] for a, b in zip(runs, runs[1:], strict=False))  # a partition
    best = brute_force_runs(table, k, allow_zero)
    if best == 0:
        assert runs == [(0, bands)]  # nothing safe: one band, left to suppression
    else:
        assert len(runs) == best
        assert all(is_safe(int(c), k, allow_zero) for a, b in runs for c in table[a:b].sum(axis=0))


def test_which_way_a_small_band_merges_does_not_depend_on_its_neighbours_sizes() -> None:
    """The merged edges are released. A small band between two safe ones must merge the same way (into its
    right neighbour) whatever the neighbours hold: a tie broken by run sizes told a < b, and two such requests
    gave the small band's count (docs/threat-model.md, R12)."""
    for a, b in itertools.product(range(5, 40, 3), repeat=2):
        assert merge_bands(np.array([[a, 0], [3, 0], [b, 0]]), 5) == [(0, 1), (1, 3)], (a, b)


def test_the_runs_depend_only_on_which_stretches_are_safe() -> None:
    """Property: two tables whose every stretch of consecutive bands is safe or unsafe alike are cut alike
    (the recipient of the merged edges learns which stretches are safe, never more)."""
    rng = np.random.default_rng(11)
    seen: dict[tuple, list[tuple[int, int]]] = {}
    for _ in range(4000):
        bands = int(rng.integers(2, 5))
        table = rng.choice([0, 1, 3, 5, 6, 9, 14], size=(bands, 2))
        pattern = tuple(
            all(is_safe(int(c), 5, True) for c in table[a:b].sum(axis=0))
            for a in range(bands)
            for b in range(a + 1, bands + 1)
        )
        runs = merge_bands(table, 5)
        assert seen.setdefault(pattern, runs) == runs, table.tolist()
    assert len(seen) > 40  # many patterns were met, each twice or more on average


def test_merged_bands_carry_edges_and_counts() -> None:
    table = np.array([[12, 30], [3, 20], [4, 0], [15, 11]])
    bands = merged_bands((0.25, 0.5, 0.75), table, 10)
    assert bands[0].low is None and bands[-1].high is None
    assert sum(b.counts[0] for b in bands) == 34 and sum(b.counts[1] for b in bands) == 61
    assert all(b.low == a.high for a, b in zip(bands, bands[1:], strict=False))


def test_shared_axis_keeps_thresholds_and_nests_subgroup_cuts() -> None:
    rng = np.random.default_rng(11)
    outcome = rng.integers(0, 2, 3000)
    scores = np.clip(rng.normal(0.3 + 0.4 * outcome, 0.2), 0, 1)
    level = rng.integers(0, 3, 3000)
    edges = tuple(np.round(np.arange(0.05, 1.0, 0.05), 2))
    axis = ScoreAxis(edges, forced=(0.5,), strata=[("group", 3, lambda c: c.columns["group"])])
    for part in np.array_split(np.arange(3000), 7):
        piece = chunk(outcome[part])
        piece.columns["group"] = level[part]
        axis.add(piece, scores[part])
    overall = axis.cuts(10, True)
    within = axis.cuts(10, True, "group")
    assert 0.5 in overall and 0.5 in within
    assert within <= overall
    table = np.column_stack(
        [
            np.bincount(np.searchsorted(edges, scores[outcome == c], side="right"), minlength=len(edges) + 1)
            for c in (1, 0)
        ]
    )
    for band in bands_at_cuts(edges, table, overall):
        assert all(is_safe(c, 10, True) for c in band.counts)
    for g in range(3):
        mine = level == g
        table = np.column_stack(
            [
                np.bincount(
                    np.searchsorted(edges, scores[mine & (outcome == c)], side="right"), minlength=len(edges) + 1
                )
                for c in (1, 0)
            ]
        )
        for band in bands_at_cuts(edges, table, within):
            assert all(is_safe(c, 10, True) for c in band.counts)
