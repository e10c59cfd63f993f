"""ROC: positives and negatives per score band (merged to be safe), with the site's AUC and DeLong SE.

The bands are cut at the edges the request gives (band j = edge_j <= score < edge_(j+1)) and merged by
:mod:`site_agent.banding` until every per-class count is 0 or at least k. The AUC (Mann–Whitney, records in
the same band tied, ½) and its DeLong (1988) standard error are computed from the released band counts
only, so they tell a recipient nothing the bands do not (a statistic from record-level scores would be a
further fact about the records); a run of bands with withheld counts counts as one band (its counts are the
totals minus the others), and both are released only when the class totals are and at least two groups
remain (a single group ties every record: its "AUC" of 0.5 with SE 0 would describe the suppression, not the
model). Finer bands give an AUC
closer to the one from individual scores.
"""

from __future__ import annotations

import math
from types import SimpleNamespace
from typing import Any

import numpy as np

from ..banding import Band, ScoreAxis, bands_at_cuts, merged_bands, released_groups
from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy
from .histogram import ScoreHistogram, band_table, mann_whitney_delong

DEFAULT_PROBABILITY_EDGES = tuple(round(0.05 * j, 2) for j in range(1, 20))


class Roc:
    name = "roc"

    def __init__(self, edges: tuple[float, ...], axis: ScoreAxis | None = None, scope: str | None = None) -> None:
        self.edges = tuple(float(e) for e in edges)
        self.axis = axis  # the release's shared score cuts; None = merge these bands alone
        self.scope = scope  # None = the whole site; else the subgroup variable whose level this is
        self.feeds_axis = axis is not None and scope is None and axis.claim_feeder(self)
        self.histogram = ScoreHistogram()
        self.table = np.zeros((len(self.edges) + 1, 2), dtype=np.int64)
        self.bands: list[Band] = []

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        self.histogram.add(scores, chunk.outcome)
        self.table += band_table(scores, chunk.outcome, self.edges)
        if self.feeds_axis:
            self.axis.add(chunk, scores)

    def counts(self, policy: CellPolicy) -> CountSet:
        if self.axis is not None:
            self.bands = bands_at_cuts(
                self.edges, self.table, self.axis.cuts(policy.min_cell_size, policy.allow_zero, self.scope)
            )
        else:
            self.bands = merged_bands(self.edges, self.table, policy.min_cell_size, policy.allow_zero)
        out = CountSet()
        for j, band in enumerate(self.bands):
            where = Condition("score", low=band.low, high=band.high)
            out.add(f"roc.band[{j}].positive", band.counts[0], ANALYSED, POSITIVE, where)
            out.add(f"roc.band[{j}].negative", band.counts[1], ANALYSED, NEGATIVE, where)
        out.add("roc.positive", self.histogram.n_positive, ANALYSED, POSITIVE)
        out.add("roc.negative", self.histogram.n_negative, ANALYSED, NEGATIVE)
        out.relate("roc.positive", *(f"roc.band[{j}].positive" for j in range(len(self.bands))))
        out.relate("roc.negative", *(f"roc.band[{j}].negative" for j in range(len(self.bands))))
        # The AUC and its DeLong SE from the released band counts only (ties within a band count 1/2), so they
        # tell a recipient nothing the bands do not; a run of bands with withheld counts is one group.
        totals = frozenset({"roc.positive", "roc.negative"})
        out.derived["roc.auc"] = (lambda released: self._banded(released, 0), totals)
        out.derived["roc.auc_se"] = (lambda released: self._banded(released, 1), totals)
        return out

    def _banded(self, released: dict[str, int | None], which: int) -> float | None:
        groups = released_groups(
            self.bands,
            released,
            lambda j: (f"roc.band[{j}].positive", f"roc.band[{j}].negative"),
            ("roc.positive", "roc.negative"),
        )
        if not groups or len(groups) < 2:  # one group (every band withheld or merged): all tied, no AUC to tell
            return None
        banded = SimpleNamespace(
            keys=np.arange(len(groups), dtype=np.float64),
            positive=np.array([g[2] for g in groups], dtype=np.int64),
            negative=np.array([g[3] for g in groups], dtype=np.int64),
            n_positive=sum(g[2] for g in groups),
            n_negative=sum(g[3] for g in groups),
        )
        result = mann_whitney_delong(banded)  # type: ignore[arg-type]
        if result is None:
            return None
        if which == 0:
            return result.auc
        return None if result.variance is None else math.sqrt(result.variance)

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        bands = []
        for j, band in enumerate(self.bands):
            bands.append(
                {
                    "low": band.low,
                    "high": band.high,
                    "positive": released.get(f"roc.band[{j}].positive"),
                    "negative": released.get(f"roc.band[{j}].negative"),
                    "merged_bands": [band.first, band.last],
                }
            )
        suppressed = [
            name.removeprefix("roc.")
            for name in [*(f"roc.band[{j}].{c}" for j in range(len(self.bands)) for c in ("positive", "negative"))]
            + ["roc.positive", "roc.negative"]
            if released.get(name) is None
        ]
        return {
            "edges": list(self.edges),
            "rule": "band = low <= score < high (null = unbounded); adjacent bands merged until each count "
            "is 0 or >= k",
            "bands": bands,
            "positive": released.get("roc.positive"),
            "negative": released.get("roc.negative"),
            "auc": derived.get("roc.auc"),
            "auc_se": derived.get("roc.auc_se"),
            "method": "Mann-Whitney AUC (records in one band tied, 1/2), DeLong 1988 standard error, from the released "
            "band counts",
            "suppressed": suppressed,
        }
