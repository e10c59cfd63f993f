"""Agreement with a second reference standard: model × reference × reference2 and Cohen's kappa per pair.

Where a site maps a second reference standard (``[reference2]`` in the mapping), each analysed record
is classified by the model's call at each threshold, the reference standard and the second reference
(present, absent or missing). The release carries the three-way table, the 2×2 table of each pair among
records with both references known, and Cohen's kappa for each pair with its large-sample standard
error (Fleiss, Cohen & Everitt 1969). A kappa is released only when the four cells of its pair table are.

References
----------
Cohen J. A coefficient of agreement for nominal scales. Educ Psychol Meas 1960;20:37-46.
Fleiss JL, Cohen J, Everitt BS. Large sample standard errors of kappa and weighted kappa. Psychol Bull
1969;72:323-327.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet
from ..data import PreparedChunk
from .base import CellPolicy

PAIRS = ("model_reference", "model_reference2", "reference_reference2")
_REF2_STATES = ("1", "0", "missing")


def cohen_kappa(table: np.ndarray) -> tuple[float, float | None] | None:
    """Kappa and its large-sample SE (Fleiss, Cohen & Everitt 1969) for a square table of counts.

    None when kappa is undefined (no records, or both raters use a single category, so p_e = 1).
    """
    counts = np.asarray(table, dtype=np.float64)
    total = counts.sum()
    if total <= 0:
        return None
    p = counts / total
    rows, cols = p.sum(axis=1), p.sum(axis=0)
    observed = float(np.trace(p))
    expected = float(np.sum(rows * cols))
    if expected >= 1.0:
        return None
    kappa = (observed - expected) / (1.0 - expected)
    diagonal = np.diag(p)
    term_a = float(np.sum(diagonal * (1.0 - (rows + cols) * (1.0 - kappa)) ** 2))
    off = p * (cols[:, None] + rows[None, :]) ** 2
    np.fill_diagonal(off, 0.0)
    term_b = (1.0 - kappa) ** 2 * float(off.sum())
    term_c = (kappa - expected * (1.0 - kappa)) ** 2
    variance = (term_a + term_b - term_c) / ((1.0 - expected) ** 2 * total)
    return kappa, (math.sqrt(variance) if variance >= 0 else None)


class Agreement:
    name = "agreement"

    def __init__(self, thresholds: tuple[float, ...]) -> None:
        self.thresholds = tuple(sorted(set(float(t) for t in thresholds)))
        # [threshold, model call (1, 0), reference (1, 0), reference2 (1, 0, missing)]
        self.table = np.zeros((len(self.thresholds), 2, 2, 3), dtype=np.int64)
        self.mapped = False

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        if chunk.reference2 is None:
            return
        self.mapped = True
        reference = 1 - chunk.outcome.astype(np.int64)  # index 0 = present
        second = np.where(chunk.reference2 == 1, 0, np.where(chunk.reference2 == 0, 1, 2))
        for i, threshold in enumerate(self.thresholds):
            call = np.where(scores >= threshold, 0, 1)
            cell = (call * 2 + reference) * 3 + second
            self.table[i] += np.bincount(cell, minlength=12).reshape(2, 2, 3)

    def counts(self, policy: CellPolicy) -> CountSet:
        out = CountSet()
        if not self.mapped:
            return out
        for i, threshold in enumerate(self.thresholds):
            calls = (Condition("score", low=threshold, high=None), Condition("score", low=None, high=threshold))
            outcomes = (POSITIVE, NEGATIVE)
            known = Condition("reference2", ("0", "1"))
            for m in range(2):
                for r in range(2):
                    label = f"agreement[{i}].model{1 - m}_reference{1 - r}"
                    parts = []
                    for s, state in enumerate(_REF2_STATES):
                        name = f"{label}_reference2{state}"
                        out.add(
                            name,
                            self.table[i, m, r, s],
                            ANALYSED,
                            calls[m],
                            outcomes[r],
                            Condition("reference2", (state,)),
                        )
                        parts.append(name)
                    out.add(label, self.table[i, m, r].sum(), ANALYSED, calls[m], outcomes[r])
                    out.relate(label, *parts)
            known_table = self.table[i, :, :, :2]  # reference2 present / absent
            pair_tables = {
                "model_reference": known_table.sum(axis=2),
                "model_reference2": known_table.sum(axis=1),
                "reference_reference2": known_table.sum(axis=0),
            }
            for pair, table in pair_tables.items():
                names = []
                for a in range(2):
                    for b in range(2):
                        name = f"agreement[{i}].{pair}.{1 - a}{1 - b}"
                        first = calls[a] if pair.startswith("model") else outcomes[a]
                        if pair == "model_reference":
                            second = outcomes[b]
                            where = (ANALYSED, first, second, known)
                        else:
                            where = (ANALYSED, first, Condition("reference2", ("1",) if b == 0 else ("0",)))
                        out.add(name, table[a, b], *where)
                        names.append(name)
                self._relate_pair(out, i, pair, names)
                result = cohen_kappa(table)
                if result is not None:
                    rests = frozenset(names)
                    out.derived[f"agreement[{i}].{pair}.kappa"] = (result[0], rests)
                    if result[1] is not None:
                        out.derived[f"agreement[{i}].{pair}.kappa_se"] = (result[1], rests)
                    out.derived[f"agreement[{i}].{pair}.observed_agreement"] = (
                        float(np.trace(table) / table.sum()),
                        rests,
                    )
        return out

    @staticmethod
    def _relate_pair(out: CountSet, i: int, pair: str, names: list[str]) -> None:
        """Each pair cell is a sum of three-way cells (reference2 known)."""
        for name in names:
            a, b = int(name[-2]), int(name[-1])
            if pair == "model_reference":
                parts = [f"agreement[{i}].model{a}_reference{b}_reference2{s}" for s in ("1", "0")]
            elif pair == "model_reference2":
                parts = [f"agreement[{i}].model{a}_reference{r}_reference2{b}" for r in (1, 0)]
            else:
                parts = [f"agreement[{i}].model{m}_reference{a}_reference2{b}" for m in (1, 0)]
            out.relate(name, *parts)

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        if not self.mapped:
            return {"available": False, "reason": "this site maps no second reference standard"}
        tables = []
        for i, threshold in enumerate(self.thresholds):
            cells = []
            for m in (1, 0):
                for r in (1, 0):
                    for state in _REF2_STATES:
                        cells.append(
                            {
                                "model": m,
                                "reference": r,
                                "reference2": None if state == "missing" else int(state),
                                "count": released.get(f"agreement[{i}].model{m}_reference{r}_reference2{state}"),
                            }
                        )
            pairs = {}
            for pair in PAIRS:
                pairs[pair] = {
                    "cells": {f"{a}{b}": released.get(f"agreement[{i}].{pair}.{a}{b}") for a in (1, 0) for b in (1, 0)},
                    "kappa": derived.get(f"agreement[{i}].{pair}.kappa"),
                    "kappa_se": derived.get(f"agreement[{i}].{pair}.kappa_se"),
                    "observed_agreement": derived.get(f"agreement[{i}].{pair}.observed_agreement"),
                }
            names = [n for n in released if n.startswith(f"agreement[{i}].")]
            tables.append(
                {
                    "threshold": threshold,
                    "cells": cells,
                    "pairs": pairs,
                    "suppressed": sorted(n.removeprefix(f"agreement[{i}].") for n in names if released[n] is None),
                }
            )
        return {"available": True, "tables": tables, "kappa_se_method": "Fleiss, Cohen & Everitt 1969"}
