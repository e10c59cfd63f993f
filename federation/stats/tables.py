"""A site's 2×2 table as the coordinator receives it: released counts, suppressed ones as ``None``.

The table carries what else the release says that bears on the hidden cells: the participant-flow
totals (analysed, analysed with and without the condition, records read and excluded) and the site's
disclosure policy (minimum cell size and whether zeros may be shown). The pooling functions use the
cells alone; the suppression-aware likelihood (:mod:`federation.stats.suppression`) uses all of it.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

from federation.stats.proportions import _whole_number
from federation.stats.serial import PoolingError

__all__ = ["CELLS", "RANGE_NAMES", "RULES", "ReleasedTable"]

CELLS = ("tp", "fp", "fn", "tn")
RANGE_NAMES = (*CELLS, "positives", "negatives", "analysed")
# The rule that withheld a count, as a release's ``suppressed_by`` map names it (docs/formats.md).
RULES = ("minimum_cell_size", "complementary", "audit", "coarsened")


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
    excluded_names : tuple of str
        The exclusion reasons' count names, in the order of ``excluded`` (the site's rule breaks ties
        between equal counts by name); default ``excluded[0]``, ``excluded[1]``...
    ranges : mapping of str to (int, int)
        For withheld counts (names in ``RANGE_NAMES``): the feasible range the recipient can compute from
        everything the site sent (:mod:`federation.ranges`). Missing = nothing beyond the table bounds it.
    suppressed_by : mapping of str to str
        For withheld counts: the rule that withheld it (``RULES``). Empty when the release does not say:
        the likelihood then infers it from the relations (primary or complementary suppression).
    replayable : bool
        The release holds only the flow and 2×2 tables, is the site's only release to the study, and no
        count was withheld by the audit: the coordinator can replay the site's rule exactly.
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
    excluded_names: tuple[str, ...] = ()
    ranges: Mapping[str, tuple[int, int]] = field(default_factory=dict)
    suppressed_by: Mapping[str, str] = field(default_factory=dict)
    replayable: bool = False

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
        names = tuple(self.excluded_names) or tuple(f"excluded[{i}]" for i in range(len(excluded)))
        if len(names) != len(excluded):
            raise PoolingError(f"site {site!r}: excluded_names must name every exclusion count")
        object.__setattr__(self, "excluded_names", names)
        ranges: dict[str, tuple[int, int]] = {}
        for name, bounds in dict(self.ranges).items():
            low, high = (_whole_number(v) for v in bounds) if len(bounds) == 2 else (None, None)
            if name not in RANGE_NAMES or low is None or high is None or not 0 <= low <= high:
                raise PoolingError(f"site {site!r}: range of {name!r} must be two whole numbers 0 <= low <= high")
            ranges[name] = (low, high)
        object.__setattr__(self, "ranges", ranges)
        rules = dict(self.suppressed_by)
        if any(name not in RANGE_NAMES or rule not in RULES for name, rule in rules.items()):
            raise PoolingError(f"site {site!r}: suppressed_by names a count or rule this tool does not know")
        object.__setattr__(self, "suppressed_by", rules)

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
