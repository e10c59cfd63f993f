"""Paired comparison of two frozen models on the same participants.

Both models score every analysed record (a record is analysed only if it is valid for both). The release
carries, among the diseased and among the non-diseased:

- the paired 2×2 table of the two models' calls at their thresholds (for the difference in sensitivity and in
  specificity, e.g. McNemar);
- each model's own score bands (like the ROC bands: cut at the requested edges and the threshold, merged until
  every count per class is 0 or at least k; this model's bands are the release's shared score cuts);
- the joint banded table: records by band of this model's score × band of the comparison model's score, on
  coarser bands (unions of each model's own bands; the thresholds need not be among them, so that the small
  discordant cells of the paired 2×2 do not make the joint table's small too) chosen by
  :func:`site_agent.banding.merge_grid` so that every cell per class is 0 or at least k;
- both AUCs with their DeLong (1988) variances, from each model's own released bands; the correlation of the
  two AUCs from the released joint table (the DeLong covariance over its cells divided by the product of its
  two DeLong SEs), times the two SEs, is their covariance; the difference of AUCs with its standard error
  Var(A − B) = Var(A) + Var(B) − 2 Cov(A, B) and 95% normal interval. Records in one band (or cell) are tied,
  ½. Every statistic is a function of released counts only, so it tells a recipient nothing they do not.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from types import SimpleNamespace
from typing import Any

import numpy as np

from ..banding import Band, ScoreAxis, bands_at_cuts, grid_table, intervals, merge_grid, released_groups
from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy
from .histogram import mann_whitney_delong, paired_delong

CLASSES = ("positive", "negative")
STATISTICS = (
    "auc_model",
    "auc_correlation",
    "auc_compare",
    "auc_model_se",
    "auc_compare_se",
    "auc_covariance",
    "auc_difference",
    "auc_difference_se",
    "auc_difference_ci_low",
    "auc_difference_ci_high",
)
Z_95 = 1.959963984540054  # the standard normal's 97.5th percentile (scipy.stats.norm.ppf(0.975))


def band_name(klass: str, which: str, index: int) -> str:
    """The count of records of ``klass`` in band ``index`` of one model's own bands (``model`` or ``compare``)."""
    return f"paired.{klass}.{which}_band[{index}]"


def joint_name(klass: str, row: int, column: int) -> str:
    """The count of records of ``klass`` in this model's band ``row`` and the comparison model's band ``column``."""
    return f"paired.{klass}.joint[{row}][{column}]"


class Paired:
    name = "paired"

    def __init__(
        self,
        threshold: float,
        compare_threshold: float,
        compare_sha256: str,
        edges: Sequence[float] = (),
        compare_edges: Sequence[float] = (),
        axis: ScoreAxis | None = None,
    ) -> None:
        self.threshold = float(threshold)
        self.compare_threshold = float(compare_threshold)
        self.compare_sha256 = compare_sha256
        self.requested = (tuple(float(e) for e in edges), tuple(float(e) for e in compare_edges))
        # This model's threshold is an edge (the release's shared cuts force it). The comparison model's is not:
        # its bands would give the paired 2x2 table's margins, which with this model's (the primary table) pin
        # the small discordant cells, and the audit would then withhold the bands and more.
        self.edges = (
            tuple(sorted({*self.requested[0], self.threshold})),
            tuple(e for e in self.requested[1] if e != self.compare_threshold),
        )
        self.axis = axis  # the release's shared cuts of this model's score (ROC, calibration, margin)
        self.table = np.zeros((2, 2, 2), dtype=np.int64)  # [outcome 1/0, model call 1/0, compare call 1/0]
        self.joint = np.zeros((len(self.edges[0]) + 1, len(self.edges[1]) + 1, 2), dtype=np.int64)
        self.kept: tuple[tuple[float, ...], tuple[float, ...]] = ((), ())  # the joint table's edges
        self.own: tuple[list[Band], list[Band]] = ([], [])  # each model's own merged bands

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        if chunk.compare_scores is None:
            raise ValueError("paired analysis needs the comparison model's scores")
        klass = 1 - chunk.outcome.astype(np.int64)
        model = np.where(scores >= self.threshold, 0, 1)
        compare = np.where(chunk.compare_scores >= self.compare_threshold, 0, 1)
        self.table += np.bincount((klass * 2 + model) * 2 + compare, minlength=8).reshape(2, 2, 2)
        row = np.searchsorted(np.asarray(self.edges[0]), scores, side="right")
        column = np.searchsorted(np.asarray(self.edges[1]), chunk.compare_scores, side="right")
        shape = self.joint.shape
        cell = (row * shape[1] + column) * 2 + klass
        self.joint += np.bincount(cell, minlength=self.joint.size).reshape(shape)

    def counts(self, policy: CellPolicy) -> CountSet:
        allowed = None
        if self.axis is not None:
            allowed = self.axis.cuts(policy.min_cell_size, policy.allow_zero)
        own, kept = merge_grid(
            self.joint,
            self.edges,
            ((self.threshold,), ()),
            policy.min_cell_size,
            policy.allow_zero,
            (allowed, None),
        )
        self.kept = (tuple(sorted(kept[0])), tuple(sorted(kept[1])))  # both empty: no joint table
        self.own = (
            bands_at_cuts(self.edges[0], self.joint.sum(axis=1), own[0]),
            bands_at_cuts(self.edges[1], self.joint.sum(axis=0), own[1]),
        )
        grid = self._grid()
        out = CountSet()
        model_calls = (Condition("score", low=self.threshold), Condition("score", high=self.threshold))
        compare_calls = (
            Condition("score.compare", low=self.compare_threshold),
            Condition("score.compare", high=self.compare_threshold),
        )
        rows, columns = (intervals(self.kept[0]), intervals(self.kept[1])) if self.has_joint else ([], [])
        for k, klass in enumerate(CLASSES):
            outcome = POSITIVE if k == 0 else NEGATIVE
            parts = []
            for a in range(2):
                for b in range(2):
                    name = f"paired.{klass}.model{1 - a}_compare{1 - b}"
                    out.add(name, self.table[k, a, b], ANALYSED, outcome, model_calls[a], compare_calls[b])
                    parts.append(name)
            out.add(f"paired.{klass}", self.table[k].sum(), ANALYSED, outcome)
            out.relate(f"paired.{klass}", *parts)
            for which, variable, bands in (("model", "score", self.own[0]), ("compare", "score.compare", self.own[1])):
                for j, band in enumerate(bands):
                    where = Condition(variable, low=band.low, high=band.high)
                    out.add(band_name(klass, which, j), band.counts[k], ANALYSED, outcome, where)
                out.relate(f"paired.{klass}", *(band_name(klass, which, j) for j in range(len(bands))))
            for i, (low, high) in enumerate(rows):
                for j, (compare_low, compare_high) in enumerate(columns):
                    out.add(
                        joint_name(klass, i, j),
                        grid[i, j, k],
                        ANALYSED,
                        outcome,
                        Condition("score", low=low, high=high),
                        Condition("score.compare", low=compare_low, high=compare_high),
                    )
        # Every statistic from the released joint cells only (records in one cell tied, 1/2): a statistic from
        # record-level scores would be a further fact about the records (docs/threat-model.md, section 0, item 5).
        totals = frozenset({"paired.positive", "paired.negative"})
        for key in STATISTICS:
            out.derived[f"paired.{key}"] = (lambda released, key=key: self._statistic(released, key), totals)
        return out

    def _grid(self) -> np.ndarray:
        return grid_table(self.joint, self.edges, (set(self.kept[0]), set(self.kept[1])))

    @property
    def has_joint(self) -> bool:
        return bool(self.kept[0]) and bool(self.kept[1])

    def released_joint(self, released: dict[str, int | None]) -> np.ndarray | None:
        """The joint table (model bands × comparison bands × [positive, negative]) as released; None when any
        cell is withheld or there is no joint table."""
        if not self.has_joint:
            return None
        shape = (len(self.kept[0]) + 1, len(self.kept[1]) + 1, 2)
        out = np.zeros(shape, dtype=np.int64)
        for k, klass in enumerate(CLASSES):
            for i in range(shape[0]):
                for j in range(shape[1]):
                    value = released.get(joint_name(klass, i, j))
                    if value is None:
                        return None
                    out[i, j, k] = value
        return out

    def _own(self, released: dict[str, int | None], which: int) -> tuple[float, float | None] | None:
        """One model's AUC and DeLong variance from its own released bands (a run of withheld bands is one band,
        as for the ROC bands); None when a class total is withheld or empty."""
        label = ("model", "compare")[which]
        groups = released_groups(
            self.own[which],
            released,
            lambda j: (band_name("positive", label, j), band_name("negative", label, j)),
            ("paired.positive", "paired.negative"),
        )
        if not groups or sum(1 for g in groups if g[2] + g[3] > 0) < 2:
            return None  # one group holds every record: the AUC would only restate the totals
        banded = SimpleNamespace(
            keys=np.arange(len(groups), dtype=np.float64),
            positive=np.array([g[2] for g in groups], dtype=np.int64),
            negative=np.array([g[3] for g in groups], dtype=np.int64),
            n_positive=sum(g[2] for g in groups),
            n_negative=sum(g[3] for g in groups),
        )
        result = mann_whitney_delong(banded)  # type: ignore[arg-type]
        return None if result is None else (result.auc, result.variance)

    def _statistic(self, released: dict[str, int | None], key: str) -> float | None:
        joint = self.released_joint(released)
        values = paired_statistics(
            self._own(released, 0), self._own(released, 1), None if joint is None else joint_correlation(joint)
        )
        return values.get(key)

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        tables: dict[str, Any] = {}
        joint: dict[str, Any] = {}
        for klass, label in (("positive", "diseased"), ("negative", "non_diseased")):
            tables[label] = {
                f"model{a}_compare{b}": released.get(f"paired.{klass}.model{a}_compare{b}")
                for a in (1, 0)
                for b in (1, 0)
            }
            tables[label]["total"] = released.get(f"paired.{klass}")
            joint[label] = [
                [released.get(joint_name(klass, i, j)) for j in range(len(self.kept[1]) + 1)]
                for i in range(len(self.kept[0]) + 1 if self.has_joint else 0)
            ]
        names = [n for n in released if n.startswith("paired.")]
        return {
            "compare_bundle_sha256": self.compare_sha256,
            "threshold": self.threshold,
            "compare_threshold": self.compare_threshold,
            "rule": "model1 = requested model calls positive (score >= threshold); compare1 = comparison model does",
            **tables,
            "edges": {"model": list(self.requested[0]), "compare": list(self.requested[1])},
            "joint_bands": {
                "model": [{"low": low, "high": high} for low, high in intervals(self.kept[0])]
                if self.has_joint
                else [],
                "compare": [{"low": low, "high": high} for low, high in intervals(self.kept[1])]
                if self.has_joint
                else [],
            },
            "model_bands": self._render_bands(released, 0),
            "compare_bands": self._render_bands(released, 1),
            "joint": joint,
            "bands_rule": "band = low <= score < high (null = unbounded); each model's bands merged until each "
            "count is 0 or >= k; joint.<group>[i][j] = records in joint band i of this model's score and joint band "
            "j of the comparison model's, unions of their own bands, merged until each cell is 0 or >= k",
            **{key: derived.get(f"paired.{key}") for key in STATISTICS},
            "method": "Mann-Whitney AUCs and DeLong 1988 variances from each model's released bands; the AUCs' "
            "correlation from the DeLong covariance of the released joint table (records in one band or cell tied, "
            "1/2)",
            "suppressed": sorted(n.removeprefix("paired.") for n in names if released[n] is None),
        }

    def _render_bands(self, released: dict[str, int | None], which: int) -> list[dict[str, Any]]:
        label = ("model", "compare")[which]
        return [
            {
                "low": band.low,
                "high": band.high,
                "positive": released.get(band_name("positive", label, j)),
                "negative": released.get(band_name("negative", label, j)),
                "merged_bands": [band.first, band.last],
            }
            for j, band in enumerate(self.own[which])
        ]


def joint_correlation(joint: np.ndarray) -> float | None:
    """The correlation of the two AUCs from a joint table (model bands × comparison bands × [positive,
    negative]), records in one cell tied (½): DeLong (1988) covariance over the cells divided by the product of
    the two DeLong SEs on the same cells. None when a class has fewer than two records or an SE is 0."""
    table = np.asarray(joint, dtype=np.int64)
    rows, columns = np.meshgrid(np.arange(table.shape[0]), np.arange(table.shape[1]), indexing="ij")
    banded = SimpleNamespace(
        keys=(rows + 1j * columns).ravel(),
        positive=table[..., 0].ravel(),
        negative=table[..., 1].ravel(),
        n_positive=int(table[..., 0].sum()),
        n_negative=int(table[..., 1].sum()),
    )
    result = paired_delong(banded)
    if result is None:
        return None
    cov = result.covariance
    if cov[0, 0] <= 0 or cov[1, 1] <= 0:
        return None
    return float(np.clip(cov[0, 1] / math.sqrt(cov[0, 0] * cov[1, 1]), -1.0, 1.0))


def paired_statistics(
    model: tuple[float, float | None] | None,
    compare: tuple[float, float | None] | None,
    correlation: float | None,
) -> dict[str, float]:
    """The released statistics from each model's (AUC, DeLong variance) and the AUCs' correlation; a
    statistic whose inputs are missing is left out."""
    out: dict[str, float] = {}
    for prefix, found in (("auc_model", model), ("auc_compare", compare)):
        if found is not None:
            out[prefix] = float(found[0])
            if found[1] is not None:
                out[f"{prefix}_se"] = math.sqrt(max(float(found[1]), 0.0))
    if model is None or compare is None:
        return out
    out["auc_difference"] = float(model[0] - compare[0])
    if correlation is None or "auc_model_se" not in out or "auc_compare_se" not in out:
        return out
    covariance = correlation * out["auc_model_se"] * out["auc_compare_se"]
    difference_se = math.sqrt(max(out["auc_model_se"] ** 2 + out["auc_compare_se"] ** 2 - 2 * covariance, 0.0))
    out.update(
        auc_correlation=correlation,
        auc_covariance=covariance,
        auc_difference_se=difference_se,
        auc_difference_ci_low=out["auc_difference"] - Z_95 * difference_se,
        auc_difference_ci_high=out["auc_difference"] + Z_95 * difference_se,
    )
    return out
