"""The audit's linear system: the independent rows it keeps, and the blocks it builds from them.

A large part's row choice runs on a random sketch of the atoms (``site_agent.audit.system._independent_rows``;
these tests lower ``_SKETCH_FROM`` so that their small systems take that path too) and is then proved (every
dropped row must lie in the row space of the blocks built without it). These tests check the choice against
numpy's rank (``numpy.linalg.matrix_rank``, an SVD) and the system's intervals against scipy's ``linprog`` on
every row (each block's program solved afresh, and kept in HiGHS between objectives), and play a wrong choice
to see that the proof catches it.
"""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import sparse
from scipy.optimize import linprog

from site_agent.audit import system as audit_system
from site_agent.audit.system import _build_system, _independent_rows, _interior


def table_of(a: sparse.csr_matrix, b: np.ndarray) -> np.ndarray:
    """One non-negative table with these row counts (scipy's linprog, any objective)."""
    return linprog(np.zeros(a.shape[1]), A_eq=a.toarray(), b_eq=b, bounds=(0, None), method="highs").x


def _history_like(seed: int, rows: int, atoms: int) -> tuple[sparse.csr_matrix, np.ndarray]:
    """Boxes as 0/1 rows over atoms, with totals that are sums of other rows (as a site's flow relations
    and repeated releases make them), and the counts of one table of whole numbers."""
    rng = np.random.default_rng(seed)
    base = (rng.random((rows, atoms)) < rng.uniform(0.02, 0.3)).astype(float)
    sums = np.array([base[rng.choice(rows, size=3, replace=False)].sum(axis=0) for _ in range(max(1, rows // 3))])
    sums = np.minimum(sums, 1.0) if rng.random() < 0.5 else sums  # unions too, which may be independent
    a = np.vstack([base, sums, base[: rows // 4]])  # and plain repeats
    a = a[np.any(a != 0, axis=1)]
    table = rng.integers(0, 4, atoms).astype(float)
    return sparse.csr_matrix(a), a @ table


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31), rows=st.integers(3, 40), atoms=st.integers(3, 600))
def test_the_rows_kept_span_the_row_space_and_are_independent(seed: int, rows: int, atoms: int) -> None:
    a, _ = _history_like(seed, rows, atoms)
    rank = np.linalg.matrix_rank(a.toarray())  # reference: numpy's SVD rank
    for sketch in (True, False):
        with pytest.MonkeyPatch.context() as patch:
            patch.setattr(audit_system, "_SKETCH_FROM", 0)
            chosen = _independent_rows(a, sketch)
        assert len(chosen) == rank
        assert np.linalg.matrix_rank(a[chosen].toarray()) == rank


@settings(max_examples=15, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31))
def test_the_system_gives_the_intervals_of_every_row(seed: int) -> None:
    a, b = _history_like(seed, 12, 120)
    n = a.shape[1]
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(audit_system, "_SKETCH_FROM", 0)
        system = _build_system(a, b, [None] * a.shape[0], np.zeros(n, bool))
    rng = np.random.default_rng(seed)
    # bound facts on a few boxes, as the rules' facts are (low <= count <= high), to test the kept program's rows
    g = sparse.csr_matrix((rng.random((3, n)) < 0.1).astype(float))
    inside = g @ table_of(a, b)
    g_low, g_high = np.floor(0.5 * inside), np.ceil(inside) + 2.0
    bounded = _build_system(a, b, [None] * a.shape[0], np.zeros(n, bool), g, g_low, g_high)
    for _ in range(6):
        vector = (rng.random(n) < 0.2).astype(float)
        # reference: scipy's linprog with every row, none dropped
        for which, ub in ((system, False), (bounded, True)):
            a_ub, b_ub = (None, None) if not ub else (np.vstack([g.toarray(), -g.toarray()]), np.r_[g_high, -g_low])
            ref_low = linprog(vector, A_ub=a_ub, b_ub=b_ub, A_eq=a.toarray(), b_eq=b, bounds=(0, None), method="highs")
            ref_high = linprog(
                -vector, A_ub=a_ub, b_ub=b_ub, A_eq=a.toarray(), b_eq=b, bounds=(0, None), method="highs"
            )
            # each block's program solved afresh, and kept in HiGHS between objectives (hot)
            for hot in (False, True):
                low, high, _, points = which.lp_interval(vector, hot=hot)
                assert low == pytest.approx(ref_low.fun, abs=1e-6)
                if ref_high.status == 3:
                    assert high == np.inf
                else:
                    assert high == pytest.approx(-ref_high.fun, abs=1e-6)
                for point, mask in points:  # the optimal tables are tables: every row within them holds
                    within = np.flatnonzero(np.asarray(a[:, ~mask].sum(axis=1)).ravel() == 0)
                    assert len(within) and np.all(point[mask] >= -1e-7)
                    assert np.allclose(a[within] @ point, b[within], atol=1e-6)


def test_a_wrong_sketch_is_caught_and_the_exact_choice_made(monkeypatch: pytest.MonkeyPatch) -> None:
    a, b = _history_like(7, 20, 300)
    exact = _independent_rows(a, False)
    real = audit_system._independent_rows
    calls = []

    def wrong(matrix: sparse.csr_matrix, sketch: bool) -> np.ndarray:
        calls.append(sketch)
        chosen = real(matrix, sketch)
        return chosen[1:] if sketch else chosen  # the sketch "loses" an independent row

    monkeypatch.setattr(audit_system, "_independent_rows", wrong)
    system = _build_system(a, b, [None] * a.shape[0], np.zeros(a.shape[1], bool))
    assert calls == [True, False]
    kept = np.sort(np.concatenate([block.rows for block in system.blocks]))
    assert kept.tolist() == exact.tolist()
    # the row the sketch lost is in the system: its count is fixed
    lost = a[exact[0]].toarray().ravel()
    low, high, _, _ = system.lp_interval(lost)
    assert low == pytest.approx(b[exact[0]]) and high == pytest.approx(b[exact[0]])


def test_the_interior_test_says_yes_only_for_a_strictly_positive_solution() -> None:
    a = sparse.csr_matrix(np.array([[1.0, 1.0, 0.0], [0.0, 1.0, 1.0]]))
    # x1 + x2 = b1, x2 + x3 = b2; min-norm solution x = a.T (a a.T)^-1 b (worked by hand): for b = (2, 2)
    # it is (2/3, 4/3, 2/3), all positive
    assert _interior(a, np.array([2.0, 2.0]))
    # with b = (2, 0) the only non-negative solutions have x2 = x3 = 0: not interior
    assert not _interior(a, np.array([2.0, 0.0]))


def test_a_small_part_gets_the_exact_choice() -> None:
    # Below _SKETCH_FROM entries the rows are chosen on every atom (the choice steers which cells a repair
    # withholds, so a small study's release does not depend on a random sketch). The sketch keeps the rows'
    # dependences, and the rows are taken in a fixed order, so it makes the same choice.
    a, _ = _history_like(11, 30, 500)
    assert a.shape[0] * a.shape[1] < audit_system._SKETCH_FROM
    exact = _independent_rows(a, False).tolist()
    assert _independent_rows(a, True).tolist() == exact
    with pytest.MonkeyPatch.context() as patch:
        patch.setattr(audit_system, "_SKETCH_FROM", 0)
        sketched = _independent_rows(a, True)
    assert len(sketched) == np.linalg.matrix_rank(a.toarray())  # reference: numpy's SVD rank
    assert sketched.tolist() == exact


@settings(max_examples=20, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(seed=st.integers(0, 2**31))
def test_implicit_zeros_asked_about_some_atoms_agree_with_every_atom_asked(seed: int) -> None:
    # A repair round asks only about the atoms the last round's system left empty (a superset of the new
    # system's implicit zeros). Reference: for each atom, scipy's linprog maximising that atom alone (it is an
    # implicit zero exactly when that maximum is 0).
    rng = np.random.default_rng(seed)
    a, _ = _history_like(seed, 10, 60)
    n = a.shape[1]
    table = rng.integers(0, 3, n).astype(float) * (rng.random(n) < 0.6)  # many empty atoms
    b = a @ table
    reference = np.zeros(n, bool)
    for j in range(n):
        top = linprog(-np.eye(n)[j], A_eq=a.toarray(), b_eq=b, bounds=(0, None), method="highs")
        reference[j] = top.status == 0 and -top.fun <= 1e-9
    assert audit_system._implicit_zeros(a, b).tolist() == reference.tolist()
    among = reference | (rng.random(n) < 0.3)
    assert audit_system._implicit_zeros(a, b, among=among).tolist() == reference.tolist()
    assert not audit_system._implicit_zeros(a, b, among=np.zeros(n, bool)).any()


def test_atoms_no_equality_names_are_never_implicit_zeros() -> None:
    # A block joined by bound facts alone holds atoms no equality names; they can be filled at will and are
    # left out of the program. Reference: scipy's linprog maximising each atom alone (unbounded, or above 0).
    a, _ = _history_like(1, 10, 60)
    rng = np.random.default_rng(1)  # a table that leaves 8 atoms empty in every solution
    table = rng.integers(0, 3, a.shape[1]).astype(float) * (rng.random(a.shape[1]) < 0.6)  # many empty atoms
    b = a @ table
    wide = sparse.hstack([sparse.csr_matrix((a.shape[0], 4)), a, sparse.csr_matrix((a.shape[0], 3))]).tocsr()
    n = wide.shape[1]
    reference = np.zeros(n, bool)
    for j in range(n):
        top = linprog(-np.eye(n)[j], A_eq=wide.toarray(), b_eq=b, bounds=(0, None), method="highs")
        reference[j] = top.status == 0 and -top.fun <= 1e-9
    assert reference[4:-3].any() and not reference[:4].any() and not reference[-3:].any()
    assert audit_system._implicit_zeros(wide, b).tolist() == reference.tolist()
    among = np.zeros(n, bool)
    among[[0, 5, 6, n - 1]] = True
    assert audit_system._implicit_zeros(wide, b, among=among).tolist() == (reference & among).tolist()


def test_without_scipy_s_highs_binding_every_program_is_solved_afresh(monkeypatch: pytest.MonkeyPatch) -> None:
    # The kept programs use scipy's private HiGHS binding; without it (an older scipy), or when it no longer has
    # what the audit calls, each program is solved by linprog and the intervals are the same.
    a, b = _history_like(3, 12, 120)
    n = a.shape[1]
    vectors = [(np.random.default_rng(j).random(n) < 0.2).astype(float) for j in range(4)]
    expected = [_build_system(a, b, [None] * a.shape[0], np.zeros(n, bool)).lp_interval(v)[:2] for v in vectors]
    for binding in (None, object()):  # missing; present but without the calls the audit makes
        monkeypatch.setattr(audit_system, "_highs", binding)
        system = _build_system(a, b, [None] * a.shape[0], np.zeros(n, bool))
        for vector, (low, high) in zip(vectors, expected, strict=True):
            assert system.lp_interval(vector, hot=True)[:2] == pytest.approx((low, high), abs=1e-6)
        assert audit_system._highs is None  # a binding that failed is not tried again
