"""Paired comparison of two frozen models on the same participants.

Both models score every analysed record (a record is analysed only if it is valid for both). The
release carries, among the diseased and among the non-diseased, the paired 2×2 table of the two models'
calls (for the difference in sensitivity and in specificity, e.g. McNemar), and both AUCs with their
DeLong (1988) variances and covariance, so the difference of AUCs has a standard error that accounts for
the pairing: Var(A − B) = Var(A) + Var(B) − 2 Cov(A, B).
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy
from .histogram import ScoreHistogram, paired_delong

CLASSES = ("positive", "negative")


class Paired:
    name = "paired"

    def __init__(self, threshold: float, compare_threshold: float, compare_sha256: str) -> None:
        self.threshold = float(threshold)
        self.compare_threshold = float(compare_threshold)
        self.compare_sha256 = compare_sha256
        self.table = np.zeros((2, 2, 2), dtype=np.int64)  # [outcome 1/0, model call 1/0, compare call 1/0]
        self.histogram = ScoreHistogram(paired=True)

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        if chunk.compare_scores is None:
            raise ValueError("paired analysis needs the comparison model's scores")
        klass = 1 - chunk.outcome.astype(np.int64)
        model = np.where(scores >= self.threshold, 0, 1)
        compare = np.where(chunk.compare_scores >= self.compare_threshold, 0, 1)
        self.table += np.bincount((klass * 2 + model) * 2 + compare, minlength=8).reshape(2, 2, 2)
        self.histogram.add(scores, chunk.outcome, chunk.compare_scores)

    def counts(self, policy: CellPolicy) -> CountSet:
        out = CountSet()
        model_calls = (Condition("score", low=self.threshold), Condition("score", high=self.threshold))
        compare_calls = (
            Condition("score.compare", low=self.compare_threshold),
            Condition("score.compare", high=self.compare_threshold),
        )
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
        totals = frozenset({"paired.positive", "paired.negative"})
        result = paired_delong(self.histogram)
        if result is not None:
            cov = result.covariance
            difference_variance = cov[0, 0] + cov[1, 1] - 2 * cov[0, 1]
            values = {
                "auc_model": result.auc[0],
                "auc_compare": result.auc[1],
                "auc_model_se": math.sqrt(max(cov[0, 0], 0.0)),
                "auc_compare_se": math.sqrt(max(cov[1, 1], 0.0)),
                "auc_covariance": float(cov[0, 1]),
                "auc_difference": result.auc[0] - result.auc[1],
                "auc_difference_se": math.sqrt(max(difference_variance, 0.0)),
            }
            for key, value in values.items():
                out.derived[f"paired.{key}"] = (float(value), totals)
        return out

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        tables = {}
        for klass, label in (("positive", "diseased"), ("negative", "non_diseased")):
            tables[label] = {
                f"model{a}_compare{b}": released.get(f"paired.{klass}.model{a}_compare{b}")
                for a in (1, 0)
                for b in (1, 0)
            }
            tables[label]["total"] = released.get(f"paired.{klass}")
        keys = ("auc_model", "auc_compare", "auc_model_se", "auc_compare_se", "auc_covariance")
        keys += ("auc_difference", "auc_difference_se")
        names = [n for n in released if n.startswith("paired.")]
        return {
            "compare_bundle_sha256": self.compare_sha256,
            "threshold": self.threshold,
            "compare_threshold": self.compare_threshold,
            "rule": "model1 = requested model calls positive (score >= threshold); compare1 = comparison model does",
            **tables,
            **{key: derived.get(f"paired.{key}") for key in keys},
            "method": "paired DeLong 1988 covariance from counts per distinct pair of scores",
            "score_resolution": self.histogram.resolution,
            "suppressed": sorted(n.removeprefix("paired.") for n in names if released[n] is None),
        }
