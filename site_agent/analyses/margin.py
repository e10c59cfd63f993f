"""Accuracy by score margin: how often predictions close to the threshold are wrong.

For each threshold t and the request's distances d1 < d2 < ... (bands of |score − t|), positives and
negatives are counted in bands on each side of t:

- called positive (score >= t): t <= score < t+d1, t+d1 <= score < t+d2, ..., score >= t+dm;
- called negative (score < t): t−d1 <= score < t, t−d2 <= score < t−d1, ..., score < t−dm
  (so on this side a band holds distances in (d_j, d_(j+1)]).

On the positive side positives are correct calls and negatives wrong; on the negative side the reverse.
Bands are merged outward from the threshold on each side separately (never across it), until every count
is 0 or at least k (:mod:`site_agent.banding`).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from ..banding import Band, ScoreAxis, bands_at_cuts, intervals, merge_bands
from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy
from .histogram import band_table

DEFAULT_PROBABILITY_DISTANCES = (0.05, 0.1, 0.2)


def written(value: float) -> float:
    """``value`` without binary floating-point noise (0.5 - 0.1 is 0.4, not 0.39999999999999997): the edges
    and distances a release shows are the numbers the coordinator wrote, to 12 significant digits."""
    return float(f"{value:.12g}")


def margin_edges(threshold: float, distances: tuple[float, ...]) -> tuple[float, ...]:
    """Score edges of the margin bands around ``threshold`` (the same floats wherever they are needed)."""
    below = [written(threshold - d) for d in reversed(distances)]
    return (*below, threshold, *(written(threshold + d) for d in distances))


class Margin:
    name = "margin"

    def __init__(
        self,
        thresholds: tuple[float, ...],
        distances: tuple[float, ...],
        axis: ScoreAxis | None = None,
        scope: str | None = None,
    ) -> None:
        self.thresholds = tuple(sorted(set(float(t) for t in thresholds)))
        self.distances = tuple(float(d) for d in distances)
        self.axis = axis  # the release's shared score cuts; None = merge each side alone
        self.scope = scope  # None = the whole site; else the subgroup variable whose level this is
        self.feeds_axis = axis is not None and scope is None and axis.claim_feeder(self)
        self.edges = [self._edges(t) for t in self.thresholds]
        self.tables = [np.zeros((len(e) + 1, 2), dtype=np.int64) for e in self.edges]
        self.sides: list[dict[str, list[Band]]] = []

    def _edges(self, threshold: float) -> tuple[float, ...]:
        return margin_edges(threshold, self.distances)

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        for i, edges in enumerate(self.edges):
            self.tables[i] += band_table(scores, chunk.outcome, edges)
        if self.feeds_axis:
            self.axis.add(chunk, scores)

    def _side_bands(self, i: int, policy: CellPolicy) -> dict[str, list[Band]]:
        table = self.tables[i]  # bands × [positive, negative], in score order
        threshold = self.thresholds[i]
        if self.axis is not None:
            bands = bands_at_cuts(
                self.edges[i], table, self.axis.cuts(policy.min_cell_size, policy.allow_zero, self.scope)
            )
            above = [b for b in bands if b.low is not None and b.low >= threshold]
            below = [b for b in bands if b.high is not None and b.high <= threshold][::-1]
            return {"above": above, "below": below}
        cuts = intervals(self.edges[i])
        half = len(self.distances) + 1
        out: dict[str, list[Band]] = {}
        for side, order in (("above", list(range(half, 2 * half))), ("below", list(range(half - 1, -1, -1)))):
            rows = table[order]  # outward from the threshold
            bands = []
            for start, stop in merge_bands(rows, policy.min_cell_size, policy.allow_zero):
                run = [order[i] for i in range(start, stop)]
                low, high = cuts[min(run)][0], cuts[max(run)][1]
                sums = rows[start:stop].sum(axis=0)
                bands.append(Band(low, high, (int(sums[0]), int(sums[1])), start, stop - 1))
            out[side] = bands
        return out

    def counts(self, policy: CellPolicy) -> CountSet:
        out = CountSet()
        self.sides = []
        for i, threshold in enumerate(self.thresholds):
            sides = self._side_bands(i, policy)
            self.sides.append(sides)
            for side, bands in sides.items():
                for j, band in enumerate(bands):
                    where = Condition("score", low=band.low, high=band.high)
                    out.add(f"margin[{i}].{side}[{j}].positive", band.counts[0], ANALYSED, POSITIVE, where)
                    out.add(f"margin[{i}].{side}[{j}].negative", band.counts[1], ANALYSED, NEGATIVE, where)
            above = Condition("score", low=threshold, high=None)
            below = Condition("score", low=None, high=threshold)
            totals = {"tp": (POSITIVE, above, "above", "positive"), "fp": (NEGATIVE, above, "above", "negative")}
            totals |= {"fn": (POSITIVE, below, "below", "positive"), "tn": (NEGATIVE, below, "below", "negative")}
            for cell, (outcome, where, side, klass) in totals.items():
                name = f"margin[{i}].{cell}"
                value = sum(b.counts[0 if klass == "positive" else 1] for b in sides[side])
                out.add(name, value, ANALYSED, outcome, where)
                out.relate(name, *(f"margin[{i}].{side}[{j}].{klass}" for j in range(len(sides[side]))))
        return out

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> list[dict[str, Any]]:
        tables = []
        for i, threshold in enumerate(self.thresholds):
            entry: dict[str, Any] = {"threshold": threshold}
            for side, label in (("above", "called_positive"), ("below", "called_negative")):
                rows = []
                for j, band in enumerate(self.sides[i][side]):
                    positive = released.get(f"margin[{i}].{side}[{j}].positive")
                    negative = released.get(f"margin[{i}].{side}[{j}].negative")
                    near, far = (band.low, band.high) if side == "above" else (band.high, band.low)
                    rows.append(
                        {
                            "score_low": band.low,
                            "score_high": band.high,
                            "distance_from": None if near is None else written(abs(near - threshold)),
                            "distance_to": None if far is None else written(abs(far - threshold)),
                            "correct": positive if side == "above" else negative,
                            "wrong": negative if side == "above" else positive,
                        }
                    )
                entry[label] = rows
            names = [n for n in released if n.startswith(f"margin[{i}].")]
            entry["suppressed"] = sorted(n.removeprefix(f"margin[{i}].") for n in names if released[n] is None)
            tables.append(entry)
        return tables
