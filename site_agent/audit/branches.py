"""A second look at what the audit found, for a recipient that reasons on "0, or at least k" exactly.

Where zeros are shown, a count withheld as not small (``complementary`` or ``audit``) is "0, or at least k"
to its recipient. That is not a linear fact, so the audit's linear programs take the branch the count is
really in (:func:`~.facts.withheld_bounds`): sound, because the recipient can only know less, but it can find
a count or a region worked out that the recipient could not work out, for whom the other branch stays open.

Before a finding makes the site withhold more, :class:`Branches` looks for a proof that the recipient, who
knows "0, or at least k" only as the disjunction it is, still cannot work the count (or region) out: one
whole-number table that satisfies every fact and gives it a value far enough beyond the audit's own interval
(the true table lies inside that interval, so the two are the values the recipient cannot tell apart). The
search is cheap first: the linear relaxation (in which the disjunction says nothing) rules most findings out
at once; then, on each side it leaves open, each such count's branch is fixed as the relaxation's optimum
leans (two choices) and a linear program, then integer programs with a node limit, look for the table (first
on the counts near the linear program's table, the others held at 0; then on all: :func:`_near`).
Each table found is checked against every fact here, not taken from the solver on trust. The disjunction is
written with a 0/1 variable ``y`` per count (``count >= k y``, ``count <= M y``, ``M`` at least any count).

The tables found are kept for the audit's later evaluations (the repair rounds of one request, and its cut-back
attempts; at most ``KEPT_TABLES``) and tried first there: a table still proves a finding open when it covers
the finding's atoms, is a whole-number table of every fact of that evaluation (each "0, or at least k" in the
branch its count takes there) and lies beyond that evaluation's interval. On the demo's full request the same
questions came back in round after round with a withheld count more (230 second looks on 28 distinct
questions; 7.95 s of their 8.4 s went to questions asked before), and a fresh search within its node limit
did not always find again what an earlier one had found: so a repair round can withhold less than a fresh
audit of the same round would, and only on a table every fact of the round allows.

Anything short of a proof (no table found, a program too large, a solver error, the budget spent) keeps the
finding, so the site withholds as before. Dropping a finding is sound because the tables satisfy every fact
the linear programs hold (shown values, relations, the rules' other facts, the models and domains through the
atoms, whole numbers) and each disjunction in place of its true branch. What it leaves out on purpose: a table
that only the full integer program with free branches would find (it cost 20 s more on the demo for a few
more counts released), so the audit can still withhold more than a recipient could work out.

Reference: the big-M formulation of a disjunction, e.g. Wolsey, *Integer Programming*, Wiley 1998, §1.5.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from typing import Any

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint, linprog
from scipy.sparse.csgraph import connected_components

from .facts import NOT_SMALL_RULES, AuditError, withheld_bounds
from .programs import integer_program
from .system import _Block, _solve_hot

# Each integer program explores at most this many branch-and-bound nodes (a bound that does not depend on the
# machine's speed, so that the same records give the same release); the seconds are only a guard. At most
# this many programs run per evaluation; every finding left after that stands (the site withholds more, as
# without this second look).
NODE_LIMIT = 200
PROGRAM_SECONDS = 10.0
BUDGET_PROGRAMS = 200
# Tables kept across the evaluations of one audit (its repair rounds and cut-back attempts), the latest first.
KEPT_TABLES = 64
MAX_ATOMS = 4_000  # a larger part of the model is not asked (its findings stand)
# A row of at most this many columns through a count the linear table leaves fractional is freed in the
# second of the smaller integer programs (:func:`_near`)
NEAR_ROW = 100


class Branches:
    """The recipient's disjunctions over one system of the audit (see the module docstring).

    ``incidence`` is the audit's box-by-atom matrix, ``known`` the shown value of each box, ``relations`` the
    homogeneous relation rows, ``zero`` the atoms known to be empty whatever the branches (structural, and
    those of a shown 0), ``facts`` per release ``(rules, zero, min_cell_size, allow_zero, box of each name)``.
    """

    def __init__(
        self,
        incidence: sparse.csr_matrix,
        known: Mapping[int, int],
        relations: sparse.csr_matrix,
        zero: np.ndarray,
        facts: Sequence[tuple[Mapping[str, str], Mapping[str, bool], int, bool, Mapping[str, int]]],
        tables: list[np.ndarray] | None = None,
    ) -> None:
        self._relaxed: dict[tuple, _Block] = {}
        # Tables found by earlier evaluations of the same audit (its repair rounds: NaN where a table says
        # nothing), tried first; each is checked against every fact of this evaluation before it is used.
        self.tables = tables if tables is not None else []
        self.programs = 0  # programs solved so far in this evaluation
        linear: dict[int, tuple[float, float]] = {}
        either: dict[int, int] = {}  # box -> k of the release that withheld it as not small
        for rules, zeros, k, allow_zero, box_of in facts:
            # every such count, also one whose branch no ledger entry recorded (written before ``zero`` was):
            # its recipient knows the disjunction, though the linear programs could give it no fact
            branches = {n for n, rule in rules.items() if rule in NOT_SMALL_RULES and allow_zero}
            lines = withheld_bounds({n: r for n, r in rules.items() if n not in branches}, zeros, k, allow_zero)
            for name in branches:
                box = box_of.get(name)
                if box is not None and box not in known and k >= 1:
                    either[box] = max(either.get(box, 0), k)
            for name, (low, high) in lines.items():
                box = box_of.get(name)
                if box is None or box in known:
                    continue
                old = linear.get(box, (0.0, math.inf))
                linear[box] = (max(old[0], low), min(old[1], high))
        self.either = either
        if not either:
            return
        n_atoms = incidence.shape[1]
        live = np.flatnonzero(~zero)
        self.live = live
        position = np.full(n_atoms, -1)
        position[live] = np.arange(len(live))
        self.position = position
        boxes = sorted(known)
        eq = sparse.vstack([incidence[boxes], relations]).tocsr()[:, live] if boxes else relations[:, live]
        eq_b = np.concatenate([np.array([known[j] for j in boxes], float), np.zeros(relations.shape[0])])
        bounded = sorted(linear)
        lines_m = incidence[bounded][:, live] if bounded else sparse.csr_matrix((0, len(live)))
        ors = sorted(either)
        ors_m = incidence[ors][:, live] if ors else sparse.csr_matrix((0, len(live)))
        # an upper bound on any count: every count lies inside the records read, which some shown box holds
        # at least as often as the largest shown count; the sum of the shown counts bounds it (a bound too
        # small could only add knowledge: then a finding stays)
        self.big = float(sum(known.values()) + max(either.values()) + 1)
        self.eq, self.eq_b = eq, eq_b
        self.lines, self.lines_low = lines_m, np.array([linear[j][0] for j in bounded])
        self.lines_high = np.array([linear[j][1] for j in bounded])
        self.ors, self.ors_k = ors_m, np.array([either[j] for j in ors], float)
        # parts of the model that no row ties together: a count's programs need only its own parts
        stacked = sparse.vstack([eq, lines_m, ors_m]).tocsr()
        graph = sparse.bmat([[None, stacked], [stacked.T, None]]).tocsr()
        _, labels = connected_components(graph, directed=False)
        self.rows = stacked.shape[0]
        self.row_label, self.atom_label = labels[: self.rows], labels[self.rows :]

    def open(self, vector: np.ndarray, need: int, low: int, high: int) -> tuple[int, int] | None:
        """An interval of ``vector`` the recipient cannot narrow (both ends reached by whole-number tables of
        every fact, or lying inside the audit's own interval ``[low, high]``, which holds the true table) when it
        holds at least ``need`` values; None otherwise (the finding stands)."""
        if not self.either:
            return None
        on = np.flatnonzero(vector)
        if np.any(self.position[on] < 0):
            on = on[self.position[on] >= 0]  # atoms known empty add nothing
        if len(on) == 0:
            return None
        labels = np.unique(self.atom_label[self.position[on]])
        cols = np.flatnonzero(np.isin(self.atom_label, labels))
        rows = np.flatnonzero(np.isin(self.row_label, labels))
        n_eq, n_lines = self.eq.shape[0], self.lines.shape[0]
        eq_rows = rows[rows < n_eq]
        line_rows = rows[(rows >= n_eq) & (rows < n_eq + n_lines)] - n_eq
        or_rows = rows[rows >= n_eq + n_lines] - n_eq - n_lines
        if len(cols) > MAX_ATOMS or not len(or_rows):
            return None  # too large to ask, or no disjunction touches it: the linear programs were exact here
        m = len(or_rows)
        n = len(cols)
        blocks = []
        lows, highs = [], []
        if len(eq_rows):
            blocks.append(sparse.hstack([self.eq[eq_rows][:, cols], sparse.csr_matrix((len(eq_rows), m))]))
            lows.append(self.eq_b[eq_rows])
            highs.append(self.eq_b[eq_rows])
        if len(line_rows):
            blocks.append(sparse.hstack([self.lines[line_rows][:, cols], sparse.csr_matrix((len(line_rows), m))]))
            lows.append(self.lines_low[line_rows])
            highs.append(self.lines_high[line_rows])
        ors = self.ors[or_rows][:, cols]
        pick = sparse.identity(m, format="csr")
        blocks.append(sparse.hstack([ors, -sparse.diags(self.ors_k[or_rows]) @ pick]))  # count - k y >= 0
        lows.append(np.zeros(m))
        highs.append(np.full(m, np.inf))
        blocks.append(sparse.hstack([ors, -self.big * pick]))  # count - M y <= 0
        lows.append(np.full(m, -np.inf))
        highs.append(np.zeros(m))
        matrix = sparse.vstack(blocks).tocsr()
        constraint = LinearConstraint(matrix, np.concatenate(lows), np.concatenate(highs))
        target = np.zeros(n + m)
        target[:n] = vector[self.live[cols]]
        for earlier in reversed(self.tables):  # costs no program: the budget below does not bound it
            found = self._beyond(earlier[self.live[cols]], matrix, constraint, target, ors, or_rows, need, low, high)
            if found is not None:
                return found
        if self.programs >= BUDGET_PROGRAMS:
            return None
        # The linear relaxation first (cheap): where even it keeps fewer than ``need`` values, so do the whole-
        # number tables, whose set lies inside it. Relaxed, "0 or at least k" says nothing (0 <= y <= 1 lets the
        # count take any value), so the relaxation is the other facts alone: one program per part of the model,
        # kept in HiGHS between objectives (:func:`~.system._solve_hot`).
        key = tuple(labels.tolist())
        if key not in self._relaxed:
            a = self.eq[eq_rows][:, cols].tocsr()
            block = _Block(cols, eq_rows, a, self.eq_b[eq_rows], None, None, None, np.arange(len(eq_rows)))
            if len(line_rows):
                block.g = self.lines[line_rows][:, cols].tocsr()
                block.g_low, block.g_high = self.lines_low[line_rows], self.lines_high[line_rows]
            self._relaxed[key] = block
        relaxed: dict[float, tuple[float, np.ndarray]] = {}
        for sign in (1.0, -1.0):
            self.programs += 1
            try:
                solved = _solve_hot(-sign * target[:n], self._relaxed[key])
            except AuditError:
                return None
            if solved is None:
                return None  # unbounded: not asked (the audit's own interval was finite)
            x = np.concatenate([solved[1], np.zeros(m)])
            relaxed[sign] = (float(target @ x), x)
        # The true table lies in the audit's own interval [low, high]. One whole-number table of the facts
        # at or beyond ``high + need - 1`` (or ``low - need + 1``) proves that the recipient keeps at least
        # ``need`` values. Each count's branch fixed as the relaxation's optimum leans: the linear program
        # (its optimum is often whole already), then the integer program, which stops at the first table.
        sides = []
        if math.floor(relaxed[1.0][0] + 1e-6) >= high + need - 1:
            sides.append((1.0, high + need - 1))
        if math.ceil(relaxed[-1.0][0] - 1e-6) <= low - need + 1:
            sides.append((-1.0, -(low - need + 1)))
        for sign, beyond in sides:
            constraints = [constraint, LinearConstraint(sign * target, beyond, np.inf)]
            counts = self.ors[or_rows][:, cols] @ relaxed[sign][1][:n]
            k = self.ors_k[or_rows]
            tried: list[tuple[float, ...]] = []
            for leaning in ((counts >= k / 2).astype(float), (counts > 1e-6).astype(float)):
                if tuple(leaning) in tried:
                    continue
                tried.append(tuple(leaning))
                fixed = Bounds(np.concatenate([np.zeros(n), leaning]), np.concatenate([np.full(n, np.inf), leaning]))
                linear = self._solve(-sign * target, constraints, np.zeros(n + m), fixed)
                if linear is None or linear.status != 0:
                    continue  # this choice of branches has no table beyond: nor whole-number ones
                table = self._table(linear, matrix, constraint)
                for free in [] if table is not None else [*_near(linear.x, constraints, n), None]:
                    # the integer program on the atoms near the linear table first (much smaller), then whole
                    bounds = fixed if free is None else Bounds(fixed.lb, np.where(free, fixed.ub, 0.0))
                    table = self._table(
                        self._solve(np.zeros(n + m), constraints, np.ones(n + m), bounds), matrix, constraint
                    )
                    if table is not None:
                        break
                if table is not None and sign * round(float(target @ table)) >= beyond:
                    value = round(float(target @ table))
                    kept = np.full(len(self.position), np.nan)
                    kept[self.live[cols]] = table[:n]
                    self.tables.append(kept)
                    del self.tables[:-KEPT_TABLES]
                    return min(low, value), max(high, value)
        return None

    def _beyond(
        self,
        x: np.ndarray,
        matrix: sparse.csr_matrix,
        constraint: LinearConstraint,
        target: np.ndarray,
        ors: sparse.csr_matrix,
        or_rows: np.ndarray,
        need: int,
        low: int,
        high: int,
    ) -> tuple[int, int] | None:
        """An earlier table's answer here: the interval it proves, if it covers these atoms, is a whole-number
        table of every fact of this evaluation (each "0 or at least k" in the branch its count takes) and puts
        the count ``need - 1`` beyond the audit's interval; None otherwise."""
        if np.isnan(x).any():
            return None
        counts = ors @ x
        k = self.ors_k[or_rows]
        if np.any((counts > 0.5) & (counts < k - 0.5)):
            return None  # a count this evaluation knows as "0, or at least k" lies between
        table = self._checked(np.concatenate([x, (counts >= k - 0.5).astype(float)]), matrix, constraint)
        if table is None:
            return None
        value = round(float(target @ table))
        if value >= high + need - 1 or value <= low - need + 1:
            return min(low, value), max(high, value)
        return None

    def _solve(
        self, objective: np.ndarray, constraints: list[LinearConstraint], integrality: np.ndarray, bounds: Bounds
    ) -> Any:
        self.programs += 1
        try:
            if not integrality.any():  # a linear program: HiGHS's dual simplex without presolve, 2.5x faster here
                return _linear(objective, constraints, bounds)
            return integer_program(
                objective,
                constraints=constraints,
                integrality=integrality,
                bounds=bounds,
                options={"node_limit": NODE_LIMIT, "time_limit": PROGRAM_SECONDS},
            )
        except (ValueError, RuntimeError):
            return None

    @staticmethod
    def _table(result: Any, matrix: sparse.csr_matrix, constraint: LinearConstraint) -> np.ndarray | None:
        """The solver's table if it is a whole-number table of every fact (checked here, not trusted)."""
        if result is None or result.x is None:
            return None
        return Branches._checked(result.x, matrix, constraint)

    @staticmethod
    def _checked(x: np.ndarray, matrix: sparse.csr_matrix, constraint: LinearConstraint) -> np.ndarray | None:
        """``x`` rounded, if it is a whole-number table of every fact; None otherwise."""
        table = np.round(x)
        if np.max(np.abs(x - table), initial=0.0) > 1e-6:
            return None
        slack = 1e-6 * (1.0 + np.abs(constraint.lb[np.isfinite(constraint.lb)]).max(initial=0.0))
        values = matrix @ table
        if np.any(values < constraint.lb - slack) or np.any(values > constraint.ub + slack):
            return None
        return table


def _near(x: np.ndarray, constraints: list[LinearConstraint], n: int) -> list[np.ndarray]:
    """Which columns the smaller integer programs leave free (the others held at 0), tried in turn before the whole
    program: the linear table's nonzero counts; then also every count of a short row (at most ``NEAR_ROW``
    columns) through one of its fractional counts. The branch variables (after the first ``n``) stay as fixed.
    A table found there is a whole-number table of every fact like any other (checked); where none is found,
    the whole program still runs. So the second look proves open at least what it did before, sooner, and
    sometimes a table the whole program's node limit missed, unless the smaller programs, which count against
    ``BUDGET_PROGRAMS`` like any other, spend the budget first (at 50 earlier releases in ``make bench``: integer
    programs of 3,004 counts, 5.6-6.7 s each whole, 0.15-0.24 s near the linear table)."""
    rows = sparse.vstack([sparse.csr_matrix(c.A) for c in constraints]).tocsr()
    fractional = np.flatnonzero(np.abs(x - np.round(x)) > 1e-6)
    support = x > 1e-9
    support[n:] = True
    short = np.diff(rows.indptr) <= NEAR_ROW
    touching = short & (np.asarray(abs(rows[:, fractional]).sum(axis=1)).ravel() > 0)
    near = support | (np.asarray(abs(rows[touching]).sum(axis=0)).ravel() > 0)
    return [support, near] if near.sum() > support.sum() else [support]


def _linear(objective: np.ndarray, constraints: list[LinearConstraint], bounds: Bounds) -> Any:
    """:func:`scipy.optimize.linprog` on ``lb <= A x <= ub`` rows (equalities where ``lb == ub``)."""
    matrix = sparse.vstack([sparse.csr_matrix(c.A) for c in constraints]).tocsr()
    lb = np.concatenate([np.broadcast_to(c.lb, c.A.shape[:1]) for c in constraints]).astype(float)
    ub = np.concatenate([np.broadcast_to(c.ub, c.A.shape[:1]) for c in constraints]).astype(float)
    eq = lb == ub
    above, below = np.isfinite(ub) & ~eq, np.isfinite(lb) & ~eq
    return linprog(
        objective,
        A_ub=sparse.vstack([matrix[above], -matrix[below]]).tocsr(),
        b_ub=np.concatenate([ub[above], -lb[below]]),
        A_eq=matrix[eq] if eq.any() else None,
        b_eq=lb[eq] if eq.any() else None,
        bounds=np.column_stack([bounds.lb, bounds.ub]),
        method="highs-ds",
        options={"presolve": False},
    )
