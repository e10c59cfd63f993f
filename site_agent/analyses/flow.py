"""Participant flow: records read, excluded by reason, analysed (by reference-standard outcome)."""

from __future__ import annotations

from collections import Counter
from typing import Any

import numpy as np

from ..counts import ANALYSED, NEGATIVE, POSITIVE, CountSet, excluded
from ..data import EXCLUSION_REASONS, PreparedChunk
from .base import CellPolicy


class Flow:
    name = "flow"

    def __init__(self, reasons: tuple[str, ...] = EXCLUSION_REASONS) -> None:
        self.reasons = reasons
        self.read = 0
        self.positive = 0
        self.negative = 0
        self.excluded: Counter[str] = Counter({reason: 0 for reason in reasons})
        self.flagged: Counter[tuple[str, str]] = Counter()  # (reason, feature): for the site's own messages only

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        self.read += chunk.read
        self.excluded.update(chunk.excluded)
        self.flagged.update(chunk.flagged)
        diseased = int(chunk.outcome.sum())
        self.positive += diseased
        self.negative += len(chunk.outcome) - diseased

    def counts(self, policy: CellPolicy) -> CountSet:
        out = CountSet()
        out.add("flow.read", self.read)
        out.add("flow.analysed", self.positive + self.negative, ANALYSED)
        out.add("flow.analysed_positive", self.positive, ANALYSED, POSITIVE)
        out.add("flow.analysed_negative", self.negative, ANALYSED, NEGATIVE)
        for reason in self.reasons:
            out.add(f"flow.excluded.{reason}", self.excluded[reason], excluded(reason))
        out.relate("flow.read", "flow.analysed", *(f"flow.excluded.{r}" for r in self.reasons))
        out.relate("flow.analysed", "flow.analysed_positive", "flow.analysed_negative")
        return out

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        names = ["flow.read", "flow.analysed", "flow.analysed_positive", "flow.analysed_negative"]
        names += [f"flow.excluded.{r}" for r in self.reasons]
        return {
            "read": released["flow.read"],
            "analysed": released["flow.analysed"],
            "analysed_positive": released["flow.analysed_positive"],
            "analysed_negative": released["flow.analysed_negative"],
            "excluded": {r: released[f"flow.excluded.{r}"] for r in self.reasons},
            "suppressed": sorted(n.removeprefix("flow.") for n in names if released[n] is None),
        }
