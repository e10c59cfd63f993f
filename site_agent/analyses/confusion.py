"""The 2×2 table (TP, FP, FN, TN) at one or more thresholds; screen-positive when score ≥ threshold."""

from __future__ import annotations

from typing import Any

import numpy as np

from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy

CELLS = ("tp", "fp", "fn", "tn")


class Confusion:
    name = "confusion"

    def __init__(self, thresholds: tuple[float, ...]) -> None:
        # The first threshold the request lists is its primary result (``confusion[0]``, kept last when cells must
        # be withheld); the others follow in increasing order.
        primary = thresholds[0] if thresholds else None
        self.thresholds = tuple([primary] if primary is not None else []) + tuple(sorted(set(thresholds) - {primary}))
        self.table = np.zeros((len(self.thresholds), 4), dtype=np.int64)

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        diseased = chunk.outcome == 1
        n_diseased = int(diseased.sum())
        n_healthy = len(chunk.outcome) - n_diseased
        for i, threshold in enumerate(self.thresholds):
            called = scores >= threshold
            tp = int(np.count_nonzero(called & diseased))
            fp = int(np.count_nonzero(called & ~diseased))
            self.table[i] += (tp, fp, n_diseased - tp, n_healthy - fp)

    def counts(self, policy: CellPolicy) -> CountSet:
        out = CountSet()
        for i, threshold in enumerate(self.thresholds):
            above = Condition("score", low=threshold, high=None)
            below = Condition("score", low=None, high=threshold)
            tp, fp, fn, tn = (int(v) for v in self.table[i])
            out.add(f"confusion[{i}].tp", tp, ANALYSED, POSITIVE, above)
            out.add(f"confusion[{i}].fp", fp, ANALYSED, NEGATIVE, above)
            out.add(f"confusion[{i}].fn", fn, ANALYSED, POSITIVE, below)
            out.add(f"confusion[{i}].tn", tn, ANALYSED, NEGATIVE, below)
            out.relate("flow.analysed_positive", f"confusion[{i}].tp", f"confusion[{i}].fn")
            out.relate("flow.analysed_negative", f"confusion[{i}].fp", f"confusion[{i}].tn")
        return out

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> list[dict[str, Any]]:
        tables = []
        for i, threshold in enumerate(self.thresholds):
            cells = {c: released[f"confusion[{i}].{c}"] for c in CELLS}
            tables.append(
                {"threshold": threshold, "cells": cells, "suppressed": [c for c in CELLS if cells[c] is None]}
            )
        return tables
