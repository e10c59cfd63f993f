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


# Nine cells, four shown sums over them, six cells withheld as "0, or at least 3" (k = 3, zeros shown), two
# (cells 0 and 2) not released at all and cell 5 in no shown sum. Found by a random search for a system whose
# linear program, with each count's branch fixed, ends on a fractional table (here halves).
NINE_SUMS = ((0, 2, 3, 6), (1, 2, 6, 7), (1, 4), (0, 6, 7, 8))
NINE_SHOWN = (4, 8, 3, 8)
NINE_WITHHELD = (1, 3, 4, 6, 7, 8)


def nine_cell_values(cell: int) -> set[int]:
    """Every value of ``cell`` over the recipient's whole-number tables of the nine cells (enumerated; each
    withheld cell 0 or at least 3)."""
    out = set()
    for c0, c2, c3, c6 in itertools.product(range(5), repeat=4):  # the first sum, 4, fixes these four's range
        for c1 in range(4):  # the third sum: c1 + c4 = 3
            c7 = 8 - c1 - c2 - c6  # the second sum
            c8 = 8 - c0 - c6 - c7  # the fourth sum
            table = (c0, c1, c2, c3, 3 - c1, 0, c6, c7, c8)  # cell 5 lies in no sum and touches no other cell
            if c0 + c2 + c3 + c6 != 4 or min(table) < 0:
                continue
            if all(table[c] == 0 or table[c] >= 3 for c in NINE_WITHHELD):
                out.add(table[cell])
    return out


def test_a_fractional_linear_table_is_made_whole_by_a_small_program_near_it(monkeypatch) -> None:
    from scipy.optimize import milp

    import site_agent.audit.branches as module

    incidence = np.zeros((4 + 9, 9))
    for row, cells in enumerate(NINE_SUMS):
        incidence[row, list(cells)] = 1
    incidence[4:] = np.eye(9)
    names = {f"t.{row}": row for row in range(13)}
    withheld = {f"t.{4 + c}": "complementary" for c in (*NINE_WITHHELD, 5)}
    facts = [(withheld, dict.fromkeys(withheld, False), 3, True, names)]
    held = []

    def recorded(*args, **kwargs):  # the real solver (in this process), with the columns each program holds at 0 noted
        held.append(int(np.sum(kwargs["bounds"].ub == 0)))
        return milp(*args, **kwargs)

    monkeypatch.setattr(module, "integer_program", recorded)
    second = Branches(
        sparse.csr_matrix(incidence), dict(enumerate(NINE_SHOWN)), sparse.csr_matrix((0, 9)), np.zeros(9, bool), facts
    )
    cell_1 = np.eye(9)[1]
    # the audit's own branch pins cell 1 at 3; the recipient's tables give it 0 too
    assert {0, 3} <= nine_cell_values(1)
    low, high = second.open(cell_1, 2, 3, 3)
    assert (low, high) == (0, 3) and {low, high} <= nine_cell_values(1)
    # one integer program ran, holding at 0 more columns than the branches alone (3 of 6 branch variables at 0):
    # the small program near the linear table found the table, and the whole one did not run
    assert len(held) == 1 and held[0] > 3
