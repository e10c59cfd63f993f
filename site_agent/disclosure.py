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
from typing import Any

from .counts import CountSet, Relation


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


@dataclass(frozen=True)
class Protected:
    """What disclosure control lets through: counts (None = suppressed) and derived statistics."""

    released: dict[str, int | None]
    suppressed: frozenset[str]
    derived: dict[str, Any]

    def facts(self, counts: CountSet) -> list[dict[str, Any]]:
        """Definitions of every count, with the value only where it was released (for the audit)."""
        return [{**counts.definitions[name].to_dict(), "value": self.released[name]} for name in sorted(counts.values)]


def protect(counts: CountSet, policy: Any) -> Protected:
    """Apply the site policy (``min_cell_size``, ``allow_zero``) to one analysis' counts."""
    released, hidden = suppress(counts.values, counts.relations, policy.min_cell_size, policy.allow_zero)
    derived = {name: value for name, (value, rests_on) in counts.derived.items() if not (rests_on & hidden)}
    return Protected(released, hidden, derived)
