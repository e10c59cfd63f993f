"""The audit's decisions do not depend on rounding.

The same records and model gave different releases (other cells withheld, whole analyses withheld at one CPU
and not at another) depending on the BLAS kernel numpy used: two of the audit's decisions turned on the last
bits of floating-point sums. These tests play another kernel's rounding on one machine (the atoms in another
order, relative noise of 1e-13 on the rows) and ask for the same decisions:

- which rows of the system are kept as independent (they steer which cells a repair withholds): a pivoted QR
  broke ties between rows of equal norm, the cells and margins of a table, by rounding;
- whether a count is given exactly by the shown counts (its distance from the row space below the audit's
  tolerance of 1e-7): measured as ``|v|² - |Bᵀv|²``, the distance of a box of 1,500 atoms that the rows give
  exactly came out anywhere between 0 and 1e-6.

And, end to end, a table's protection: the same cells withheld, for the same reasons, when every row choice
sees the atoms in another order and every factorisation returns another orthonormal basis of the same row
space (as another LAPACK kernel does).
"""

from __future__ import annotations

import numpy as np
import pytest
from scipy import sparse

from site_agent.audit import system as audit_system
from site_agent.audit.facts import _TOL
from site_agent.audit.system import _build_system, _first_independent, _independent_rows
from site_agent.counts import Condition, CountSet
from site_agent.disclosure import protect

from .test_audit import policy


def two_way_table(rows: int, columns: int, atoms_per_cell: int, shown_cells: tuple[int, ...] = ()) -> sparse.csr_matrix:
    """A table's row and column margins (and some of its cells) as 0/1 rows over atoms: every margin of one
    kind has as many atoms as the others, and the margins together are one row short of independent."""
    cell = np.arange(rows * columns * atoms_per_cell) // atoms_per_cell
    lines = [cell // columns == i for i in range(rows)] + [cell % columns == j for j in range(columns)]
    lines += [cell == c for c in shown_cells]
    return sparse.csr_matrix(np.array(lines, float))


@pytest.mark.parametrize(("size", "atoms_per_cell", "shown"), [(3, 2, ()), (5, 3, ()), (6, 4, (0, 7)), (8, 2, ())])
def test_the_rows_kept_do_not_depend_on_rounding(size: int, atoms_per_cell: int, shown: tuple[int, ...]) -> None:
    # Guards against a row choice that rounding decides (a pivoted QR's ties): with the atoms in another order,
    # or the rows' entries moved by 1e-13, the same rows must be kept.
    a = two_way_table(size, size, atoms_per_cell, shown)
    rng = np.random.default_rng(size)
    kept = _independent_rows(a, False).tolist()
    assert len(kept) == np.linalg.matrix_rank(a.toarray()) == 2 * size - 1 + len(shown)
    for _ in range(20):
        shuffled = a[:, rng.permutation(a.shape[1])].tocsr()
        noisy = a.copy()
        noisy.data = noisy.data * (1 + 1e-13 * rng.standard_normal(len(noisy.data)))
        assert _independent_rows(shuffled, False).tolist() == kept
        assert _independent_rows(noisy, False).tolist() == kept
    # sparse rows first, then by position: the last column margin is the one a dense row's sum makes redundant
    assert kept == [r for r in range(a.shape[0]) if r != 2 * size - 1]


def test_the_first_independent_rows_are_those_no_earlier_row_gives() -> None:
    rows = np.array([[1.0, 1, 0, 0], [0, 0, 1, 1], [1, 1, 1, 1], [1, 0, 1, 0], [0, 1, 0, 1], [0, 1, 1, 0]])
    # row 2 is rows 0 + 1; row 4 is rows 0 + 1 - 3; row 5 is new
    assert _first_independent(rows).tolist() == [0, 1, 3, 5]
    assert _first_independent(rows[[2, 0, 1, 3, 4, 5]]).tolist() == [0, 1, 3, 5]  # now the first two give the third


def test_a_count_the_shown_counts_give_is_at_no_distance_from_them() -> None:
    # Guards against a distance measured by cancellation (|v|² - |Bᵀv|²): its rounding, some 1e-6 under the
    # square root for boxes of hundreds of atoms, straddled the tolerance, so that whether a withheld count was
    # found given exactly depended on the BLAS kernel.
    a = two_way_table(3, 10, 50)  # 1,500 atoms: three row margins, ten column margins
    rng = np.random.default_rng(0)
    table = rng.integers(0, 5, a.shape[1]).astype(float)
    system = _build_system(a, a @ table, [None] * a.shape[0], np.zeros(a.shape[1], bool))
    given = np.vstack([a.toarray(), np.cumsum(a.toarray()[3:], axis=0), a.toarray().sum(axis=0)])
    distances = system.residuals(given)
    assert np.max(distances) < 1e-11 < _TOL
    assert max(system.residual(v) for v in given) < 1e-11
    # a region the margins leave open (one cell, one atom) stays far from them
    cell, atom = np.zeros(a.shape[1]), np.zeros(a.shape[1])
    cell[:50], atom[0] = 1.0, 1.0
    assert np.min(system.residuals(np.vstack([cell, atom]))) > 0.5
    # vectors over a few atoms (every other atom 0) give the same distances as widened to every atom
    few = np.arange(0, a.shape[1], 7)
    vectors = rng.integers(0, 2, (40, len(few))).astype(float)
    wide = np.zeros((40, a.shape[1]))
    wide[:, few] = vectors
    np.testing.assert_allclose(system.residuals(vectors, few), system.residuals(wide), atol=1e-12)


def cross_table(values: np.ndarray) -> CountSet:
    """A two-way table's cells, margins and total, with their relations."""
    out = CountSet()
    rows = [Condition("row", (str(i),)) for i in range(values.shape[0])]
    columns = [Condition("col", (str(j),)) for j in range(values.shape[1])]
    for i, row in enumerate(rows):
        for j, column in enumerate(columns):
            out.add(f"table.c{i}{j}", int(values[i, j]), row, column)
    for i, row in enumerate(rows):
        out.add(f"table.row{i}", int(values[i].sum()), row)
        out.relate(f"table.row{i}", *(f"table.c{i}{j}" for j in range(len(columns))))
    for j, column in enumerate(columns):
        out.add(f"table.col{j}", int(values[:, j].sum()), column)
        out.relate(f"table.col{j}", *(f"table.c{i}{j}" for i in range(len(rows))))
    out.add("table.total", int(values.sum()))
    out.relate("table.total", *(f"table.row{i}" for i in range(len(rows))))
    out.relate("table.total", *(f"table.col{j}" for j in range(len(columns))))
    return out


def test_a_table_is_protected_alike_under_another_kernel_s_rounding(monkeypatch: pytest.MonkeyPatch) -> None:
    # Guards against withheld cells that rounding chooses: on the old row choice and distance, this table (small
    # cells, zeros shown, k = 5) kept a cell it withheld before, and another's reason changed, under the second
    # seed's reordering and rotation.
    values = np.array(
        [[22, 25, 1, 4, 13], [1, 1, 1, 1, 6], [13, 11, 27, 12, 19], [18, 2, 22, 1, 0], [17, 7, 10, 18, 4]]
    )

    def withheld() -> dict[str, str]:
        protected = protect(cross_table(values), policy(5, True), [], label="r0")
        return {name: protected.rules[name] for name in sorted(protected.suppressed)}

    expected = withheld()
    assert expected["table.c02"] == "minimum_cell_size" and "table.c23" not in expected
    choose, factorise = audit_system._independent_rows, audit_system._factorise
    for seed in range(1, 4):
        rng = np.random.default_rng(seed)

        def reordered(a_live: sparse.csr_matrix, sketch: bool, rng: np.random.Generator = rng) -> np.ndarray:
            return choose(a_live[:, rng.permutation(a_live.shape[1])].tocsr(), sketch)

        def rotated(
            dense: np.ndarray, rhs: np.ndarray, rng: np.random.Generator = rng
        ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            basis, left, solution = factorise(dense, rhs)
            turn = np.linalg.qr(rng.standard_normal((basis.shape[1], basis.shape[1])))[0]
            return basis @ turn, left @ turn, solution

        monkeypatch.setattr(audit_system, "_independent_rows", reordered)
        monkeypatch.setattr(audit_system, "_factorise", rotated)
        assert withheld() == expected
