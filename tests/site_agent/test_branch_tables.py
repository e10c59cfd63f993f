"""The second look's tables carried from one evaluation of an audit to the next (site_agent/audit/branches.py).

A table found in one repair round is tried first in the next, and must prove nothing there unless it is a
whole-number table of every fact of that round. The reference is the recipient's own enumeration of every
table of two cells (itertools over 0..20), written here: with a + b = 10 shown and each of a, b withheld as
"0, or at least 5" (k = 5, zeros shown; Hundepool et al. 2012, ch. 4, for the disjunction a complementary
cell carries), the tables are (0, 10), (5, 5) and (10, 0), so a keeps three values while the audit's own
branch (both at least 5) pins it at 5.
"""

from __future__ import annotations

import itertools

import numpy as np
from scipy import sparse

from site_agent.audit.branches import BUDGET_PROGRAMS, Branches

K = 5
A = np.array([1.0, 0.0])  # the count of cell a, over the two atoms a and b
INCIDENCE = sparse.csr_matrix(np.array([[1.0, 1.0], [1.0, 0.0], [0.0, 1.0]]))  # boxes: a+b, a, b
NAMES = {"t.total": 0, "t.a": 1, "t.b": 2}


def branches(known: dict[int, int], withheld: tuple[str, ...], tables: list[np.ndarray]) -> Branches:
    rules = {name: "complementary" for name in withheld}
    facts = [(rules, dict.fromkeys(withheld, False), K, True, NAMES)]
    return Branches(INCIDENCE, known, sparse.csr_matrix((0, 2)), np.zeros(2, bool), facts, tables)


def recipient_values(total: int, shown: dict[int, int]) -> set[int]:
    """Every value of a over the whole-number tables the recipient cannot rule out (enumerated)."""
    out = set()
    for a, b in itertools.product(range(21), repeat=2):
        counts = {0: a + b, 1: a, 2: b}
        if a + b != total or any(counts[box] != value for box, value in shown.items()):
            continue
        if all(counts[box] == 0 or counts[box] >= K for box in (1, 2) if box not in shown):
            out.add(a)
    return out


def test_a_table_found_in_one_round_proves_the_finding_open_in_the_next_without_a_program() -> None:
    assert recipient_values(10, {}) == {0, 5, 10}  # the reference: a is not pinned for this recipient
    kept: list[np.ndarray] = []
    first = branches({0: 10}, ("t.a", "t.b"), kept)
    low, high = first.open(A, 2, 5, 5)
    assert (low, high) in {(0, 5), (5, 10)} and {low, high} <= recipient_values(10, {})
    assert len(kept) == 1 and first.programs > 0
    later = branches({0: 10}, ("t.a", "t.b"), kept)
    later.programs = BUDGET_PROGRAMS  # no program may run: only the kept table can answer
    assert later.open(A, 2, 5, 5) == (low, high)
    assert later.programs == BUDGET_PROGRAMS


def test_a_kept_table_that_breaks_a_fact_of_the_round_proves_nothing() -> None:
    # b shown as 5 in this round: the kept tables (0, 10) and (10, 0) break it, and a is pinned at 5
    assert recipient_values(10, {2: 5}) == {5}
    kept = [np.array([10.0, 0.0]), np.array([0.0, 10.0])]
    later = branches({0: 10, 2: 5}, ("t.a",), kept)
    later.programs = BUDGET_PROGRAMS
    assert later.open(A, 2, 5, 5) is None
    # a table with a between 0 and k breaks "0, or at least 5" and proves nothing either
    later = branches({0: 10}, ("t.a", "t.b"), [np.array([3.0, 7.0])])
    later.programs = BUDGET_PROGRAMS
    assert later.open(A, 2, 5, 5) is None
    assert 3 not in recipient_values(10, {})


def test_a_kept_table_inside_the_interval_proves_nothing() -> None:
    # (5, 5) is a table of every fact, but a = 5 lies inside the audit's own interval: it shows no other value
    later = branches({0: 10}, ("t.a", "t.b"), [np.array([5.0, 5.0])])
    later.programs = BUDGET_PROGRAMS
    assert later.open(A, 2, 5, 5) is None
