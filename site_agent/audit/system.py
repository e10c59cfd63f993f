"""The linear system of one evaluation: blocks, LP and MILP intervals, feasible points (see
:mod:`site_agent.audit`)."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, linprog
from scipy.sparse.csgraph import connected_components

from .facts import VALUES_REFUSED, AuditError
from .programs import integer_program

# The integer programs stop after a number of branch-and-bound nodes, not seconds, so that the same records give
# the same release on a fast machine and a slow one (a 1 s limit let a loaded machine skip programs a fast one
# finished); the seconds are only a guard. A count's blocks are small here (facts.MILP_MAX_ATOMS atoms): the demo's
# programs take a few milliseconds.
_MILP_OPTIONS = {"node_limit": 1_000, "time_limit": 30.0}

try:  # HiGHS through scipy's own binding (scipy >= 1.15): a block's program kept between objectives
    from scipy.optimize._highspy import _core as _highs
except ImportError:  # pragma: no cover - an older scipy: every program is solved afresh by linprog
    _highs = None

# --- the equality system of one evaluation ----------------------------------------------------------------


@dataclass
class _Block:
    """One independent part of the system: rows and atoms that share no row with the rest."""

    atoms: np.ndarray  # global atom indices
    rows: np.ndarray  # global row indices
    a: sparse.csr_matrix  # rows x atoms of this block
    b: np.ndarray
    basis: np.ndarray  # orthonormal basis of the row space (atoms x rank)
    left: np.ndarray  # U_r / s: maps basis coordinates to a min-norm combination of rows
    solution: np.ndarray  # one solution of a x = b (min-norm)
    independent: np.ndarray  # positions (in ``rows``) of linearly independent rows: all the LPs need
    g: sparse.csr_matrix | None = None  # bound facts over this block's atoms: low <= g x <= high
    g_low: np.ndarray | None = None
    g_high: np.ndarray | None = None
    hot: object | None = None  # the block's program in HiGHS, its last basis kept (:func:`_solve_hot`)

    def inequalities(self) -> tuple[sparse.csr_matrix | None, np.ndarray | None]:
        """The bound facts as ``A_ub x <= b_ub`` (None when the block has none)."""
        if self.g is None or self.g.shape[0] == 0:
            return None, None
        bounded = np.isfinite(self.g_high)  # "at least k" has no upper bound
        return sparse.vstack([self.g[bounded], -self.g]).tocsr(), np.concatenate([self.g_high[bounded], -self.g_low])


@dataclass
class _System:
    """``a x = b, x >= 0`` over the atoms, split into blocks; what one evaluation needs."""

    a: sparse.csr_matrix
    b: np.ndarray
    row_box: list[int | None]  # the box a row states (None for a relation)
    zero: np.ndarray  # atoms empty in every feasible table
    free: np.ndarray  # atoms in no row (nothing bounds them above)
    blocks: list[_Block]
    atom_block: np.ndarray  # block index of each atom (-1 = zero or free)
    solution: np.ndarray

    def blocks_of(self, vector: np.ndarray) -> list[_Block]:
        used = np.unique(self.atom_block[(vector != 0) & (self.atom_block >= 0)])
        return [self.blocks[i] for i in used]

    def unbounded(self, vector: np.ndarray) -> bool:
        return bool(np.any(vector[self.free] != 0))

    def residual(self, vector: np.ndarray) -> float:
        """Distance of ``vector`` from the row space; 0 means its value is the same in every feasible table
        (exact for the LP relaxation, because zero atoms are fixed and every other atom can be positive)."""
        if self.unbounded(vector):
            return math.inf
        total = 0.0
        for block in self.blocks_of(vector):
            v = vector[block.atoms]
            r = v - block.basis @ (block.basis.T @ v)  # formed, not |v|² - |Bᵀv|² (see :meth:`residuals`)
            total += float(r @ r)
        return math.sqrt(total)

    def residuals(self, vectors: np.ndarray, atoms: np.ndarray | None = None) -> np.ndarray:
        """:meth:`residual` of many vectors (rows) at once. ``atoms`` (sorted): the vectors' columns are these
        atoms only, every other atom 0 (many vectors over a few atoms need not be widened to every atom).

        The residual is formed (``v - B Bᵀv``) and then measured, never as ``|v|² - |Bᵀv|²``: that difference
        cancels, and its rounding (about 1e-16 |v|²) became, under the square root, a distance of 1e-6 for a
        box of 1,500 atoms that the rows give exactly; which boxes passed the tolerances then depended on the
        BLAS kernel's summation order. Formed, a vector in the row space is 1e-13 away."""
        if len(vectors) == 0:
            return np.zeros(0)
        squared = np.zeros(len(vectors))
        for block in self.blocks:
            if atoms is None:
                sub, basis, rest = vectors[:, block.atoms], block.basis, None
            else:
                positions = np.flatnonzero(np.isin(atoms, block.atoms))
                if len(positions) == 0:
                    continue
                rows = np.searchsorted(block.atoms, atoms[positions])
                sub, basis = vectors[:, positions], block.basis[rows]
                others = np.ones(len(block.atoms), bool)
                others[rows] = False
                rest = block.basis[others]  # the block's other atoms: the vectors are 0 there, their projection not
            coordinates = sub @ basis
            residual = sub - coordinates @ basis.T
            squared += np.einsum("ij,ij->i", residual, residual)
            if rest is not None and len(rest):
                outside = coordinates @ rest.T
                squared += np.einsum("ij,ij->i", outside, outside)
        out = np.sqrt(squared)
        free = self.free if atoms is None else self.free[atoms]
        out[np.any(vectors[:, free] != 0, axis=1)] = math.inf
        return out

    def value(self, vector: np.ndarray) -> float:
        return float(vector @ self.solution)

    def combination(self, vector: np.ndarray) -> dict[int, float]:
        """Rows (with weights) of a min-norm combination of the system that comes closest to ``vector``."""
        weights: dict[int, float] = {}
        for block in self.blocks_of(vector):
            coefficients = block.left @ (block.basis.T @ vector[block.atoms])
            for row, weight in zip(block.rows, coefficients, strict=True):
                if abs(weight) > 1e-8:
                    weights[int(row)] = weights.get(int(row), 0.0) + abs(float(weight))
        return weights

    def stated(self, vector: np.ndarray, known_zero: np.ndarray) -> bool:
        """Whether ``vector`` is a combination of the rows on every atom but ``known_zero`` (atoms empty
        whatever else is known), not only on the atoms this system left live: then its value follows from the
        equalities alone, even where an atom this system fixed at zero could be filled."""
        combined = np.zeros(self.a.shape[1])
        for block in self.blocks_of(vector):
            coefficients = block.left @ (block.basis.T @ vector[block.atoms])
            combined += self.a[block.rows].T @ coefficients
        rest = ~known_zero
        return bool(np.max(np.abs(vector[rest] - combined[rest]), initial=0.0) < 1e-6)

    def block_atoms(self, vector: np.ndarray) -> np.ndarray:
        """Every atom of the blocks the vector touches (and the vector's own atoms)."""
        blocks = self.blocks_of(vector)
        own = np.flatnonzero(vector != 0)
        return np.concatenate([own, *(b.atoms for b in blocks)]) if blocks else own

    def atoms_in_blocks(self, vector: np.ndarray) -> int:
        return sum(len(block.atoms) for block in self.blocks_of(vector))

    def spread_points(self, targets: np.ndarray, rounds: int = 3) -> list[tuple[np.ndarray, np.ndarray]]:
        """Feasible tables that push many counts to their extremes at once: the optima of the sum of all
        counts and of random signed sums (a few LPs instead of two per count)."""
        rng = np.random.default_rng(len(targets))
        points = []
        signs = [np.ones(len(targets))] + [rng.choice([-1.0, 1.0], len(targets)) for _ in range(rounds)]
        for sign in signs:
            direction = sign @ targets
            for orientation in (1.0, -1.0):
                point = self.solution.copy()
                mask = np.zeros(len(point), bool)
                for block in self.blocks_of(direction):
                    result = _solve_hot(orientation * direction[block.atoms], block)
                    if result is not None:
                        point[block.atoms] = result[1]
                        mask[block.atoms] = True
                points.append((point, mask | self.zero))
        return points

    def vertex_tables(self, blocks: list[_Block], count: int, seed: int = 0) -> list[tuple[np.ndarray, np.ndarray]]:
        """Optima of ``count`` random objectives over ``blocks`` (their LP relaxation, each block's program kept
        in HiGHS): vertices of a count table's relaxation, usually whole; each with the atoms it was solved on."""
        rng = np.random.default_rng(seed)
        points = []
        for _ in range(count):
            point, mask = self.solution.copy(), self.zero.copy()
            for block in blocks:
                result = _solve_hot(rng.standard_normal(len(block.atoms)), block)
                if result is not None:
                    point[block.atoms] = result[1]
                    mask[block.atoms] = True
            points.append((point, mask))
        return points

    def lp_interval(
        self, vector: np.ndarray, hot: bool = False
    ) -> tuple[float, float, dict[int, float], list[tuple[np.ndarray, np.ndarray]]]:
        """Min and max of the vector's count over the LP relaxation (HiGHS dual simplex), the binding rows'
        duals, and the optimal tables (feasible points for :class:`_Pool`). ``hot``: each block's program
        starts from the last basis HiGHS found for it (:func:`_solve_hot`): the same optima, found faster, but
        where an optimum is not unique other duals and tables than a fresh solve's."""
        low = high = 0.0
        duals: dict[int, float] = {}
        points = []
        for sign in (1.0, -1.0):
            point = self.solution.copy()
            mask = self.zero.copy()
            for block in self.blocks_of(vector):
                result = (_solve_hot if hot else _solve)(sign * vector[block.atoms], block)
                if result is None:  # unbounded: only a maximum can be
                    high = math.inf
                    continue
                value, x, marginals = result
                point[block.atoms] = x
                mask[block.atoms] = True
                if sign > 0:
                    low += value
                else:
                    high -= value
                for row, dual in zip(block.rows[block.independent], marginals, strict=False):
                    if abs(dual) > 1e-9:
                        duals[int(row)] = duals.get(int(row), 0.0) + abs(float(dual))
            points.append((point, mask))
        if self.unbounded(vector):
            high = math.inf
        return low, high, duals, points

    def whole_tables(
        self, count: int, seed: int = 0, blocks: list[_Block] | None = None, chunk_atoms: int = 400
    ) -> list[np.ndarray]:
        """Whole-number tables of the system (integer programs, random objectives: the sum, its negative, then
        random directions), each a vector over every atom (free atoms 0). Blocks are taken together, up to
        ``chunk_atoms`` atoms a program (their rows side by side: an optimum is a whole table of each block; one
        program per block cost 6,000 programs after a history of 1,000 blocks of three atoms). A chunk whose
        program does not solve in its time limit is left out of that table (its atoms NaN), as is every block not
        in ``blocks`` (None: all)."""
        rng = np.random.default_rng(seed)
        tables = [np.where(self.zero, 0.0, np.nan) for _ in range(count)]
        for table in tables:
            table[self.free] = 0.0
        chunks: list[list[_Block]] = []
        for block in self.blocks if blocks is None else blocks:
            if not chunks or sum(len(b.atoms) for b in chunks[-1]) + len(block.atoms) > chunk_atoms:
                chunks.append([])
            chunks[-1].append(block)
        for chunk in chunks:
            atoms = np.concatenate([block.atoms for block in chunk])
            rows = sparse.block_diag([block.a[block.independent] for block in chunk], format="csr")
            b = np.concatenate([block.b[block.independent] for block in chunk])
            constraints = [LinearConstraint(rows, b, b)] if len(b) else []
            bounded = [block.g is not None and block.g.shape[0] > 0 for block in chunk]
            if any(bounded):
                g = sparse.block_diag(
                    [
                        block.g if has else sparse.csr_matrix((0, len(block.atoms)))
                        for block, has in zip(chunk, bounded, strict=True)
                    ],
                    format="csr",
                )
                low = np.concatenate([block.g_low for block, has in zip(chunk, bounded, strict=True) if has])
                high = np.concatenate([block.g_high for block, has in zip(chunk, bounded, strict=True) if has])
                constraints.append(LinearConstraint(g, low, high))
            for i, table in enumerate(tables):
                c = np.ones(len(atoms)) * (1 if i % 2 == 0 else -1) if i < 2 else rng.standard_normal(len(atoms))
                result = integer_program(
                    c,
                    constraints=constraints,
                    integrality=np.ones(len(c)),
                    bounds=Bounds(0, np.inf),
                    options=_MILP_OPTIONS,
                )
                if result.status == 0 and result.x is not None:
                    table[atoms] = np.round(result.x)
        return tables

    def milp_interval(
        self,
        vector: np.ndarray,
        low: int,
        high: int,
        strict: bool = False,
        tables: list[tuple[np.ndarray, np.ndarray]] | None = None,
    ) -> tuple[int, int] | None:
        """Whole-number min and max (HiGHS branch and bound, :data:`_MILP_OPTIONS`); the LP bounds if a program
        stops at its limit (``strict``: None). ``tables``: the two whole-number tables found (each on the
        vector's blocks, with the atoms it holds) are added to it, for a pool of whole-number tables."""
        if self.unbounded(vector):
            return None if strict else (low, high)
        int_low = int_high = 0
        found_tables = [self.solution.copy(), self.solution.copy()]
        for block in self.blocks_of(vector):
            c = vector[block.atoms]
            found = []
            for sign in (1.0, -1.0):
                a, b = block.a[block.independent], block.b[block.independent]
                constraints = [LinearConstraint(a, b, b)] if len(b) else []
                if block.g is not None and block.g.shape[0]:
                    constraints.append(LinearConstraint(block.g, block.g_low, block.g_high))
                result = integer_program(
                    sign * c,
                    constraints=constraints,
                    integrality=np.ones(len(c)),
                    bounds=Bounds(0, np.inf),
                    options=_MILP_OPTIONS,
                )
                if result.status != 0 or result.fun is None:
                    return None if strict else (low, high)
                found.append(sign * float(result.fun))
                found_tables[len(found) - 1][block.atoms] = np.round(result.x)
            int_low += round(found[0])
            int_high += round(found[1])
        if tables is not None:
            mask = self.zero.copy()
            mask[self.block_atoms(vector)] = True
            tables.extend((table, mask) for table in found_tables)
        return max(low, int_low), min(high, int_high)


def _solve(c: np.ndarray, block: _Block) -> tuple[float, np.ndarray, np.ndarray] | None:
    """Minimise ``c . x`` over the block (independent rows only); None when unbounded below."""
    a, b = block.a[block.independent], block.b[block.independent]
    a_ub, b_ub = block.inequalities()
    if len(b) == 0:
        a = b = None
    result = linprog(
        c, A_ub=a_ub, b_ub=b_ub, A_eq=a, b_eq=b, bounds=(0, None), method="highs-ds", options={"presolve": False}
    )
    if result.status == 3:
        return None
    if result.status != 0:
        raise AuditError("the audit's linear program did not solve; the release is withheld", VALUES_REFUSED)
    marginals = np.asarray(result.eqlin.marginals) if a is not None else np.zeros(0)
    return float(result.fun), np.asarray(result.x), marginals


def _solve_hot(c: np.ndarray, block: _Block) -> tuple[float, np.ndarray, np.ndarray] | None:
    """:func:`_solve`, on the block's program kept in HiGHS: only the objective changes, so the last optimal
    basis is still feasible and HiGHS starts from it (the spread tables' programs at 200 earlier releases: 2.8 s
    solved afresh, 1.6 s kept). Only an optimum is taken from it; any other status (unbounded included, which
    would widen an interval to infinity) is solved afresh by :func:`_solve`."""
    global _highs
    if _highs is None:
        return _solve(c, block)
    try:
        if block.hot is None:
            block.hot = _kept_program(block)
        program = block.hot
        program.changeColsCost(len(c), np.arange(len(c), dtype=np.int32), np.asarray(c, float))
        program.run()
        if program.getModelStatus() != _highs.HighsModelStatus.kOptimal:
            block.hot = None  # start afresh next time
            return _solve(c, block)
        solution = program.getSolution()
        x = np.asarray(solution.col_value, float)
        marginals = np.asarray(solution.row_dual, float)[: len(block.independent)]
        return float(program.getInfo().objective_function_value), x, marginals
    except (AttributeError, TypeError, ValueError):  # scipy's private binding changed: linprog from now on
        _highs = None
        block.hot = None
        return _solve(c, block)


def _kept_program(block: _Block) -> object:
    """The block's program in HiGHS (equalities, bound facts as ranged rows, atoms >= 0), objective to come."""
    a, b = block.a[block.independent], block.b[block.independent]
    parts, low, high = [a], [b], [b]
    if block.g is not None and block.g.shape[0]:
        parts.append(block.g)
        low.append(block.g_low)
        high.append(block.g_high)
    matrix = sparse.vstack(parts).tocsc()
    lp = _highs.HighsLp()
    lp.num_col_, lp.num_row_ = matrix.shape[1], matrix.shape[0]
    lp.col_cost_ = np.zeros(matrix.shape[1])
    lp.col_lower_ = np.zeros(matrix.shape[1])
    lp.col_upper_ = np.full(matrix.shape[1], np.inf)
    lp.row_lower_ = np.concatenate(low).astype(float)
    lp.row_upper_ = np.concatenate(high).astype(float)
    lp.a_matrix_.format_ = _highs.MatrixFormat.kColwise
    lp.a_matrix_.start_ = matrix.indptr
    lp.a_matrix_.index_ = matrix.indices
    lp.a_matrix_.value_ = matrix.data.astype(float)
    program = _highs._Highs()
    program.setOptionValue("output_flag", False)
    program.setOptionValue("presolve", "off")
    program.setOptionValue("simplex_strategy", 0)  # HiGHS chooses (primal from a kept basis); dual: 5x slower
    if program.passModel(lp) == _highs.HighsStatus.kError:
        raise ValueError("HiGHS did not take the program")
    return program


class _Pool:
    """Feasible tables found so far (LP optima). A count's LP interval contains its value in each of them, so
    two tables whose values lie far enough apart certify a count without solving its two LPs. Removing
    released counts (more suppression) only enlarges the feasible set, so the tables stay valid while the
    released counts are a subset of those they were found for, and so does ``zero``: an atom some table filled
    then can be filled now."""

    def __init__(self) -> None:
        self.known: dict[int, int] = {}
        self.points: list[np.ndarray] = []
        self.masks: list[np.ndarray] = []  # atoms on which each point is a feasible table (its solved blocks)
        self._stacked: tuple[np.ndarray, np.ndarray] | None = None
        # atoms empty in every table of the last system built: a superset of those empty now (None: not known)
        self.zero: np.ndarray | None = None

    def valid_for(self, known: dict[int, int]) -> None:
        if not all(self.known.get(box) == value for box, value in known.items()):
            self.known, self.points, self.masks, self._stacked, self.zero = dict(known), [], [], None, None
        else:
            self.known = dict(known)

    def add(self, points: list[tuple[np.ndarray, np.ndarray]]) -> None:
        for point, mask in points:
            self.points.append(point)
            self.masks.append(mask)
        self._stacked: tuple[np.ndarray, np.ndarray] | None = None

    def range(self, vector: np.ndarray, needed: np.ndarray) -> tuple[float, float] | None:
        """Range of the vector over the points feasible on every atom of ``needed`` (its blocks' atoms)."""
        if len(self.points) < 2:
            return None
        values = self.on(needed) @ vector
        if len(values) < 2:
            return None
        return float(values.min()), float(values.max())

    def on(self, needed: np.ndarray) -> np.ndarray:
        """The points feasible on every atom of ``needed`` (one row each; none: no row)."""
        if not self.points:
            return np.zeros((0, 0))
        if getattr(self, "_stacked", None) is None or len(self._stacked[0]) != len(self.points):
            self._stacked = (np.stack(self.points), np.stack(self.masks))
        points, masks = self._stacked
        return points[masks[:, needed].all(axis=1)]


def _build_system(
    a: sparse.csr_matrix,
    b: np.ndarray,
    row_box: list[int | None],
    zero: np.ndarray,
    g: sparse.csr_matrix | None = None,
    g_low: np.ndarray | None = None,
    g_high: np.ndarray | None = None,
    maybe_zero: np.ndarray | None = None,
) -> _System:
    """Split ``a x = b`` (with the bound facts ``g_low <= g x <= g_high``) into independent blocks, fix each
    block's implicit zeros and factorise its equalities (SVD). ``maybe_zero``: the only atoms that can be
    empty in every table (None: any), when a system with more facts over the same atoms was solved before
    (:attr:`_Pool.zero`)."""
    n_atoms = a.shape[1]
    keep = np.flatnonzero(~zero)
    a_live = a[:, keep].tocsr()
    a_live.eliminate_zeros()
    nonempty = np.diff(a_live.indptr) > 0
    if np.any(np.abs(b[~nonempty]) > 0.5):
        raise AuditError("the released counts contradict each other (no table is consistent with them)", VALUES_REFUSED)
    row_ids = np.flatnonzero(nonempty)
    a_live = a_live[row_ids]
    if g is None:
        g = sparse.csr_matrix((0, n_atoms))
        g_low = g_high = np.zeros(0)
    assert g_low is not None and g_high is not None
    g_live = g[:, keep].tocsr()
    # Keep a linearly independent set of rows, preferring sparse ones: a dense total implied by its parts
    # (records read, analysed) is dropped, which splits the system into smaller blocks and spares HiGHS the
    # redundant rows. The choice is made on a random sketch of the rows (``_independent_rows``) and then
    # proved: every dropped row must lie in the row space of the blocks built without it (its value is then
    # the same in every table they allow, checked against b below). Otherwise the exact choice is made, and
    # if even that cannot be proved every row is kept.
    system = None
    for method in ("sketch", "exact", "all"):
        chosen = np.arange(len(row_ids)) if method == "all" else _independent_rows(a_live, method == "sketch")
        system = _blocks(a, b, row_box, zero, keep, row_ids, a_live, chosen, g_live, g_low, g_high, maybe_zero)
        dropped = np.setdiff1d(np.arange(len(row_ids)), chosen)
        if len(dropped) == 0:
            break
        rows = np.zeros((len(dropped), n_atoms))
        rows[:, keep] = a_live[dropped].toarray()
        rows[:, system.zero] = 0.0
        norms = np.sqrt(np.sum(rows**2, axis=1))
        if np.all(system.residuals(rows) <= 1e-7 * np.maximum(norms, 1.0)):
            break
    assert system is not None
    if len(row_ids) and np.max(np.abs(a_live @ system.solution[keep] - b[row_ids])) > 1e-6 * (1 + np.max(np.abs(b))):
        raise AuditError("the released counts contradict each other (no table is consistent with them)", VALUES_REFUSED)
    return system


_SKETCH_FROM = 2_000_000  # entries of a part's dense matrix (16 MB) above which its rows are chosen on a sketch
_CHUNK = 128  # rows projected together by :func:`_first_independent` (one matrix product per chunk)


def _independent_rows(a_live: sparse.csr_matrix, sketch: bool) -> np.ndarray:
    """Positions of a linearly independent set of rows spanning the row space, preferring sparse rows: per
    connected part of the system (a site's history grows the system, not its parts), the rows taken by
    increasing number of atoms (then position), each kept unless it is a combination of those kept before it
    (:func:`_first_independent`). ``sketch``: a large part (more than ``_SKETCH_FROM`` entries) is judged on a
    Gaussian sketch of its atoms (as many as the part's rows and a quarter more; each atom spread over four of
    them) instead of every atom, which keeps the rows' linear dependences (almost surely) at a fraction of the
    cost; the caller proves the choice. The choice steers which cells a repair withholds (through the rows'
    weights), so it is a fixed order's, not a pivoted QR's: that one broke ties between rows of equal norm (the
    cells of a table) by rounding, and so by the BLAS kernel."""
    m0 = a_live.shape[0]
    if m0 == 0:
        return np.zeros(0, np.int64)
    graph = sparse.bmat([[None, a_live], [a_live.T, None]]).tocsr()
    _, labels = connected_components(graph, directed=False)
    chosen_parts = []
    for label in np.unique(labels[:m0]):
        rows_here = np.flatnonzero(labels[:m0] == label)
        sub = a_live[rows_here]
        order = _sparse_first(np.diff(sub.indptr))
        rows_here, sub = rows_here[order], sub[order]
        cols = np.unique(sub.indices)
        m, n = len(rows_here), len(cols)
        width = m + max(16, m // 4)
        if sketch and n > 2 * width and m * n > _SKETCH_FROM:
            # each atom adds a Gaussian multiple of its column to four random columns of the sketch
            rng = np.random.default_rng([m, n])  # the same system gets the same choice
            spread = sparse.csr_matrix(
                (rng.standard_normal(4 * n), (np.repeat(np.arange(n), 4), rng.integers(0, width, 4 * n))),
                shape=(n, width),
            )
            matrix = (sub[:, cols] @ spread).toarray()
        else:
            matrix = sub[:, cols].toarray()
        chosen_parts.append(rows_here[_first_independent(matrix)])
    return np.sort(np.concatenate(chosen_parts))


def _sparse_first(nonzeros: np.ndarray) -> np.ndarray:
    """The order in which rows are offered to :func:`_first_independent`: by number of atoms, then position."""
    return np.lexsort((np.arange(len(nonzeros)), nonzeros))


def _first_independent(rows: np.ndarray, tolerance: float = 1e-9) -> np.ndarray:
    """Positions of the rows, taken in order, that are not combinations of the rows before them: the first
    basis of the row space in this order (Gram-Schmidt, each kept row projected twice). Unique, so it does not
    depend on rounding: a kept row stands at least ``tolerance`` of its norm away from the rows before it
    (rows of counts: 1e-3 or more), a dependent one about 1e-15."""
    m, n = rows.shape
    norms = np.sqrt(np.einsum("ij,ij->i", rows, rows))
    basis = np.zeros((min(m, n), n))  # orthonormal, spans the rows kept so far
    kept = 0
    chosen: list[int] = []
    for start in range(0, m, _CHUNK):
        if kept == n:
            break  # the rows kept span every direction: the rest depend on them
        chunk = np.array(rows[start : start + _CHUNK], dtype=float)
        chunk -= (chunk @ basis[:kept].T) @ basis[:kept]  # a row in their span: about 1e-15 of it is left
        for i in range(len(chunk)):
            if math.sqrt(float(chunk[i] @ chunk[i])) <= tolerance * norms[start + i]:
                continue
            # a row kept: projected once more (twice is enough), so that the basis stays orthonormal to rounding
            residual = chunk[i] - basis[:kept].T @ (basis[:kept] @ chunk[i])
            size = math.sqrt(float(residual @ residual))
            if size <= tolerance * norms[start + i]:
                continue
            basis[kept] = residual / size
            chunk[i + 1 :] -= np.outer(chunk[i + 1 :] @ basis[kept], basis[kept])
            kept += 1
            chosen.append(start + i)
    return np.array(chosen, dtype=np.int64)


def _blocks(
    a: sparse.csr_matrix,
    b: np.ndarray,
    row_box: list[int | None],
    zero: np.ndarray,
    keep: np.ndarray,
    all_ids: np.ndarray,
    all_live: sparse.csr_matrix,
    chosen: np.ndarray,
    g_live: sparse.csr_matrix,
    g_low: np.ndarray,
    g_high: np.ndarray,
    maybe_zero: np.ndarray | None,
) -> _System:
    """The system over the ``chosen`` rows: its blocks, each with its implicit zeros fixed and factorised."""
    n_atoms = a.shape[1]
    zero = zero.copy()
    row_ids, a_live = all_ids[chosen], all_live[chosen]
    m, q = len(row_ids), g_live.shape[0]
    blocks: list[_Block] = []
    in_rows = np.zeros(n_atoms, bool)
    if m or q:
        both = sparse.vstack([a_live, g_live]).tocsr()
        in_rows[keep[np.unique(both.indices)]] = True
        graph = sparse.bmat([[None, both], [both.T, None]]).tocsr()
        _, labels = connected_components(graph, directed=False)
        row_labels, g_labels, atom_labels = labels[:m], labels[m : m + q], labels[m + q :]
        for label in np.unique(labels[: m + q]):
            r_local = np.flatnonzero(row_labels == label)
            q_local = np.flatnonzero(g_labels == label)
            c_local = np.flatnonzero(atom_labels == label)
            if len(c_local) == 0:
                continue
            sub = a_live[r_local][:, c_local].tocsr()
            rhs = b[row_ids[r_local]]
            # A strictly positive solution is an interior point: then no atom is forced to zero and the LP
            # that finds such atoms can be skipped. The min-norm solution is tried (from the rows' Gram
            # matrix, cheaper than the SVD below and checked against the rows). Where only some atoms can be
            # forced to zero (``maybe_zero``), the LP asks about those alone, and none means no LP.
            among = None if maybe_zero is None else maybe_zero[keep[c_local]]
            if len(r_local) and (among is None or among.any()) and not _interior(sub, rhs):
                implicit = _implicit_zeros(sub, rhs, among=among)
                if implicit.any():
                    zero[keep[c_local[implicit]]] = True
                    c_local = c_local[~implicit]
                    sub = sub[:, ~implicit].tocsr()
                    if len(c_local) == 0:
                        continue
            dense = sub.toarray()
            basis, left, solution = _factorise(dense, rhs)
            rank = basis.shape[1]
            independent = np.arange(len(r_local))
            if rank < len(r_local):  # fixing implicit zeros can make rows dependent again
                order = _sparse_first(np.count_nonzero(dense, axis=1))
                independent = np.sort(order[_first_independent(dense[order])])
                if len(independent) < rank:  # never fewer rows than the rank: the programs would lose a fact
                    independent = np.arange(len(r_local))
            block = _Block(keep[c_local], row_ids[r_local], sub, rhs, basis, left, solution, independent)
            if len(q_local):
                block.g = g_live[q_local][:, c_local].tocsr()
                block.g_low, block.g_high = g_low[q_local], g_high[q_local]
            blocks.append(block)
    free = ~zero & ~in_rows
    atom_block = np.full(n_atoms, -1)
    solution = np.zeros(n_atoms)
    for i, block in enumerate(blocks):
        atom_block[block.atoms] = i
        solution[block.atoms] = block.solution
    return _System(a, b, row_box, zero, free, blocks, atom_block, solution)


def _interior(a: sparse.csr_matrix, b: np.ndarray) -> bool:
    """Whether the min-norm solution of ``a x = b`` is strictly positive (then every atom can be positive)."""
    gram = (a @ a.T).toarray()
    y = np.linalg.lstsq(gram, b, rcond=None)[0]
    x = a.T @ y
    scale = 1.0 + float(np.max(np.abs(b), initial=0.0))
    return bool(np.min(x, initial=1.0) > 1e-9 and np.max(np.abs(a @ x - b), initial=0.0) <= 1e-9 * scale)


def _factorise(dense: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row-space basis, the map to min-norm row combinations, and the min-norm solution (one SVD)."""
    if dense.shape[0] == 0:
        return np.zeros((dense.shape[1], 0)), np.zeros((0, 0)), np.zeros(dense.shape[1])
    u, s, vt = np.linalg.svd(dense, full_matrices=False)
    rank = int(np.sum(s > max(dense.shape) * np.finfo(float).eps * max(s[0], 1.0) * 10)) if len(s) else 0
    basis = vt[:rank].T
    left = u[:, :rank] / s[:rank]
    return basis, left, basis @ (left.T @ rhs)


def _implicit_zeros(
    a: sparse.csr_matrix, b: np.ndarray, homogeneous: bool = False, among: np.ndarray | None = None
) -> np.ndarray:
    """Atoms that are zero in every non-negative solution of ``a x = b`` (one LP).

    Maximise the number of atoms that can be made positive: ``a x = b t``, ``t >= 1``, ``0 <= z <= 1``,
    ``z <= x``. Scaling by ``t`` lets every atom that can be positive reach 1 at once, so at the optimum
    ``z = 0`` exactly for the atoms that are empty in every feasible table (Freund, Roundy & Todd 1985).
    ``among``: only these atoms are asked about (one ``z`` each); the others are known to be positive in some
    table and are returned False.
    """
    m, n = a.shape
    # An atom no equality names can be filled at will, and leaving its column out changes nothing else: a block
    # joined by bound facts alone can hold thousands of such atoms around one equality.
    named = np.flatnonzero(np.diff(a.tocsc().indptr) > 0)
    asked = named if among is None else np.intersect1d(named, np.flatnonzero(among))
    if n == 0 or len(asked) == 0:
        return np.zeros(n, bool)
    if len(named) < n:
        implicit = np.zeros(n, bool)
        implicit[named] = _implicit_zeros(a[:, named].tocsr(), b, homogeneous, np.isin(named, asked))
        return implicit
    p = len(asked)
    pick = sparse.csr_matrix((np.ones(p), (np.arange(p), asked)), shape=(p, n))
    a_eq = sparse.hstack([a, sparse.csr_matrix((m, p)), sparse.csr_matrix(-b.reshape(-1, 1))]).tocsr()
    a_ub = sparse.hstack([-pick, sparse.identity(p, format="csr"), sparse.csr_matrix((p, 1))]).tocsr()
    c = np.concatenate([np.zeros(n), -np.ones(p), [0.0]])
    bounds = [(0, None)] * n + [(0, 1)] * p + [(0, 0) if homogeneous else (1, None)]
    result = linprog(
        c,
        A_ub=a_ub,
        b_ub=np.zeros(p),
        A_eq=a_eq,
        b_eq=np.zeros(m),
        bounds=bounds,
        method="highs-ds",
        options={"presolve": False},  # a third faster on these systems (measured at 100 earlier releases)
    )
    if result.status == 2:
        raise AuditError("the released counts contradict each other (no table is consistent with them)", VALUES_REFUSED)
    if result.status != 0:
        raise AuditError("the audit's linear program did not solve; the release is withheld", VALUES_REFUSED)
    implicit = np.zeros(n, bool)
    implicit[asked] = result.x[n : n + p] < 0.5
    return implicit
