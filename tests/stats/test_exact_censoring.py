"""The censoring likelihood against brute force: every table the site's own rule could turn into a given
release, found by running the site's suppression code (site_agent.disclosure.suppress, used here only) on
every table in a box, must be exactly the set the coordinator's evidence allows (within the box)."""

from __future__ import annotations

from collections import defaultdict
from itertools import product

import pytest

from federation.stats import ReleasedTable, site_evidence
from site_agent.counts import Relation
from site_agent.disclosure import suppress

REASONS = ("missing_outcome",)
RELATIONS = [
    Relation("flow.read", ("flow.analysed", "flow.excluded.missing_outcome")),
    Relation("flow.analysed", ("flow.analysed_positive", "flow.analysed_negative")),
    Relation("flow.analysed_positive", ("confusion[0].tp", "confusion[0].fn")),
    Relation("flow.analysed_negative", ("confusion[0].fp", "confusion[0].tn")),
]
BOX = 9  # margins 0..BOX, exclusions 0..BOX


def _release(tp: int, fp: int, fn: int, tn: int, excluded: int, k: int, allow_zero: bool) -> tuple:
    counts = {
        "flow.read": tp + fp + fn + tn + excluded,
        "flow.analysed": tp + fp + fn + tn,
        "flow.analysed_positive": tp + fn,
        "flow.analysed_negative": fp + tn,
        "flow.excluded.missing_outcome": excluded,
        "confusion[0].tp": tp,
        "confusion[0].fp": fp,
        "confusion[0].fn": fn,
        "confusion[0].tn": tn,
    }
    shown, _ = suppress(counts, RELATIONS, k, allow_zero)
    return tuple(sorted(shown.items()))


def _table(release: tuple, k: int, allow_zero: bool) -> ReleasedTable:
    shown = dict(release)
    return ReleasedTable(
        "site",
        *(shown[f"confusion[0].{c}"] for c in ("tp", "fp", "fn", "tn")),
        positives=shown["flow.analysed_positive"],
        negatives=shown["flow.analysed_negative"],
        analysed=shown["flow.analysed"],
        read=shown["flow.read"],
        excluded=(shown["flow.excluded.missing_outcome"],),
        excluded_names=REASONS,
        min_cell_size=k,
        allow_zero=allow_zero,
        replayable=True,
    )


@pytest.mark.parametrize(("k", "allow_zero"), [(5, True), (5, False)])
def test_evidence_is_exactly_the_tables_the_rule_could_produce(k: int, allow_zero: bool) -> None:
    produced: dict[tuple, set[tuple[int, int, int, int]]] = defaultdict(set)
    for n1, n0, excluded in product(range(BOX + 1), range(BOX + 1), range(BOX + 1)):
        for tp, fp in product(range(n1 + 1), range(n0 + 1)):
            produced[_release(tp, fp, n1 - tp, n0 - fp, excluded, k, allow_zero)].add((tp, fp, n1 - tp, n0 - fp))
    checked = 0
    for release, truth in produced.items():
        table = _table(release, k, allow_zero)
        if table.is_complete:
            continue
        evidence = site_evidence(table)
        allowed = set()
        for b in range(evidence.n_blocks):
            n1, n0 = int(evidence.positives[b]), int(evidence.negatives[b])
            read = table.read
            if n1 > BOX or n0 > BOX or (read is not None and read - n1 - n0 > BOX):
                continue  # outside the box the brute force searched
            for tp, fp in product(evidence.tp_values[b].tolist(), evidence.fp_values[b].tolist()):
                allowed.add((tp, fp, n1 - tp, n0 - fp))
        assert allowed == truth, dict(release)
        checked += 1
    assert checked > 200  # many different suppression patterns were compared


def test_a_zero_cell_is_not_allowed_where_the_rule_would_have_shown_it() -> None:
    # k = 10, zeros shown: n1 = 50 released, TP and FN withheld. TP = 0 would have been shown (a zero is
    # safe) and FN = 50 too, so the only tables are TP in 1..9 (FN complementary) or FN in 1..9.
    table = ReleasedTable(
        "s",
        None,
        30,
        None,
        60,
        positives=50,
        negatives=90,
        analysed=140,
        read=150,
        excluded=(10,),
        min_cell_size=10,
        replayable=True,
    )
    assert site_evidence(table).tp_values[0].tolist() == [*range(1, 10), *range(41, 50)]


def test_the_complementary_choice_follows_a_fixed_order() -> None:
    # Worked by hand, k = 10, with the site's rule (site_agent/disclosure.py ``_secondary``: never by value):
    # 3 records excluded (primary); the read relation withholds the records read (a count the primary 2x2
    # needs least) rather than the analysed total, so the 2x2 table stays whole.
    release = dict(_release(10, 40, 10, 117, 3, 10, True))
    assert release["flow.read"] is None and release["flow.excluded.missing_outcome"] is None
    assert [release[f"confusion[0].{c}"] for c in ("tp", "fp", "fn", "tn")] == [10, 40, 10, 117]
    # TP = 3 is primary; the positive relation withholds FN (a part before the total), whatever its value. The
    # recipient sees 20 with the condition and both cells withheld: one of them was small (1..9) and the other
    # hidden by the rule, so TP is 1..9 or 11..19 (TP = 10 would have left both shown).
    table = _table(_release(3, 40, 17, 117, 0, 10, True), 10, True)
    assert table.tp is None and table.fn is None and table.positives == 20
    evidence = site_evidence(table)
    assert sorted(int(v) for b in range(evidence.n_blocks) for v in evidence.tp_values[b]) == [
        *range(1, 10),
        *range(11, 20),
    ]
