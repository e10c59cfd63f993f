"""A simulated 2×2 withheld as a site would: primary suppression, then complementary by structure."""

from __future__ import annotations

from federation.stats.serial import PoolingError
from federation.stats.tables import ReleasedTable

# Relations between the counts of one 2×2 release (total, parts), in the order a site checks them.
_RELATIONS = (("analysed", ("positives", "negatives")), ("positives", ("tp", "fn")), ("negatives", ("fp", "tn")))
_TOTALS = frozenset(total for total, _ in _RELATIONS)


def withhold_table(
    site_id: str, tp: int, fp: int, fn: int, tn: int, min_cell_size: int, allow_zero: bool = True
) -> ReleasedTable:
    """The 2×2 table as a site's minimum-cell-size rule would release it.

    Primary suppression withholds every count in 1..k−1 (and 0 when zeros may not be shown); secondary
    suppression then withholds, in each relation (analysed = with + without the condition; with the
    condition = TP + FN; without = FP + TN) that has exactly one withheld member, one more shown member,
    chosen without looking at values — a part before the total, a leaf before a count that is itself a
    total, then by name — until none is left with one. This is the rule
    the site agent applies to the 2×2 and the flow; the site's disclosure audit across earlier releases may
    withhold more, which a plan cannot foresee.

    Parameters
    ----------
    site_id : str
    tp, fp, fn, tn : int
        The full table.
    min_cell_size : int
        The site policy's minimum cell size k (>= 1).
    allow_zero : bool, default True

    Returns
    -------
    ReleasedTable
        With ``None`` for each withheld count, the released margins and the policy's rule, ready for the
        censored likelihood.

    References
    ----------
    Hundepool A, et al. (2012). Statistical Disclosure Control. Wiley, ch. 4.
    """
    if isinstance(min_cell_size, bool) or not isinstance(min_cell_size, int) or min_cell_size < 1:
        raise PoolingError("min_cell_size must be a whole number of at least 1")
    counts = {"tp": int(tp), "fp": int(fp), "fn": int(fn), "tn": int(tn)}
    if min(counts.values()) < 0:
        raise PoolingError(f"site {site_id!r}: counts must be non-negative")
    counts["positives"] = counts["tp"] + counts["fn"]
    counts["negatives"] = counts["fp"] + counts["tn"]
    counts["analysed"] = counts["positives"] + counts["negatives"]
    withheld = {
        name for name, value in counts.items() if (0 < value < min_cell_size) or (value == 0 and not allow_zero)
    }
    changed = True
    while changed:
        changed = False
        for total, parts in _RELATIONS:
            members = (total, *parts)
            hidden = [m for m in members if m in withheld]
            shown = [m for m in members if m not in withheld]
            if len(hidden) == 1 and shown:
                # The site's value-free order: a part before the total, a leaf before a count that is itself a
                # total, then the name (site_agent/disclosure.py).
                withheld.add(min(shown, key=lambda m: (m == total, m in _TOTALS, m)))
                changed = True
    released = {name: (None if name in withheld else value) for name, value in counts.items()}
    return ReleasedTable(
        site_id,
        released["tp"],
        released["fp"],
        released["fn"],
        released["tn"],
        positives=released["positives"],
        negatives=released["negatives"],
        analysed=released["analysed"],
        min_cell_size=min_cell_size,
        allow_zero=allow_zero,
    )
