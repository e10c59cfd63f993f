"""How far a site's AUC can lie from any value, when some of its ROC band counts were withheld.

The AUC of banded scores (Mann–Whitney, a participant with and one without the condition in the same band
counted ½; the site computes it so, docs/formats.md) is, with bands in ascending order of score,

    AUC = (1 / (P N)) · Σ_j n_j · (P − ½ (F(j) + F(j−1)))

where ``n_j`` counts the participants without the condition in band ``j``, ``F(j)`` those with it in bands
``0..j`` (``F(−1) = 0``), and ``P``, ``N`` the two totals. For fixed negatives the AUC falls as every ``F(j)``
rises (participants with the condition moved to lower bands); for fixed positives it rises as the negatives'
cumulative counts rise. So over the tables in which each class's band counts are tied only by their total
and each count lies in an interval, the smallest AUC puts the positives as low as the intervals allow (every
cumulative count at its largest; one table attains them all: each count at its lower end, the rest poured
into the lowest bands first) and the negatives as high; the largest, the reverse. Both are exact for that
set of tables.

A count withheld as "0, or at least k" is two intervals: each choice is tried (at most ``2**MAX_CHOICES``
per class; beyond, the two intervals are replaced by the one that spans them, which can only widen the
bounds). Whatever else a recipient could add (another analysis's counts tied to these bands) can only
narrow the true set of tables, so the bounds hold for it too: the true AUC of the bands lies between them.
"""

from __future__ import annotations

import itertools
from collections.abc import Sequence

import numpy as np

__all__ = ["MAX_CHOICES", "Pieces", "auc_bounds"]

MAX_CHOICES = 10  # "0, or at least k" counts of one class tried both ways (2**10 tables per class at most)

# The whole numbers a count can be: one or more intervals ``(low, high)``, both ends included.
Pieces = Sequence[tuple[int, int]]


def _choices(cells: Sequence[Pieces]) -> list[tuple[np.ndarray, np.ndarray]]:
    """Each way of taking one interval per count: ``(lows, highs)``."""
    split = [j for j, pieces in enumerate(cells) if len(pieces) > 1]
    hull = len(split) > MAX_CHOICES
    options = []
    for pieces in cells:
        if hull or len(pieces) == 1:
            options.append([(min(p[0] for p in pieces), max(p[1] for p in pieces))])
        else:
            options.append(list(pieces))
    out = []
    for choice in itertools.product(*options):
        lows = np.array([low for low, _ in choice], dtype=np.int64)
        highs = np.array([high for _, high in choice], dtype=np.int64)
        out.append((lows, highs))
    return out


def _cumulative(
    lows: np.ndarray, highs: np.ndarray, floor: np.ndarray, ceiling: np.ndarray, largest: bool
) -> np.ndarray | None:
    """The cumulative counts ``F(0..J-1)`` that are all at their largest (or all at their smallest) at once.

    ``F(j) - F(j-1)`` lies in ``lows[j]..highs[j]`` (``F(-1) = 0``) and ``F(j)`` in ``floor[j]..ceiling[j]``
    (the last one the class total). These are difference constraints along a chain; their largest solution
    takes at each ``j`` the tightest bound any anchor sets, reached along the chain from the left (a forward
    sweep) or from the right (a backward sweep), and so does their smallest. ``None`` when none fits.
    """
    n = len(lows)
    forward, backward = np.zeros(n, np.int64), np.zeros(n, np.int64)
    for j in range(n):
        before = 0 if j == 0 else forward[j - 1]
        forward[j] = min(ceiling[j], before + highs[j]) if largest else max(floor[j], before + lows[j])
    for j in range(n - 1, -1, -1):
        if j == n - 1:
            backward[j] = ceiling[j] if largest else floor[j]
        else:
            after = backward[j + 1]
            backward[j] = min(ceiling[j], after - lows[j + 1]) if largest else max(floor[j], after - highs[j + 1])
    found = np.minimum(forward, backward) if largest else np.maximum(forward, backward)
    steps = np.diff(found, prepend=0)
    if np.any(steps < lows) or np.any(steps > highs) or np.any(found < floor) or np.any(found > ceiling):
        return None
    return found


def _extremes(cells: Sequence[Pieces], floor: np.ndarray, ceiling: np.ndarray) -> tuple[np.ndarray, np.ndarray] | None:
    """Per choice of intervals, the class's band counts as low as they go (every cumulative count at its
    largest) and as high (every one at its smallest): one row each."""
    low_rows, high_rows = [], []
    for lows, highs in _choices(cells):
        low = _cumulative(lows, highs, floor, ceiling, largest=True)
        if low is not None:
            high = _cumulative(lows, highs, floor, ceiling, largest=False)
            assert high is not None  # the same constraints: one solution exists, so does the smallest
            low_rows.append(np.diff(low, prepend=0))
            high_rows.append(np.diff(high, prepend=0))
    if not low_rows:
        return None
    return np.array(low_rows, dtype=float), np.array(high_rows, dtype=float)


def _auc(positives: np.ndarray, negatives: np.ndarray, n_positive: int, n_negative: int) -> np.ndarray:
    """The AUC of every pair of a row of ``positives`` and a row of ``negatives`` (bands ascending)."""
    cumulative = np.cumsum(positives, axis=1)
    before = np.hstack([np.zeros((len(positives), 1)), cumulative[:, :-1]])
    weight = n_positive - 0.5 * (cumulative + before)
    return (weight @ negatives.T) / (n_positive * n_negative)


def auc_bounds(
    positive: Sequence[Pieces],
    negative: Sequence[Pieces],
    n_positive: int,
    n_negative: int,
    cumulative: tuple[Sequence[tuple[int, int]], Sequence[tuple[int, int]]] | None = None,
) -> tuple[float, float] | None:
    """The smallest and largest AUC over every table the band counts allow.

    Parameters
    ----------
    positive, negative : sequence of Pieces
        Per band (ascending score), the whole numbers the count of participants with (without) the condition
        can be: ``[(v, v)]`` for a released count; for a withheld one, its feasible range cut by what its rule
        says (``[(1, k - 1)]``; ``[(0, 0), (k, high)]`` for "0, or at least k").
    n_positive, n_negative : int
        The released totals of each class (both at least 1).
    cumulative : pair of sequences of (low, high), optional
        Per class, the range of the count in bands ``0..j`` for each band ``j`` (what other released counts
        say, e.g. a 2×2 table at a band edge); without it, ``0..total``.

    Returns
    -------
    ``(low, high)``, or ``None`` when no table fits (the counts contradict one another) or a total is 0.
    """
    if len(positive) != len(negative) or not positive or n_positive < 1 or n_negative < 1:
        return None
    found = []
    for c, (cells, total) in enumerate(((positive, n_positive), (negative, n_negative))):
        given = cumulative[c] if cumulative is not None else [(0, total)] * len(cells)
        floor = np.array([low for low, _ in given], dtype=np.int64)
        ceiling = np.array([high for _, high in given], dtype=np.int64)
        floor[-1], ceiling[-1] = max(floor[-1], total), min(ceiling[-1], total)
        found.append(_extremes(cells, floor, ceiling))
    if found[0] is None or found[1] is None:
        return None
    (positive_low, positive_high), (negative_low, negative_high) = found[0], found[1]
    low = float(_auc(positive_low, negative_high, n_positive, n_negative).min())
    high = float(_auc(positive_high, negative_low, n_positive, n_negative).max())
    return low, high
