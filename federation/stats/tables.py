"""A site's 2×2 table as the coordinator receives it: released counts, suppressed ones as ``None``.

The table carries what else the release says that bears on the hidden cells: the participant-flow
totals (analysed, analysed with and without the condition, records read and excluded) and the site's
disclosure policy (minimum cell size and whether zeros may be shown). The pooling functions use the
cells alone; the suppression-aware likelihood (:mod:`federation.stats.suppression`) uses all of it.
"""

from __future__ import annotations

from dataclasses import dataclass

from federation.stats.proportions import _whole_number
from federation.stats.serial import PoolingError

__all__ = ["CELLS", "ReleasedTable"]

CELLS = ("tp", "fp", "fn", "tn")


def _count_or_none(value: object, site_id: str, name: str) -> int | None:
    if value is None:
        return None
    count = _whole_number(value)
    if count is None or count < 0:
        raise PoolingError(f"site {site_id!r}: {name} must be a non-negative whole number or None (suppressed)")
    return count


@dataclass(frozen=True)
class ReleasedTable:
    """One site's released 2×2 table at one threshold.

    Attributes
    ----------
    site_id : str
        The site's identifier.
    tp, fp, fn, tn : int or None
        True/false positives and negatives; ``None`` where the cell was suppressed.
    positives, negatives : int or None
        Participants analysed with and without the condition (the flow's ``analysed_positive`` and
        ``analysed_negative``); ``None`` when suppressed or not released.
    analysed, read : int or None
        Participants analysed, and records read, as released in the flow.
    excluded : tuple of (int or None)
        Records excluded, one count per reason, as released (``None`` = suppressed).
    min_cell_size : int or None
        The site policy's minimum cell size ``k``: every released count is 0 or at least ``k``.
        ``None`` when unknown; a table with suppressed cells then cannot be used by the
        suppression-aware likelihood.
    allow_zero : bool
        Whether the policy shows counts of 0 (if not, a suppressed cell may also be 0).
    """

    site_id: str
    tp: int | None
    fp: int | None
    fn: int | None
    tn: int | None
    positives: int | None = None
    negatives: int | None = None
    analysed: int | None = None
    read: int | None = None
    excluded: tuple[int | None, ...] = ()
    min_cell_size: int | None = None
    allow_zero: bool = True

    def __post_init__(self) -> None:
        if not isinstance(self.site_id, str) or not self.site_id:
            raise PoolingError("a released table needs a non-empty site_id")
        site = self.site_id
        for name in (*CELLS, "positives", "negatives", "analysed", "read"):
            object.__setattr__(self, name, _count_or_none(getattr(self, name), site, name))
        excluded = tuple(_count_or_none(v, site, f"excluded[{i}]") for i, v in enumerate(self.excluded))
        object.__setattr__(self, "excluded", excluded)
        if self.min_cell_size is not None:
            k = _whole_number(self.min_cell_size)
            if k is None or k < 1:
                raise PoolingError(f"site {site!r}: min_cell_size must be a whole number of at least 1")
            object.__setattr__(self, "min_cell_size", k)
        if not isinstance(self.allow_zero, bool):
            raise PoolingError(f"site {site!r}: allow_zero must be true or false")

    @classmethod
    def complete(cls, site_id: str, tp: int, fp: int, fn: int, tn: int) -> ReleasedTable:
        """A table with every cell released (margins follow from the cells)."""
        table = cls(site_id, tp, fp, fn, tn)
        return cls(site_id, tp, fp, fn, tn, positives=table.tp + table.fn, negatives=table.fp + table.tn)  # type: ignore[operator]

    @property
    def cells(self) -> tuple[int | None, int | None, int | None, int | None]:
        return (self.tp, self.fp, self.fn, self.tn)

    @property
    def suppressed(self) -> tuple[str, ...]:
        """Names of the suppressed cells, in the order tp, fp, fn, tn."""
        return tuple(name for name, value in zip(CELLS, self.cells, strict=True) if value is None)

    @property
    def is_complete(self) -> bool:
        return not self.suppressed
