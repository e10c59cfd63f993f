"""Counts of positives and negatives per distinct score: the additive summary the ROC and calibration
analyses keep (their released statistics come from their bands), and the Mann–Whitney / DeLong arithmetic on
counts that every banded AUC uses.

Every discrimination and calibration statistic the site releases depends on the records only through the
pairs (score, outcome), so counting them per distinct score is lossless, additive over chunks, and as
small as the number of distinct scores. A points model has few; a probability model may have as many as
records, so the number of distinct keys is capped: past the cap, scores are rounded to a grid (the
resolution stays at the site: it depends on the spread of the records' scores, and no released figure uses
it; ``None`` means exact). :func:`paired_delong` takes complex keys, ``a + 1j·b`` for a record in band ``a``
of one model and band ``b`` of the other (the paired analysis's released joint table).

Mann–Whitney AUC and the DeLong (1988) variance are computed from these counts with ties counted one half,
through placement values (the structural components): for a positive with score x,
V10 = P(negative score < x) + ½ P(= x); for a negative with score y, V01 = P(positive score > y) + ½ P(= y).

References
----------
DeLong ER, DeLong DM, Clarke-Pearson DL. Comparing the areas under two or more correlated receiver
operating characteristic curves: a nonparametric approach. Biometrics 1988;44:837-845.
Hanley JA, McNeil BJ. The meaning and use of the area under a ROC curve. Radiology 1982;143:29-36.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

MAX_KEYS = 250_000


class ScoreHistogram:
    """Sorted distinct score keys with the number of positive and negative records at each."""

    def __init__(self, max_keys: int = MAX_KEYS) -> None:
        self.max_keys = max_keys
        self.keys = np.zeros(0, dtype=np.float64)
        self.positive = np.zeros(0, dtype=np.int64)
        self.negative = np.zeros(0, dtype=np.int64)
        self.resolution: float | None = None  # grid step once the cap forced rounding; None = exact

    @property
    def n_positive(self) -> int:
        return int(self.positive.sum())

    @property
    def n_negative(self) -> int:
        return int(self.negative.sum())

    def add(self, scores: np.ndarray, outcome: np.ndarray) -> None:
        """Count records with ``outcome`` 1 (positive) or 0 (negative) at their score."""
        if len(outcome) == 0:
            return
        keys = self._round(np.asarray(scores, dtype=np.float64))
        diseased = np.asarray(outcome) == 1
        self._merge(keys, diseased.astype(np.int64), (~diseased).astype(np.int64))
        while len(self.keys) > self.max_keys:
            self._coarsen()

    def _merge(self, keys: np.ndarray, positive: np.ndarray, negative: np.ndarray) -> None:
        union, inverse = np.unique(np.concatenate([self.keys, keys]), return_inverse=True)
        weights_pos = np.concatenate([self.positive, positive])
        weights_neg = np.concatenate([self.negative, negative])
        # bincount with integer weights sums in float64: exact below 2**53 records.
        self.positive = np.rint(np.bincount(inverse, weights=weights_pos, minlength=len(union))).astype(np.int64)
        self.negative = np.rint(np.bincount(inverse, weights=weights_neg, minlength=len(union))).astype(np.int64)
        self.keys = union

    def _round(self, keys: np.ndarray) -> np.ndarray:
        if self.resolution is None:
            return keys
        step = self.resolution
        return np.round(keys / step) * step

    def _coarsen(self) -> None:
        """Round every key to a grid ten times coarser (first time: fine enough for ~max_keys/4 points)."""
        span = float(np.ptp(self.keys)) or 1.0
        if self.resolution is None:
            self.resolution = 10.0 ** np.ceil(np.log10(span / max(self.max_keys // 4, 1)))
        else:
            self.resolution *= 10.0
        keys, positive, negative = self._round(self.keys), self.positive, self.negative
        self.keys = np.zeros(0, dtype=keys.dtype)
        self.positive = np.zeros(0, dtype=np.int64)
        self.negative = np.zeros(0, dtype=np.int64)
        self._merge(keys, positive, negative)


def band_table(scores: np.ndarray, outcome: np.ndarray, edges: tuple[float, ...]) -> np.ndarray:
    """Records per band cut by ``edges`` (bands × [positive, negative]), from exact scores.

    Band j holds edge_j <= score < edge_(j+1) (band 0 is below the first edge), as the count definitions say.
    """
    band = np.searchsorted(np.asarray(edges, dtype=np.float64), scores, side="right")
    diseased = np.asarray(outcome) == 1
    size = len(edges) + 1
    return np.column_stack(
        [np.bincount(band[diseased], minlength=size), np.bincount(band[~diseased], minlength=size)]
    ).astype(np.int64)


@dataclass(frozen=True)
class Placements:
    """Per distinct key: placement values of positives (V10) and negatives (V01), and the AUC."""

    auc: float
    v10: np.ndarray
    v01: np.ndarray


def placements(keys: np.ndarray, positive: np.ndarray, negative: np.ndarray) -> Placements | None:
    """Placement values over sorted distinct ``keys``; ``None`` when a class is empty."""
    m, n = int(positive.sum()), int(negative.sum())
    if m == 0 or n == 0:
        return None
    negatives_below = np.cumsum(negative) - negative
    positives_above = m - np.cumsum(positive)
    v10 = (negatives_below + 0.5 * negative) / n
    v01 = (positives_above + 0.5 * positive) / m
    auc = float(np.sum(positive * v10) / m)
    return Placements(auc, v10, v01)


@dataclass(frozen=True)
class AucResult:
    auc: float
    variance: float | None  # DeLong (1988); None with fewer than two records in a class


def mann_whitney_delong(histogram: ScoreHistogram) -> AucResult | None:
    """AUC (Mann–Whitney, ties ½) and its DeLong variance S10/m + S01/n from one model's histogram."""
    found = placements(histogram.keys, histogram.positive, histogram.negative)
    if found is None:
        return None
    m, n = histogram.n_positive, histogram.n_negative
    if m < 2 or n < 2:
        return AucResult(found.auc, None)
    s10 = float(np.sum(histogram.positive * (found.v10 - found.auc) ** 2) / (m - 1))
    s01 = float(np.sum(histogram.negative * (found.v01 - found.auc) ** 2) / (n - 1))
    return AucResult(found.auc, s10 / m + s01 / n)


@dataclass(frozen=True)
class PairedAuc:
    auc: tuple[float, float]
    covariance: np.ndarray  # 2×2 DeLong covariance of (AUC requested model, AUC comparison model)


def paired_delong(histogram: Any) -> PairedAuc | None:
    """Both models' AUCs and their DeLong covariance from joint counts: ``histogram`` has complex ``keys`` (model
    band + 1j × comparison band), ``positive``, ``negative``, ``n_positive`` and ``n_negative``.

    S10[r, s] = Σ over positives (V10_r − AUC_r)(V10_s − AUC_s)/(m − 1), likewise S01 over negatives;
    covariance = S10/m + S01/n (DeLong et al. 1988, section 3).
    """
    m, n = histogram.n_positive, histogram.n_negative
    if m < 2 or n < 2:
        return None
    aucs, v10s, v01s = [], [], []
    for part in ("real", "imag"):
        values = histogram.keys.real if part == "real" else histogram.keys.imag
        distinct, inverse = np.unique(values, return_inverse=True)
        pos = np.bincount(inverse, weights=histogram.positive, minlength=len(distinct))
        neg = np.bincount(inverse, weights=histogram.negative, minlength=len(distinct))
        found = placements(distinct, pos, neg)
        assert found is not None  # both classes are non-empty here
        aucs.append(found.auc)
        v10s.append(found.v10[inverse] - found.auc)
        v01s.append(found.v01[inverse] - found.auc)
    s10 = np.array([[np.sum(histogram.positive * a * b) for b in v10s] for a in v10s]) / (m - 1)
    s01 = np.array([[np.sum(histogram.negative * a * b) for b in v01s] for a in v01s]) / (n - 1)
    return PairedAuc((aucs[0], aucs[1]), s10 / m + s01 / n)
