r"""What a release with suppressed counts still says about a site's 2×2 table.

The site's disclosure rule (docs: DESIGN.md, "Disclosure control") releases every count exactly or
hides it. A hidden count is either **primary** — it lay in :math:`P = [1, k-1]` (or :math:`[0, k-1]`
when the policy hides zeros), :math:`k` the minimum cell size — or **secondary**: hidden so that a
primary one cannot be recomputed from a total and its parts. The additive relations are

    records read = analysed + excluded (one count per reason)
    analysed     = with the condition (n1) + without it (n0)
    n1           = TP + FN,        n0 = FP + TN.

Secondary suppression fires in a relation when exactly one of its members is hidden and then hides
one more *part* (never the total). So, in every relation: at most one hidden part lies outside P; if
one does, exactly one hidden member lies in P, or none does and the total was itself hidden by the
relation above it; and a relation never ends with exactly one hidden member. These conditions are
necessary for any table the rule could have produced, so the set of tables they allow always
contains the true one; they do not assume which released member the rule picks, so the set can be a
little larger than the truth requires (the likelihood is then slightly less informative, never wrong).

For the likelihood, the total analysed :math:`N` is taken as given when released, and otherwise every
value the rules allow is given equal weight; the split :math:`n_1 \mid N` has the prevalence
integrated out under a uniform prior, :math:`P(n_1 \mid N) = 1/(N+1)` (the beta-binomial with
:math:`a = b = 1`); given the margins, TP and FP are binomial in sensitivity and false-positive rate.
A site's evidence is therefore a weighted list of blocks :math:`(w, n_1, T, n_0, F)`: margins and the
sets of TP and FP values the rules allow, and

.. math:: L(\mathrm{Se}, \mathrm{FPR}) = \sum_b w_b \sum_{t \in T_b} \mathrm{Bin}(t; n_{1b}, \mathrm{Se})
          \sum_{f \in F_b} \mathrm{Bin}(f; n_{0b}, \mathrm{FPR}).

References
----------
Hutchison D, et al. (2001). Statistical Disclosure Control (Hundepool A et al., eds., 2012,
Wiley), ch. 4 (primary and secondary cell suppression). Berger JO, Liseo B, Wolpert RL (1999).
Integrated likelihood methods for eliminating nuisance parameters. Stat Sci 14:1–28.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np
from numpy.typing import NDArray

from federation.stats.serial import PoolingError
from federation.stats.tables import ReleasedTable

__all__ = ["SiteEvidence", "site_evidence"]

_MAX_BLOCKS = 5000  # far above what the rules allow for any k a policy uses; guards against misuse


@dataclass(frozen=True, eq=False)
class SiteEvidence:
    """The likelihood terms one site contributes: blocks of (weight, margins, allowed TP and FP values)."""

    site_id: str
    weights: NDArray[np.float64]
    positives: NDArray[np.int64]
    negatives: NDArray[np.int64]
    tp_values: tuple[NDArray[np.int64], ...]
    fp_values: tuple[NDArray[np.int64], ...]
    censored: bool = field(default=False)

    @property
    def n_blocks(self) -> int:
        return int(self.weights.size)

    def allows(self, tp: int, fp: int, fn: int, tn: int) -> bool:
        """Whether the full table (tp, fp, fn, tn) is one the evidence allows (used by tests)."""
        for b in range(self.n_blocks):
            if self.positives[b] == tp + fn and self.negatives[b] == fp + tn:
                return bool(np.isin(tp, self.tp_values[b]) and np.isin(fp, self.fp_values[b]))
        return False


def _relation_ok(n_primary: int, nonprimary_parts: int, total_hidden_secondary: bool) -> bool:
    """The conditions above, for one relation, given which hidden members lie in P."""
    if nonprimary_parts > 1:
        return False
    if nonprimary_parts == 1:
        return n_primary == 1 or (n_primary == 0 and total_hidden_secondary)
    if n_primary == 1 and not total_hidden_secondary:
        return False  # a single hidden member: the rule would have hidden one more
    return not (n_primary == 0 and total_hidden_secondary)


class _Rules:
    def __init__(self, table: ReleasedTable) -> None:
        assert table.min_cell_size is not None
        self.k = table.min_cell_size
        self.low = 1 if table.allow_zero else 0

    def primary(self, value: int) -> bool:
        return self.low <= value <= self.k - 1

    def candidates(self, total: int) -> list[int]:
        """Values of one of two hidden parts summing to ``total``: at least one of them lies in P."""
        near = set(range(0, min(self.k, total + 1)))
        near.update(range(max(0, total - self.k + 1), total + 1))
        return sorted(near)

    def split_ok(self, total: int, total_hidden: bool, parts: list[tuple[int, bool]]) -> bool:
        """Check a relation: total and its parts as (value, hidden)."""
        n_primary = int(total_hidden and self.primary(total))
        nonprimary = 0
        for value, hidden in parts:
            if hidden:
                if self.primary(value):
                    n_primary += 1
                else:
                    nonprimary += 1
        return _relation_ok(n_primary, nonprimary, total_hidden and not self.primary(total))


def _released_consistent(table: ReleasedTable, rules: _Rules) -> None:
    released = [
        v for v in (*table.cells, table.positives, table.negatives, table.analysed, table.read) if v is not None
    ]
    released += [v for v in table.excluded if v is not None]
    if any(rules.primary(v) for v in released):
        raise PoolingError(
            f"site {table.site_id!r}: a released count lies below the release's own minimum cell size; "
            "the release contradicts its policy"
        )


def _analysed_candidates(table: ReleasedTable, rules: _Rules, loose: bool = False) -> list[int]:
    """Values of the total analysed that the release and the read = analysed + excluded relation allow."""
    if table.analysed is not None:
        return [table.analysed]
    if "analysed" in table.ranges and (loose or table.suppressed_by):
        low, high = table.ranges["analysed"]
        return list(range(low, high + 1))
    margins = None
    if table.positives is not None and table.negatives is not None:
        margins = table.positives + table.negatives
    flow_known = table.read is not None or bool(table.excluded)
    if not flow_known:
        if margins is None:
            raise PoolingError(
                f"site {table.site_id!r}: the total analysed and the margins are suppressed and no records-read "
                "count was released, so nothing bounds the table"
            )
        return [margins]
    known = sum(v for v in table.excluded if v is not None)
    hidden = sum(1 for v in table.excluded if v is None)
    # A hidden records-read count has no relation above it, so only primary suppression can hide it.
    reads = [table.read] if table.read is not None else list(range(rules.low, rules.k))
    if margins is not None:
        pool = {margins}
    else:
        pool = set()
        for read in reads:
            top = read - known
            pool.update(range(0, min(rules.k, top + 1)))  # the total analysed itself was primary
            pool.update(range(max(0, top - hidden * (rules.k - 1)), top + 1))  # every hidden exclusion was
    return [
        n for n in sorted(pool) if any(_read_relation_ok(r, table.read is None, n, known, hidden, rules) for r in reads)
    ]


def _read_relation_ok(read: int, read_hidden: bool, analysed: int, known: int, hidden: int, rules: _Rules) -> bool:
    """Whether some values of the hidden exclusion counts complete read = analysed + excluded."""
    rest = read - known - analysed
    if rest < 0:
        return False
    analysed_primary = rules.primary(analysed)
    for in_p in range(hidden + 1):
        others = hidden - in_p  # hidden exclusion counts outside P (secondary)
        if others > 1:
            continue
        low, high = in_p * rules.low, in_p * (rules.k - 1)
        if others == 0:
            fits = low <= rest <= high
        else:  # the secondary one is 0 (only where zeros may be shown) or at least k
            fits = (rules.low == 1 and low <= rest <= high) or rest - rules.k >= low
        n_primary = int(read_hidden) + int(analysed_primary) + in_p
        if fits and _relation_ok(n_primary, others + int(not analysed_primary), False):
            return True
    return False


# --- the rule, replayed --------------------------------------------------------------------------------


def _choice_key(name: str, is_total: bool, totals: frozenset[str] | set[str]) -> tuple[int, bool, bool, str]:
    """The site's order for complementary suppression, which never looks at a value: the count that matters
    least to the primary table (records read and exclusions before the 2x2 cells and analysed totals), a
    part before the total, a leaf before a count that is some relation's total, then the name
    (site_agent/disclosure.py ``_secondary``, the documented rule)."""
    rank = 1 if name == "flow.read" or name.startswith("flow.excluded.") else 2
    return (rank, is_total, name in totals, name)


def _replay(
    members: dict[str, int],
    relations: list[tuple[str, tuple[str, ...]]],
    unsafe: set[str],
    totals: frozenset[str] = frozenset(),
) -> set[str]:
    """Primary then complementary suppression of a small system of relations, as the site applies it."""
    totals = totals | {total for total, _ in relations}
    hidden = set(unsafe)
    changed = True
    while changed:
        changed = False
        for total, parts in relations:
            names = (total, *parts)
            if sum(n in hidden for n in names) != 1:
                continue
            shown = [n for n in names if n not in hidden]
            if not shown:
                continue
            hidden.add(min(shown, key=lambda n, t=total: _choice_key(n, n == t, totals)))
            changed = True
    return hidden


class _Admissible:
    """Which values each withheld count may take: its feasible range and the rule that withheld it."""

    def __init__(self, table: ReleasedTable, rules: _Rules, loose: bool = False) -> None:
        self.table, self.rules, self.loose = table, rules, loose
        self.by = table.suppressed_by

    def ok(self, name: str, value: int) -> bool:
        low, high = self.table.ranges.get(name, (0, None))
        if value < low or (high is not None and value > high):
            return False
        rule = self.by.get(name)
        if rule is None or self.loose:
            return True
        if rule == "minimum_cell_size":
            return self.rules.primary(value)
        if rule == "coarsened":  # cut back before primary suppression ran: any value
            return True
        return not self.rules.primary(value)  # complementary or audit: chosen among counts safe to show

    def cell_values(self, name: str, other: str, margin: int) -> list[int]:
        """Candidate values of a withheld cell whose partner in the margin is withheld too."""
        low, high = self.table.ranges.get(name, (0, margin))
        olow, ohigh = self.table.ranges.get(other, (0, margin))
        low, high = max(low, margin - ohigh, 0), min(high, margin - olow, margin)
        if low > high:
            return []
        if not self.by and not self.loose and name not in self.table.ranges and other not in self.table.ranges:
            return [v for v in self.rules.candidates(margin) if low <= v <= high]
        return list(range(low, high + 1))


def _cells_given_margin(
    table: ReleasedTable, admissible: _Admissible, names: tuple[str, str], margin: int, margin_hidden: bool
) -> NDArray[np.int64]:
    """Allowed values of the first cell (TP or FP) given its margin, under margin = first + second."""
    first, second = (getattr(table, n) for n in names)
    if first is not None:
        values = [first]
    elif second is not None:
        values = [margin - second]
    else:
        values = admissible.cell_values(names[0], names[1], margin)
    rules = admissible.rules
    allowed = []
    for v in values:
        w = margin - v
        if not (0 <= v <= margin) or (second is not None and second != w):
            continue
        if (first is None and not admissible.ok(names[0], v)) or (second is None and not admissible.ok(names[1], w)):
            continue
        if table.replayable and not admissible.loose:
            members = {"margin": margin, f"c.{names[0]}": v, f"c.{names[1]}": w}
            unsafe = {n for n, x in members.items() if rules.primary(x)}
            if margin_hidden:
                unsafe.add("margin")  # hidden by the flow above (its own value is checked there)
            hidden = _replay(members, [("margin", (f"c.{names[0]}", f"c.{names[1]}"))], unsafe)
            if (f"c.{names[0]}" in hidden) != (first is None) or (f"c.{names[1]}" in hidden) != (second is None):
                continue
        elif (
            not admissible.by
            and not admissible.loose
            and not rules.split_ok(margin, margin_hidden, [(v, first is None), (w, second is None)])
        ):
            continue
        allowed.append(v)
    return np.array(allowed, dtype=np.int64)


def _flow_replays(table: ReleasedTable, rules: _Rules, total: int, n1: int) -> bool:
    """Whether some values of the withheld exclusion counts make the site's rule hide exactly what the flow
    hides, given the total analysed and the split (used only when the release is replayable)."""
    n0 = total - n1
    shown_excluded = [v for v in table.excluded if v is not None]
    hidden_index = [i for i, v in enumerate(table.excluded) if v is None]
    names = table.excluded_names
    rest = None if table.read is None else table.read - total - sum(shown_excluded)
    if rest is not None and rest < 0:
        return False
    # Hidden exclusion counts in P are never compared (they are hidden from the start): only their number and
    # sum matter. At most one hidden exclusion count lies outside P (the relation's complementary choice).
    options: list[tuple[list[int], int | None, int]] = []  # (primary indices, outside index, outside value)
    for outside in [None, *hidden_index]:
        primary = [i for i in hidden_index if i != outside]
        p_low, p_high = len(primary) * rules.low, len(primary) * (rules.k - 1)
        if outside is None:
            if rest is None or p_low <= rest <= p_high:
                options.append((primary, None, 0))
            continue
        if rest is None:  # read withheld too: the rule never looks at values, any safe value replays alike
            options.append((primary, outside, rules.k))
            continue
        for value in range(max(0, rest - p_high), rest - p_low + 1):
            if not rules.primary(value):
                options.append((primary, outside, value))
    parts = tuple(f"flow.excluded.{n}" for n in names)
    relations = [
        ("flow.read", ("flow.analysed", *parts)),
        ("flow.analysed", ("flow.analysed_positive", "flow.analysed_negative")),
    ]
    expected = {
        "flow.read": table.read is None,
        "flow.analysed": table.analysed is None,
        "flow.analysed_positive": table.positives is None,
        "flow.analysed_negative": table.negatives is None,
        **{part: v is None for part, v in zip(parts, table.excluded, strict=True)},
    }
    for _, outside, value in options:
        members = {
            "flow.read": table.read if table.read is not None else 0,
            "flow.analysed": total,
            "flow.analysed_positive": n1,
            "flow.analysed_negative": n0,
        }
        unsafe = {n for n, v in members.items() if n != "flow.read" and rules.primary(v)}
        if table.read is not None and rules.primary(table.read):
            unsafe.add("flow.read")
        for i, (part, v) in enumerate(zip(parts, table.excluded, strict=True)):
            if v is not None:
                members[part] = v
            elif i == outside:
                members[part] = value
            else:
                members[part] = rules.low  # a primary count: hidden from the start, never compared
                unsafe.add(part)
            if v is not None and rules.primary(v):
                unsafe.add(part)
        variants = [unsafe]
        if table.read is None:  # a withheld read was small itself, or withheld by the complementary rule
            members["flow.read"] = total + sum(members[part] for part in parts)
            low_read = (
                total
                + sum(v for v in table.excluded if v is not None)
                + sum(rules.low if i != outside else value for i in hidden_index)
            )
            variants = [unsafe | {"flow.read"}] if low_read <= rules.k - 1 else []
            variants.append(unsafe)
        for variant in variants:
            hidden = _replay(
                members, relations, variant, frozenset({"flow.analysed_positive", "flow.analysed_negative"})
            )
            if all((name in hidden) == want for name, want in expected.items()):
                return True
    return False


def site_evidence(table: ReleasedTable) -> SiteEvidence:
    """The likelihood evidence of one released table (exact when complete, censored otherwise).

    A withheld count may take the values that (a) lie in its feasible range (``table.ranges``), (b) the rule
    that withheld it allows — 1..k−1 (0..k−1 when zeros are hidden) for the minimum cell size; 0 (where zeros
    are shown) or at least k for a count withheld by complementary suppression or the audit, which pick
    among counts safe to show; any value for a coarsened one, cut back before primary suppression ran —
    and (c) complete the released totals. When the release does not name the rule, (b) is inferred from the
    relations; when the release is ``replayable`` the site's rule is replayed on each candidate table and only
    tables that reproduce the release exactly are kept.

    Parameters
    ----------
    table : ReleasedTable
        A complete table, or one with suppressed cells whose release states ``min_cell_size``.

    Returns
    -------
    SiteEvidence

    Raises
    ------
    PoolingError
        When the release contradicts its own policy or its totals, when a suppressed table has no
        minimum cell size, or when nothing released bounds the table (the total analysed, the margins
        and the records read are all hidden).
    """
    site = table.site_id
    tp, fp, fn, tn = table.cells
    if table.is_complete:
        n1, n0 = tp + fn, fp + tn  # type: ignore[operator]
        if (table.positives is not None and table.positives != n1) or (
            table.negatives is not None and table.negatives != n0
        ):
            raise PoolingError(f"site {site!r}: the released cells do not add up to the released margins")
        return SiteEvidence(
            site,
            np.ones(1),
            np.array([n1], dtype=np.int64),
            np.array([n0], dtype=np.int64),
            (np.array([tp], dtype=np.int64),),
            (np.array([fp], dtype=np.int64),),
            censored=False,
        )
    if table.min_cell_size is None:
        raise PoolingError(f"site {site!r}: suppressed cells but the release states no minimum cell size")
    rules = _Rules(table)
    _released_consistent(table, rules)
    blocks = _blocks(table, rules, _Admissible(table, rules))
    if not blocks:
        # The relations admit no table: something beyond the minimum cell size (the audit) withheld counts,
        # so a withheld count is known only to lie in its feasible range.
        blocks = _blocks(table, rules, _Admissible(table, rules, loose=True), loose=True)
    if not blocks:
        raise PoolingError(f"site {site!r}: no table is consistent with the release and its suppression rule")
    return SiteEvidence(
        site,
        np.array([b[0] for b in blocks]),
        np.array([b[1] for b in blocks], dtype=np.int64),
        np.array([b[3] for b in blocks], dtype=np.int64),
        tuple(b[2] for b in blocks),
        tuple(b[4] for b in blocks),
        censored=True,
    )


def _blocks(table: ReleasedTable, rules: _Rules, admissible: _Admissible, loose: bool = False) -> list[tuple]:
    site = table.site_id
    analysed_hidden = table.analysed is None
    totals = [
        n
        for n in _analysed_candidates(table, rules, loose)
        if table.analysed is not None or admissible.ok("analysed", n)
    ]
    blocks: list[tuple[float, int, NDArray[np.int64], int, NDArray[np.int64]]] = []
    if not totals:
        return blocks
    weight_total = 1.0 / len(totals)
    for total in totals:
        for n1 in _margin_candidates(table, total, rules, admissible):
            n0 = total - n1
            if table.positives is None and not admissible.ok("positives", n1):
                continue
            if table.negatives is None and not admissible.ok("negatives", n0):
                continue
            if table.replayable and not loose:
                if not _flow_replays(table, rules, total, n1):
                    continue
            elif not admissible.by and not loose:
                parts = [(n1, table.positives is None), (n0, table.negatives is None)]
                if not rules.split_ok(total, analysed_hidden, parts):
                    continue
            tps = _cells_given_margin(table, admissible, ("tp", "fn"), n1, table.positives is None)
            fps = _cells_given_margin(table, admissible, ("fp", "tn"), n0, table.negatives is None)
            if tps.size and fps.size:
                blocks.append((weight_total / (total + 1), n1, tps, n0, fps))
            if len(blocks) > _MAX_BLOCKS:
                raise PoolingError(f"site {site!r}: the release leaves too many possible tables to enumerate")
    return blocks


def _margin_candidates(table: ReleasedTable, total: int, rules: _Rules, admissible: _Admissible) -> list[int]:
    if table.positives is not None:
        return [table.positives] if table.positives <= total else []
    if table.negatives is not None:
        return [total - table.negatives] if table.negatives <= total else []
    if "positives" in table.ranges or "negatives" in table.ranges or admissible.by or admissible.loose:
        low, high = table.ranges.get("positives", (0, total))
        nlow, nhigh = table.ranges.get("negatives", (0, total))
        return list(range(max(low, total - nhigh, 0), min(high, total - nlow, total) + 1))
    return rules.candidates(total)
