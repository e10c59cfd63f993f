"""Count tables built at the site. Every table is additive over chunks of records."""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np


@dataclass
class ConfusionCounts:
    """TP/FP/FN/TN at each threshold; a record is screen-positive when score ≥ threshold."""

    thresholds: tuple[float, ...]
    counts: np.ndarray = field(init=False)  # [n_thresholds, 4] in the order tp, fp, fn, tn

    def __post_init__(self) -> None:
        self.counts = np.zeros((len(self.thresholds), 4), dtype=np.int64)

    def add(self, scores: np.ndarray, outcome: np.ndarray) -> None:
        diseased = outcome == 1
        n_diseased = int(diseased.sum())
        n_healthy = len(outcome) - n_diseased
        for i, threshold in enumerate(self.thresholds):
            called = scores >= threshold
            tp = int(np.count_nonzero(called & diseased))
            fp = int(np.count_nonzero(called & ~diseased))
            self.counts[i] += (tp, fp, n_diseased - tp, n_healthy - fp)

    def table(self, i: int) -> dict[str, int]:
        tp, fp, fn, tn = (int(v) for v in self.counts[i])
        return {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
