"""Small helpers for feeding analyses directly (no source, no model)."""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass

import numpy as np

from site_agent.data import PreparedChunk


@dataclass(frozen=True)
class Policy:
    min_cell_size: int = 1
    allow_zero: bool = True


def chunk(
    outcome: np.ndarray, reference2: np.ndarray | None = None, compare: np.ndarray | None = None
) -> PreparedChunk:
    outcome = np.asarray(outcome, dtype=np.int8)
    return PreparedChunk(
        inputs=np.zeros((len(outcome), 0), dtype=np.float32),
        outcome=outcome,
        read=len(outcome),
        excluded=Counter(),
        reference2=None if reference2 is None else np.asarray(reference2, dtype=np.int8),
        compare_scores=None if compare is None else np.asarray(compare, dtype=np.float64),
    )


def feed(analysis, scores: np.ndarray, outcome: np.ndarray, pieces: int = 1, **extra: np.ndarray):
    """Add the records to ``analysis`` in ``pieces`` consecutive chunks."""
    for part in np.array_split(np.arange(len(outcome)), pieces):
        sliced = {k: v[part] for k, v in extra.items()}
        analysis.add(chunk(outcome[part], sliced.get("reference2"), sliced.get("compare")), scores[part])
    return analysis


def statistics(counts) -> dict:  # noqa: ANN001
    """The derived statistics of a CountSet with every count released (a statistic given as a function of
    the released counts is evaluated on them)."""
    return {n: (v(counts.values) if callable(v) else v) for n, (v, _) in counts.derived.items()}
