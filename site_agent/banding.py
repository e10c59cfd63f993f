"""Merging adjacent bands so that every count a release shows per band and class is 0 or at least k.

ROC score bands, margin bands and calibration bins are cut at edges the request fixes. A band whose
count of positives (or negatives) lies between 1 and k−1 would be suppressed by disclosure control, and
a suppressed band loses its records for every later use; merging it with a neighbour keeps them, only
coarser. So a banded analysis merges before it names its counts: :func:`merge_bands` finds the partition
of the bands into runs of adjacent bands in which every per-class count is 0 (when the policy allows
zeros) or at least ``min_cell_size``, with as many runs as possible (ties: the runs of most even size).
If no such partition exists (a class has between 1 and k−1 records in all), everything becomes one band,
which disclosure control then suppresses.

The merge depends only on the counts, which never leave the site; the merged edges are released.
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np


@dataclass(frozen=True)
class Band:
    """A run of merged bands: ``low <= value < high`` (``None`` = unbounded), with its per-class counts."""

    low: float | None
    high: float | None
    counts: tuple[int, ...]
    first: int  # index of the first original band in the run
    last: int  # index of the last original band in the run (inclusive)

    @property
    def merged(self) -> bool:
        return self.last > self.first


def intervals(edges: Sequence[float]) -> list[tuple[float | None, float | None]]:
    """The bands cut by strictly increasing ``edges``: (−∞, e1), [e1, e2), ..., [em, ∞)."""
    bounds: list[float | None] = [None, *[float(e) for e in edges], None]
    return [(bounds[i], bounds[i + 1]) for i in range(len(bounds) - 1)]


def is_safe(count: int, min_cell_size: int, allow_zero: bool) -> bool:
    """A count may be shown: at least k, or exactly 0 when the policy allows zeros."""
    return count >= min_cell_size or (count == 0 and allow_zero)


def merge_bands(counts: np.ndarray, min_cell_size: int, allow_zero: bool = True) -> list[tuple[int, int]]:
    """Partition bands (rows of ``counts``, one column per class) into runs ``[start, stop)``.

    Dynamic programming over run ends, O(bands² × classes): maximise the number of runs in which every
    column sum is safe; among partitions with as many runs, the last run of each prefix starts as early as
    possible (a rule of positions). The merged edges are released, so the choice may depend on which runs are
    safe but never on how large a safe run is: a tie broken by run sizes (say, runs as even as possible) would
    tell whether a small band's left neighbour holds fewer records than its right one, and with a second
    request that is the small band's count (docs/threat-model.md, R12). Returns ``[(0, bands)]`` when no
    partition is safe.
    """
    table = np.asarray(counts, dtype=np.int64)
    if table.ndim != 2 or table.shape[0] == 0:
        raise ValueError("counts must be a non-empty bands × classes table")
    bands = table.shape[0]
    prefix = np.vstack([np.zeros((1, table.shape[1]), dtype=np.int64), np.cumsum(table, axis=0)])
    best: list[int | None] = [None] * (bands + 1)  # the most safe runs a prefix can be cut into
    start_of: list[int] = [-1] * (bands + 1)
    best[0] = 0
    for stop in range(1, bands + 1):
        for start in range(stop):
            before = best[start]
            if before is None:
                continue
            sums = prefix[stop] - prefix[start]
            if not all(is_safe(int(c), min_cell_size, allow_zero) for c in sums):
                continue
            candidate = before + 1
            current = best[stop]
            if current is None or candidate > current:  # strictly more runs: the earliest start keeps a tie
                best[stop] = candidate
                start_of[stop] = start
    if best[bands] is None:
        return [(0, bands)]
    runs = []
    stop = bands
    while stop > 0:
        start = start_of[stop]
        runs.append((start, stop))
        stop = start
    return runs[::-1]


def merged_bands(edges: Sequence[float], counts: np.ndarray, min_cell_size: int, allow_zero: bool = True) -> list[Band]:
    """The bands cut by ``edges`` with their per-class ``counts`` (bands × classes), merged to be safe."""
    cuts = intervals(edges)
    table = np.asarray(counts, dtype=np.int64)
    if table.shape[0] != len(cuts):
        raise ValueError("counts must have one row per band (len(edges) + 1)")
    out = []
    for start, stop in merge_bands(table, min_cell_size, allow_zero):
        sums = table[start:stop].sum(axis=0)
        out.append(Band(cuts[start][0], cuts[stop - 1][1], tuple(int(c) for c in sums), start, stop - 1))
    return out


def bands_at_cuts(edges: Sequence[float], counts: np.ndarray, cuts: frozenset[float]) -> list[Band]:
    """Group the bands cut by ``edges`` into runs whose boundaries are the edges that are in ``cuts``."""
    spans = intervals(edges)
    table = np.asarray(counts, dtype=np.int64)
    if table.shape[0] != len(spans):
        raise ValueError("counts must have one row per band (len(edges) + 1)")
    kept = [i for i, edge in enumerate(edges) if float(edge) in cuts]
    starts = [0, *(i + 1 for i in kept)]
    stops = [*(i + 1 for i in kept), len(spans)]
    out = []
    for start, stop in zip(starts, stops, strict=True):
        sums = table[start:stop].sum(axis=0)
        out.append(Band(spans[start][0], spans[stop - 1][1], tuple(int(c) for c in sums), start, stop - 1))
    return out


def _partition(
    table: np.ndarray, edges: Sequence[float], forced: Sequence[float], min_cell_size: int, allow_zero: bool
) -> set[float]:
    """Which of ``edges`` (cutting ``table``'s rows) to keep: every forced edge, and the boundaries of the
    finest safe partition of each stretch between forced edges (:func:`merge_bands`)."""
    kept = {e for e in edges if e in forced}
    forced_at = [i for i, edge in enumerate(edges) if edge in forced]
    bounds = [0, *(i + 1 for i in forced_at), table.shape[0]]
    for start, stop in zip(bounds, bounds[1:], strict=False):
        if stop <= start:
            continue
        segment = table[start:stop]
        # A class (or level) whose total in this stretch is itself unsafe is suppressed whatever the cuts;
        # it must not stop the others from being cut finer.
        usable = [c for c in range(segment.shape[1]) if is_safe(int(segment[:, c].sum()), min_cell_size, allow_zero)]
        if not usable:
            continue
        for _, run_stop in merge_bands(segment[:, usable], min_cell_size, allow_zero):
            if start + run_stop < table.shape[0]:
                kept.add(edges[start + run_stop - 1])
    return kept


class ScoreAxis:
    """The score cuts every banded analysis of one release shares.

    Different analyses cut the score at different edges (ROC bands, calibration bins, margin bands) and
    subgroups repeat them per level. If each merged its bands alone, the difference between two released
    bands of different analyses could be a small count that no single band shows. So the release merges
    once. The atoms are cut by the union of every requested edge, and the thresholds are forced cuts (a
    2×2 table at the threshold is released anyway, so no band may span one):

    - the overall cuts are the finest in which every run between cuts is safe for each class;
    - each subgroup variable gets one set of cuts, a subset of the overall cuts, in which every run is
      safe for each class in every level of that variable; all its levels share them, so a level's band
      can never be had as "overall minus the other levels".

    A class or level too small to be shown at all in a stretch between forced cuts does not constrain the
    cuts: its cells are suppressed whatever the cuts. Each analysis then shows its own edges that are among
    its scope's cuts; each of its bands is a union of safe runs, and so is every difference of its bands.

    One analysis (the *feeder*) passes each chunk to :meth:`add`, so every record is counted once.
    """

    def __init__(
        self,
        edges: Sequence[float],
        forced: Sequence[float] = (),
        strata: Sequence[tuple[str, int, Callable[[Any], np.ndarray]]] = (),
    ) -> None:
        self.forced = tuple(sorted({float(t) for t in forced}))
        self.edges = tuple(sorted({float(e) for e in edges} | set(self.forced)))
        self.strata = list(strata)  # (variable, number of levels, chunk -> level index per record)
        atoms = len(self.edges) + 1
        self.overall = np.zeros((atoms, 2), dtype=np.int64)
        self.levels = {name: np.zeros((n, atoms, 2), dtype=np.int64) for name, n, _ in self.strata}
        self._feeder: object | None = None
        self._cuts: dict[tuple[int, bool, str | None], frozenset[float]] = {}

    def claim_feeder(self, analysis: object) -> bool:
        """True for the first analysis that asks: that one passes every chunk to :meth:`add`."""
        if self._feeder is None:
            self._feeder = analysis
        return self._feeder is analysis

    def add(self, chunk: Any, scores: np.ndarray) -> None:
        atom = np.searchsorted(np.asarray(self.edges, dtype=np.float64), scores, side="right")
        cell = atom * 2 + np.where(np.asarray(chunk.outcome) == 1, 0, 1)
        size = self.overall.size
        self.overall += np.bincount(cell, minlength=size).reshape(self.overall.shape)
        for name, levels, level_of in self.strata:
            index = level_of(chunk).astype(np.int64) * size + cell
            self.levels[name] += np.bincount(index, minlength=levels * size).reshape(self.levels[name].shape)

    def cuts(self, min_cell_size: int, allow_zero: bool, scope: str | None = None) -> frozenset[float]:
        """The surviving edges overall (``scope`` None) or for the levels of subgroup variable ``scope``."""
        key = (min_cell_size, allow_zero, scope)
        if key in self._cuts:
            return self._cuts[key]
        if scope is None:
            kept = _partition(self.overall, self.edges, self.forced, min_cell_size, allow_zero)
        else:
            overall = sorted(self.cuts(min_cell_size, allow_zero))
            # Runs of the overall cuts become the cells the variable's levels are merged over.
            is_cut = np.array([edge in overall for edge in self.edges], dtype=np.int64)
            run_of_atom = np.concatenate([[0], np.cumsum(is_cut)])
            levels = self.levels[scope]
            table = np.zeros((len(overall) + 1, levels.shape[0] * 2), dtype=np.int64)
            np.add.at(table, run_of_atom, np.concatenate(list(levels), axis=1))
            kept = _partition(table, overall, self.forced, min_cell_size, allow_zero)
        self._cuts[key] = frozenset(kept)
        return self._cuts[key]


def released_groups(
    bands: Sequence[Band],
    released: Mapping[str, int | None],
    names: Callable[[int], tuple[str, str]],
    totals: tuple[str, str],
) -> list[tuple[float | None, float | None, int, int]] | None:
    """The bands as a recipient can count them from the released counts alone: every band whose two counts
    are released, and one group from the first to the last band with a withheld count (its counts are the
    totals minus the bands outside it). None when a total is withheld."""
    total_pos, total_neg = released.get(totals[0]), released.get(totals[1])
    if total_pos is None or total_neg is None:
        return None
    values = [(released.get(names(j)[0]), released.get(names(j)[1])) for j in range(len(bands))]
    hidden = [j for j, (p, n) in enumerate(values) if p is None or n is None]
    if not hidden:
        return [(b.low, b.high, int(p), int(n)) for b, (p, n) in zip(bands, values, strict=True)]  # type: ignore[arg-type]
    first, last = hidden[0], hidden[-1]
    outside = [j for j in range(len(bands)) if j < first or j > last]
    group = (
        bands[first].low,
        bands[last].high,
        int(total_pos) - sum(int(values[j][0]) for j in outside),  # type: ignore[arg-type]
        int(total_neg) - sum(int(values[j][1]) for j in outside),  # type: ignore[arg-type]
    )
    before = [(bands[j].low, bands[j].high, int(values[j][0]), int(values[j][1])) for j in range(first)]  # type: ignore[arg-type]
    after = [(bands[j].low, bands[j].high, int(values[j][0]), int(values[j][1])) for j in range(last + 1, len(bands))]  # type: ignore[arg-type]
    return [*before, group, *after]


# --- two scores at once (the paired comparison) -----------------------------------------------------------


def _group_matrix(edges: Sequence[float], kept: set[float]) -> np.ndarray:
    """Bands cut by ``edges`` × runs between the ``kept`` edges: 1 where a band lies in a run."""
    run = np.concatenate([[0], np.cumsum([edge in kept for edge in edges])])
    matrix = np.zeros((len(run), int(run[-1]) + 1), dtype=np.int64)
    matrix[np.arange(len(run)), run] = 1
    return matrix


def grid_table(
    table: np.ndarray, edges: tuple[Sequence[float], Sequence[float]], kept: tuple[set[float], set[float]]
) -> np.ndarray:
    """The joint table (bands of score A × bands of score B × classes) summed over the runs between kept edges."""
    rows, columns = _group_matrix(edges[0], kept[0]), _group_matrix(edges[1], kept[1])
    return np.einsum("ia,ijc,jb->abc", rows, np.asarray(table, dtype=np.int64), columns)


def merge_grid(
    table: np.ndarray,
    edges: tuple[Sequence[float], Sequence[float]],
    forced: tuple[Sequence[float], Sequence[float]],
    min_cell_size: int,
    allow_zero: bool = True,
    allowed: tuple[frozenset[float] | None, frozenset[float] | None] = (None, None),
    joint_forced: tuple[Sequence[float], Sequence[float]] = ((), ()),
) -> tuple[tuple[frozenset[float], frozenset[float]], tuple[frozenset[float], frozenset[float]]]:
    """Which edges of two scores to keep: for each score's own bands (its marginal table, safe per class), and
    for the joint table (a subset of those, every cell safe per class).

    ``table`` counts records per band of score A (rows, cut by ``edges[0]``), band of score B (columns, cut by
    ``edges[1]``) and class. The ``forced`` edges are always among each score's own bands (the thresholds),
    ``joint_forced`` among the joint table's; ``allowed[axis]``, when given, limits the other edges of that
    axis (the release's shared score cuts, :class:`ScoreAxis`). Each score's own bands are its finest safe
    partition alone (:func:`_partition` of its marginal). For the joint table, empty runs are merged into a
    neighbour (no statistic changes) and each axis has a nested sequence of coarser partitions (each step
    drops the edge between the fewest records: sparse tails merge first) and each single edge alone;
    among the pairs whose every constrained cell is safe, the one with an edge on both axes that keeps the
    most discrimination on the poorer axis (the smaller |AUC − ½| of each axis's runs, from its marginal
    counts alone; then the most bands in all, then more for score A) is kept. A quadrant between
    ``joint_forced`` edges whose count of a class is itself unsafe does not constrain the cuts (its cells of
    that class are suppressed whatever they are), so the
    forced edges alone always qualify. Returns ((own bands A, own bands B), (joint A, joint B)); the joint
    edges are both empty when no pair with at least one edge on each axis qualifies (no joint table).
    """
    grid = np.asarray(table, dtype=np.int64)
    forced_cuts = ({float(f) for f in forced[0]}, {float(f) for f in forced[1]})
    kept: list[set[float]] = []
    for axis in (0, 1):
        axis_edges = [float(e) for e in edges[axis] if allowed[axis] is None or float(e) in allowed[axis]]
        axis_edges = sorted(set(axis_edges) | forced_cuts[axis])
        marginal = _coarse(grid.sum(axis=1 - axis), edges[axis], set(axis_edges))
        found = _partition(marginal, axis_edges, sorted(forced_cuts[axis]), min_cell_size, allow_zero)
        kept.append(found | forced_cuts[axis])
    forced_cuts = ({float(f) for f in joint_forced[0]}, {float(f) for f in joint_forced[1]})
    # A cell inside a quadrant (between forced cuts) whose own count is unsafe is suppressed whatever the cuts:
    # it does not constrain them (no cut can make it safe).
    quadrants = grid_table(grid, edges, forced_cuts)
    quadrant_safe = (quadrants >= min_cell_size) | ((quadrants == 0) & allow_zero)
    rows, columns = _group_matrix(edges[0], forced_cuts[0]), _group_matrix(edges[1], forced_cuts[1])
    counted = np.einsum("ia,abc,jb->ijc", rows, quadrant_safe.astype(np.int64), columns)

    def unsafe(cuts: tuple[set[float], set[float]]) -> int:
        cells = grid_table(grid, edges, cuts)
        constrained = grid_table(counted, edges, cuts) > 0
        bad = ((cells > 0) & (cells < min_cell_size)) | ((cells == 0) & (not allow_zero))
        return int(np.sum(bad & constrained))

    # Each axis alone: a nested sequence of partitions, from its finest safe one down to the forced edges,
    # each step dropping the edge between the fewest records (the sparse tails merge first). Then the pair of
    # partitions with the most bands on the poorer axis (then the most bands in all, then more for score A)
    # whose every constrained cell is safe.
    sequences = []
    for axis in (0, 1):
        marginal = grid.sum(axis=(1 - axis, 2))
        current = set(kept[axis])
        # an empty run merged with its neighbour changes no statistic; the joint table needs no empty rows
        while empty := [e for e in _beside_empty(edges[axis], current, marginal) if e not in forced_cuts[axis]]:
            current.discard(empty[0])
        sequence = [frozenset(current)]
        while removable := sorted(current - forced_cuts[axis]):
            runs = _group_matrix(edges[axis], current).T @ marginal
            order = sorted(current)
            edge = min(removable, key=lambda e: (int(runs[order.index(e)] + runs[order.index(e) + 1]), e))
            current.discard(edge)
            sequence.append(frozenset(current))
        # and every single edge alone (a 2x2 joint table cut anywhere on this axis)
        sequence += [frozenset({*forced_cuts[axis], e}) for e in sorted(kept[axis] - forced_cuts[axis])]
        # a partition with an empty run tells nothing more than one without it
        sequences.append([c for c in dict.fromkeys(sequence) if not _beside_empty(edges[axis], set(c), marginal)])
    # How much of each score's discrimination a partition keeps: the Mann-Whitney AUC of its runs (ties 1/2),
    # from the marginal counts alone (never from the joint cells, so the choice does not favour a correlation).
    separation = [
        {cuts: _banded_auc(_coarse(grid.sum(axis=1 - axis), edges[axis], set(cuts))) for cuts in sequences[axis]}
        for axis in (0, 1)
    ]
    best: tuple | None = None
    for first in sequences[0]:
        for second in sequences[1]:
            kept_auc = min(separation[0][first], separation[1][second])
            key = (bool(first and second), round(kept_auc, 12), len(first) + len(second), len(first))
            if best is not None and key <= best[0]:
                continue
            if unsafe((set(first), set(second))) == 0:
                best = (key, first, second)
    assert best is not None  # the forced edges alone leave only cells that do not constrain
    if not (best[1] and best[2]):
        # one band on an axis: the joint table would only repeat the other score's bands; none is kept
        return (frozenset(kept[0]), frozenset(kept[1])), (frozenset(), frozenset())
    return (frozenset(kept[0]), frozenset(kept[1])), (best[1], best[2])


def _banded_auc(table: np.ndarray) -> float:
    """|AUC − ½| of bands (rows) × [positive, negative] counts, records in one band tied; 0 without both."""
    positive, negative = table[:, 0].astype(float), table[:, 1].astype(float)
    if positive.sum() == 0 or negative.sum() == 0:
        return 0.0
    below = np.cumsum(negative) - negative
    auc = float(np.sum(positive * (below + 0.5 * negative)) / (positive.sum() * negative.sum()))
    return abs(auc - 0.5)


def _beside_empty(edges: Sequence[float], kept: set[float], marginal: np.ndarray) -> list[float]:
    """The kept edges next to a run between kept edges that holds no record."""
    runs = _group_matrix(edges, kept).T @ marginal
    order = sorted(kept)
    return [e for p, e in enumerate(order) if runs[p] == 0 or runs[p + 1] == 0]


def _coarse(marginal: np.ndarray, edges: Sequence[float], kept: set[float]) -> np.ndarray:
    """A marginal table over the bands cut by ``edges``, summed over the runs between the ``kept`` edges."""
    return _group_matrix(edges, kept).T @ marginal
