"""Minimum-cell-size suppression of the counts in one release.

Primary suppression hides every count in 1..k−1 (and 0 when the policy does not allow zeros). Secondary
suppression then hides more counts so that no suppressed count can be recomputed from an additive
relation whose other members are released (a total and its parts: records read = analysed + excluded;
analysed = positives + negatives; positives = TP + FN; negatives = FP + TN). It picks, each time, the
smallest released member of the relation, so the fewest and smallest counts are lost.

Released counts are never changed: a count is either released exactly or replaced by ``None``.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass


@dataclass(frozen=True)
class Relation:
    """``total`` equals the sum of ``parts`` (names of counts in the same release)."""

    total: str
    parts: tuple[str, ...]

    @property
    def members(self) -> tuple[str, ...]:
        return (self.total, *self.parts)


def is_unsafe(count: int, min_cell_size: int, allow_zero: bool) -> bool:
    return (0 < count < min_cell_size) or (count == 0 and not allow_zero)


def suppress(
    counts: Mapping[str, int],
    relations: Sequence[Relation],
    min_cell_size: int,
    allow_zero: bool = True,
) -> tuple[dict[str, int | None], frozenset[str]]:
    """Return (released counts with ``None`` for suppressed ones, the set of suppressed names)."""
    for relation in relations:
        for name in relation.members:
            if name not in counts:
                raise KeyError(f"relation names unknown count {name!r}")
    suppressed = {name for name, value in counts.items() if is_unsafe(value, min_cell_size, allow_zero)}
    changed = True
    while changed:
        changed = False
        for relation in relations:
            hidden = [m for m in relation.members if m in suppressed]
            if len(hidden) != 1:
                continue
            shown = [m for m in relation.members if m not in suppressed]
            if not shown:
                continue
            # Prefer a part over the total, a non-zero count over a zero, then the smallest count.
            choice = min(shown, key=lambda m: (m == relation.total, counts[m] == 0, counts[m], m))
            suppressed.add(choice)
            changed = True
    released = {name: (None if name in suppressed else value) for name, value in counts.items()}
    return released, frozenset(suppressed)
