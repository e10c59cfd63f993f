"""Audit by linear programming: what could a recipient of every release to a study work out?

The recipient of a study's releases knows, for every count it was sent, the count's definition (a box: a
conjunction of conditions over record variables) and, where it was not suppressed, its value; it also knows
the additive relations between counts (records read = analysed + excluded, ...). Everything it can infer about
the site's records follows from these linear facts and from counts being non-negative whole numbers.

**Model.** The *atoms* are the common refinement of every box released to the study: the largest regions of
record space that no released definition splits (two points of record space lie in the same atom when exactly
the same boxes contain them). The unknowns are the atom counts ``x >= 0``; each released count says that the
sum of its atoms equals its value, and each relation says that two sums are equal. Structural knowledge that
every recipient has is added explicitly: only analysed records have a score, and an analysed record's outcome
is ``"0"`` or ``"1"``. Excluded records therefore have no score or outcome split.

**What is checked.**

1. Every suppressed count, of this release and of every earlier release to the study: its feasible interval
   ``[min, max]`` (two linear programs, HiGHS through :func:`scipy.optimize.linprog`) must hold at least
   ``protection_width`` whole numbers (default 2: it can never be worked out exactly).
2. Differencing: every atom, and every difference ``F \\ G`` of two nested boxes (``G`` inside ``F``), must
   not be exactly determined with a value the policy would suppress (1..k−1, and 0 when zeros may not be
   shown). A region is exactly determined when its indicator vector lies in the row space of the equality
   system after the atoms that are zero in every feasible table are fixed (found with one LP per block);
   this is exact for the real relaxation and costs one SVD per block instead of one LP per region.

**Integrality.** The true interval of a count over whole-number tables can only be narrower than the LP
relaxation's. We round the LP bounds inward (``ceil(min)``, ``floor(max)``), and where it is cheap (a
suppressed count whose rounded interval holds fewer than ``protection_width + 2`` values) we solve the two
integer programs exactly with :func:`scipy.optimize.milp` under a time limit, keeping the LP bound if the
limit is hit. Differencing (check 2) is decided on the relaxation: a region the relaxation cannot pin down
may, in rare non-unimodular systems (three or more cross-classified variables), still be pinned down over
whole numbers; this is a known limit of the method (Hundepool et al. 2012, §4.3).

References
----------
Hundepool A, Domingo-Ferrer J, Franconi L, et al. *Statistical Disclosure Control*. Wiley, 2012, ch. 4
(tabular data: sensitivity rules, feasibility intervals, secondary suppression, linked tables).
Fischetti M, Salazar-González JJ. Solving the cell suppression problem on tabular statistical data
protected by lower and upper protection levels. *Management Science* 2001;47(7):1008–1027 (the LP audit).
"""

from __future__ import annotations

import math
import time
from bisect import bisect_left
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import sparse
from scipy.linalg import qr
from scipy.optimize import Bounds, LinearConstraint, linprog, milp
from scipy.sparse.csgraph import connected_components
from threadpoolctl import threadpool_limits

from federation.protocol import PolicyViolation

from .counts import Condition, CountDef, Relation

STATUS = "status"
ANALYSED = "analysed"
OUTCOME = "outcome"
OUTCOME_VALUES = ("0", "1")
SCORED = ("score", "score.compare")  # variables only analysed records have
OTHER = "\x00other"  # the categorical cell for every value no definition names (never shown)
MAX_ATOMS = 200_000
MILP_MAX_ATOMS = 60  # integer programs run where a count's blocks are this small (cheap); else inward rounding
_TOL = 1e-7


class AuditError(PolicyViolation):
    """The audit cannot model the facts (they contradict each other, or are too many)."""


@dataclass(frozen=True)
class ReleaseFacts:
    """What one release told (or, for the release being audited, would tell) the study's recipient.

    ``values[name]`` is ``None`` for a suppressed count. ``bundle`` qualifies the score variables, so that two
    releases scored with different models are not mistaken for the same variable.
    """

    label: str
    definitions: Mapping[str, CountDef]
    values: Mapping[str, int | None]
    relations: Sequence[Relation] = ()
    bundle: str = ""

    @classmethod
    def from_dict(cls, label: str, raw: Any, bundle: str = "") -> ReleaseFacts:
        """Read the ``facts`` of a ledger entry (a dict with ``counts`` and ``relations``, or a bare list)."""
        counts = raw.get("counts", []) if isinstance(raw, dict) else raw
        relations = raw.get("relations", []) if isinstance(raw, dict) else []
        definitions = {c["name"]: CountDef.from_dict(c) for c in counts}
        values = {c["name"]: c.get("value") for c in counts}
        rels = tuple(Relation(r["total"], tuple(r["parts"])) for r in relations)
        return cls(label, definitions, values, rels, raw.get("bundle", bundle) if isinstance(raw, dict) else bundle)


@dataclass(frozen=True)
class Interval:
    """Feasible whole-number interval of one suppressed count, as the recipient could compute it."""

    name: str
    low: int
    high: int | None  # None = unbounded above
    exact: bool = True  # False: the true interval is at least this wide (certified by two feasible tables)

    @property
    def values(self) -> float:
        return math.inf if self.high is None else max(0, self.high - self.low + 1)

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "low": self.low, "high": self.high, "exact": self.exact}


@dataclass(frozen=True)
class Finding:
    """One way the releases, taken together, would break the policy (described without any count value)."""

    kind: str  # "suppressed" (a suppressed count pinned down) or "difference" (a small region worked out)
    release: str  # label of the release whose count or region is exposed
    names: tuple[str, ...]  # the counts involved (the site's own view; never sent)
    candidates: tuple[str, ...]  # counts of the audited release whose suppression could break it, best first

    def describe(self) -> str:
        if self.kind == "suppressed":
            return f"suppressed count {self.names[0]} (release {self.release}) could be worked out"
        return f"a small count could be worked out by differencing {' and '.join(self.names)}"


@dataclass
class AuditResult:
    ok: bool
    intervals: dict[str, Interval]  # suppressed counts of the audited release
    findings: list[Finding]
    atoms: int
    constraints: int
    releases: int
    seconds: float
    protection_width: int
    unrepairable: bool = False

    def to_dict(self) -> dict[str, Any]:
        return {
            "ok": self.ok,
            "protection_width": self.protection_width,
            "releases_considered": self.releases,
            "atoms": self.atoms,
            "constraints": self.constraints,
            "seconds": round(self.seconds, 3),
            "intervals": [i.to_dict() for i in sorted(self.intervals.values(), key=lambda i: i.name)],
            "findings": [
                {"kind": f.kind, "release": f.release, "names": list(f.names), "text": f.describe()}
                for f in self.findings
            ],
        }


# --- boxes: normalised definitions ------------------------------------------------------------------------

Constraint = tuple[float, float] | frozenset[str]  # numeric [low, high) or categorical value set
Box = tuple[tuple[str, Constraint], ...]


def _qualified(variable: str, bundle: str) -> str:
    return f"{variable}@{bundle}" if bundle and variable in SCORED else variable


def _base(variable: str) -> str:
    return variable.split("@", 1)[0]


def normalise(where: Sequence[Condition], bundle: str = "") -> Box | None:
    """The box of a conjunction (conditions on one variable intersected); ``None`` if it is empty."""
    parts: dict[str, Constraint] = {}
    for condition in where:
        name = _qualified(condition.variable, bundle)
        if condition.values:
            new: Constraint = frozenset(condition.values)
        else:
            low = -math.inf if condition.low is None else float(condition.low)
            high = math.inf if condition.high is None else float(condition.high)
            new = (low, high)
        old = parts.get(name)
        if old is None:
            parts[name] = new
        elif isinstance(old, frozenset) and isinstance(new, frozenset):
            parts[name] = old & new
        elif isinstance(old, tuple) and isinstance(new, tuple):
            parts[name] = (max(old[0], new[0]), min(old[1], new[1]))
        else:
            raise AuditError(f"count definitions use variable {condition.variable!r} both as numeric and categorical")
    for constraint in parts.values():
        if (isinstance(constraint, frozenset) and not constraint) or (
            isinstance(constraint, tuple) and constraint[0] >= constraint[1]
        ):
            return None
    return tuple(sorted(parts.items(), key=lambda item: item[0]))


# --- the common refinement --------------------------------------------------------------------------------


def _variable_order(variables: set[str]) -> list[str]:
    rank = {STATUS: 0, OUTCOME: 1}
    return sorted(variables | {STATUS}, key=lambda v: (rank.get(v, 2), v))


def _cell_masks(variable: str, boxes: Sequence[Box]) -> tuple[list[Any], list[int], bool]:
    """Cells of one variable and, per cell, the bitmask of boxes containing it.

    Numeric cells are the intervals between consecutive edges plus a last cell for "no value"; categorical
    cells are the named values plus one cell for every other value (or none).
    """
    constrained = [(j, dict(box)[variable]) for j, box in enumerate(boxes) if variable in dict(box)]
    unconstrained = 0
    for j, box in enumerate(boxes):
        if variable not in dict(box):
            unconstrained |= 1 << j
    numeric = bool(constrained) and isinstance(constrained[0][1], tuple)
    if variable in SCORED or _base(variable) in SCORED:
        numeric = True
    if numeric:
        edges = sorted({e for _, (low, high) in constrained for e in (low, high) if math.isfinite(e)})
        n = len(edges) + 1  # cells: (-inf, e0), [e0, e1), ..., [e_last, inf)
        delta = [0] * (n + 1)
        for j, (low, high) in constrained:
            start = 0 if low == -math.inf else bisect_left(edges, low) + 1
            stop = n if high == math.inf else bisect_left(edges, high) + 1
            delta[start] ^= 1 << j
            delta[stop] ^= 1 << j
        masks, running = [], 0
        for i in range(n):
            running ^= delta[i]
            masks.append(unconstrained | running)
        cells: list[Any] = list(range(n)) + [None]  # None = the record has no value
        masks.append(unconstrained)
        return cells, masks, True
    values = sorted({v for _, s in constrained for v in s})
    if variable == STATUS and ANALYSED not in values:
        values.append(ANALYSED)
    if variable == OUTCOME:
        values = sorted(set(values) | set(OUTCOME_VALUES))
    cells = [*values, OTHER]
    masks = []
    for value in cells:
        mask = unconstrained
        for j, allowed in constrained:
            if value in allowed:
                mask |= 1 << j
        masks.append(mask)
    return cells, masks, False


def refine(boxes: Sequence[Box]) -> list[int]:
    """Atoms of the common refinement, each as the bitmask of the boxes that contain it.

    Variables are split one at a time; partial regions contained in the same boxes so far are merged,
    because their further splits are identical (a decision-diagram reduction). Regions in no box are dropped:
    nothing released says anything about them.
    """
    if not boxes:
        return []
    variables = _variable_order({v for box in boxes for v, _ in box})
    groups: dict[tuple[int, bool | None], None] = {((1 << len(boxes)) - 1, None): None}
    for variable in variables:
        cells, masks, numeric = _cell_masks(variable, boxes)
        scored = _base(variable) in SCORED
        new: dict[tuple[int, bool | None], None] = {}
        for mask, analysed in groups:
            for cell, cell_mask in zip(cells, masks, strict=True):
                if scored and (cell is None) == bool(analysed):
                    continue  # only analysed records have a score, and every analysed record has one
                if variable == OUTCOME and analysed and cell not in OUTCOME_VALUES:
                    continue  # an analysed record's outcome is 0 or 1
                merged = mask & cell_mask
                if not merged:
                    continue
                state = (cell == ANALYSED) if variable == STATUS else analysed
                new[(merged, state)] = None
        groups = new
        if len(groups) > MAX_ATOMS:
            raise AuditError(
                "the requests to this study define too many distinct regions to audit; ask for fewer bands"
            )
    return sorted({mask for mask, _ in groups})


def _whole_numbers(low: float, high: float) -> float:
    """How many whole numbers lie in [low, high] (rounded inward, with a tolerance for LP round-off)."""
    if math.isinf(high):
        return math.inf
    return max(0, math.floor(high + 1e-6) - max(0, math.ceil(low - 1e-6)) + 1)


def _bits(mask: int, n: int) -> np.ndarray:
    raw = np.frombuffer(mask.to_bytes((n + 7) // 8, "little"), dtype=np.uint8)
    return np.flatnonzero(np.unpackbits(raw, bitorder="little")[:n])


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
            total += float(v @ v - np.sum((block.basis.T @ v) ** 2))
        return math.sqrt(max(total, 0.0))

    def residuals(self, vectors: np.ndarray) -> np.ndarray:
        """:meth:`residual` of many vectors (rows) at once."""
        if len(vectors) == 0:
            return np.zeros(0)
        squared = np.zeros(len(vectors))
        for block in self.blocks:
            sub = vectors[:, block.atoms]
            squared += np.einsum("ij,ij->i", sub, sub) - np.sum((sub @ block.basis) ** 2, axis=1)
        out = np.sqrt(np.maximum(squared, 0.0))
        out[np.any(vectors[:, self.free] != 0, axis=1)] = math.inf
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

    def atoms_in_blocks(self, vector: np.ndarray) -> int:
        return sum(len(block.atoms) for block in self.blocks_of(vector))

    def spread_points(self, targets: np.ndarray, rounds: int = 3) -> list[np.ndarray]:
        """Feasible tables that push many counts to their extremes at once: the optima of the sum of all
        counts and of random signed sums (a few LPs instead of two per count)."""
        rng = np.random.default_rng(len(targets))
        points = []
        signs = [np.ones(len(targets))] + [rng.choice([-1.0, 1.0], len(targets)) for _ in range(rounds)]
        for sign in signs:
            direction = sign @ targets
            for orientation in (1.0, -1.0):
                point = self.solution.copy()
                for block in self.blocks_of(direction):
                    result = _solve(orientation * direction[block.atoms], block)
                    if result is not None:
                        point[block.atoms] = result[1]
                points.append(point)
        return points

    def lp_interval(self, vector: np.ndarray) -> tuple[float, float, dict[int, float], list[np.ndarray]]:
        """Min and max of the vector's count over the LP relaxation (HiGHS dual simplex), the binding rows'
        duals, and the optimal tables (feasible points for :class:`_Pool`)."""
        low = high = 0.0
        duals: dict[int, float] = {}
        points = []
        for sign in (1.0, -1.0):
            point = self.solution.copy()
            for block in self.blocks_of(vector):
                result = _solve(sign * vector[block.atoms], block)
                if result is None:  # unbounded: only a maximum can be
                    high = math.inf
                    continue
                value, x, marginals = result
                point[block.atoms] = x
                if sign > 0:
                    low += value
                else:
                    high -= value
                for row, dual in zip(block.rows[block.independent], marginals, strict=True):
                    if abs(dual) > 1e-9:
                        duals[int(row)] = duals.get(int(row), 0.0) + abs(float(dual))
            points.append(point)
        if self.unbounded(vector):
            high = math.inf
        return low, high, duals, points

    def milp_interval(self, vector: np.ndarray, low: int, high: int) -> tuple[int, int]:
        """Whole-number min and max (HiGHS branch and bound, 1 s per program); the LP bounds if time runs out."""
        if self.unbounded(vector):
            return low, high
        int_low = int_high = 0
        for block in self.blocks_of(vector):
            c = vector[block.atoms]
            found = []
            for sign in (1.0, -1.0):
                a, b = block.a[block.independent], block.b[block.independent]
                result = milp(
                    sign * c,
                    constraints=LinearConstraint(a, b, b),
                    integrality=np.ones(len(c)),
                    bounds=Bounds(0, np.inf),
                    options={"time_limit": 1.0},
                )
                if result.status != 0 or result.fun is None:
                    return low, high
                found.append(sign * float(result.fun))
            int_low += round(found[0])
            int_high += round(found[1])
        return max(low, int_low), min(high, int_high)


def _solve(c: np.ndarray, block: _Block) -> tuple[float, np.ndarray, np.ndarray] | None:
    """Minimise ``c . x`` over the block (independent rows only); None when unbounded below."""
    a, b = block.a[block.independent], block.b[block.independent]
    result = linprog(c, A_eq=a, b_eq=b, bounds=(0, None), method="highs-ds", options={"presolve": False})
    if result.status == 3:
        return None
    if result.status != 0:
        raise AuditError("the audit's linear program did not solve; the release is withheld")
    return float(result.fun), np.asarray(result.x), np.asarray(result.eqlin.marginals)


class _Pool:
    """Feasible tables found so far (LP optima). A count's LP interval contains its value in each of them, so
    two tables whose values lie far enough apart certify a count without solving its two LPs. Removing
    released counts (more suppression) only enlarges the feasible set, so the tables stay valid while the
    released counts are a subset of those they were found for."""

    def __init__(self) -> None:
        self.known: dict[int, int] = {}
        self.points: list[np.ndarray] = []

    def valid_for(self, known: dict[int, int]) -> None:
        if not all(self.known.get(box) == value for box, value in known.items()):
            self.known, self.points = dict(known), []
        else:
            self.known = dict(known)

    def add(self, points: list[np.ndarray]) -> None:
        self.points.extend(points)

    def range(self, vector: np.ndarray) -> tuple[float, float] | None:
        if not self.points:
            return None
        values = np.stack(self.points) @ vector
        return float(values.min()), float(values.max())


def _build_system(a: sparse.csr_matrix, b: np.ndarray, row_box: list[int | None], zero: np.ndarray) -> _System:
    """Split ``a x = b`` into independent blocks, fix each block's implicit zeros and factorise it (SVD)."""
    n_atoms = a.shape[1]
    zero = zero.copy()
    keep = np.flatnonzero(~zero)
    a_live = a[:, keep].tocsr()
    a_live.eliminate_zeros()
    nonempty = np.diff(a_live.indptr) > 0
    if np.any(np.abs(b[~nonempty]) > 0.5):
        raise AuditError("the released counts contradict each other (no table is consistent with them)")
    row_ids = np.flatnonzero(nonempty)
    a_live = a_live[row_ids]
    all_rows, all_live = row_ids, a_live
    if len(row_ids):
        # Keep a linearly independent set of rows, preferring sparse ones (pivoted QR on rows scaled by
        # 1/nnz): a dense total implied by its parts (records read, analysed) is dropped, which splits the
        # system into smaller blocks and spares HiGHS the redundant rows. Dropped rows are checked below.
        scale = 1.0 / np.diff(a_live.indptr)
        _, r_factor, pivots = qr((a_live.T @ sparse.diags(scale)).toarray(), mode="economic", pivoting=True)
        diagonal = np.abs(np.diag(r_factor))
        rank = int(np.sum(diagonal > diagonal[0] * 1e-9)) if len(diagonal) else 0
        chosen = np.sort(pivots[:rank])
        row_ids, a_live = row_ids[chosen], a_live[chosen]
    m = len(row_ids)
    blocks: list[_Block] = []
    in_rows = np.zeros(n_atoms, bool)
    if m:
        in_rows[keep[np.unique(a_live.indices)]] = True
        graph = sparse.bmat([[None, a_live], [a_live.T, None]]).tocsr()
        _, labels = connected_components(graph, directed=False)
        row_labels, atom_labels = labels[:m], labels[m:]
        for label in np.unique(row_labels):
            r_local = np.flatnonzero(row_labels == label)
            c_local = np.flatnonzero(atom_labels == label)
            sub = a_live[r_local][:, c_local].tocsr()
            rhs = b[row_ids[r_local]]
            basis, left, solution = _factorise(sub.toarray(), rhs)
            # A strictly positive solution is an interior point: then no atom is forced to zero and the LP
            # that finds such atoms can be skipped.
            if np.min(solution, initial=1.0) <= 1e-9:
                implicit = _implicit_zeros(sub, rhs)
                if implicit.any():
                    zero[keep[c_local[implicit]]] = True
                    c_local = c_local[~implicit]
                    sub = sub[:, ~implicit].tocsr()
                    if len(c_local) == 0:
                        continue
                    basis, left, solution = _factorise(sub.toarray(), rhs)
            dense = sub.toarray()
            rank = basis.shape[1]
            independent = np.arange(len(r_local))
            if rank < len(r_local):  # fixing implicit zeros can make rows dependent again
                _, _, pivots = qr(dense.T, mode="economic", pivoting=True)
                independent = np.sort(pivots[:rank])
            blocks.append(_Block(keep[c_local], row_ids[r_local], sub, rhs, basis, left, solution, independent))
    free = ~zero & ~in_rows
    atom_block = np.full(n_atoms, -1)
    solution = np.zeros(n_atoms)
    for i, block in enumerate(blocks):
        atom_block[block.atoms] = i
        solution[block.atoms] = block.solution
    if len(all_rows) and np.max(np.abs(all_live @ solution[keep] - b[all_rows])) > 1e-6 * (1 + np.max(np.abs(b))):
        raise AuditError("the released counts contradict each other (no table is consistent with them)")
    return _System(a, b, row_box, zero, free, blocks, atom_block, solution)


def _factorise(dense: np.ndarray, rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Row-space basis, the map to min-norm row combinations, and the min-norm solution (one SVD)."""
    u, s, vt = np.linalg.svd(dense, full_matrices=False)
    rank = int(np.sum(s > max(dense.shape) * np.finfo(float).eps * max(s[0], 1.0) * 10)) if len(s) else 0
    basis = vt[:rank].T
    left = u[:, :rank] / s[:rank]
    return basis, left, basis @ (left.T @ rhs)


def _implicit_zeros(a: sparse.csr_matrix, b: np.ndarray, homogeneous: bool = False) -> np.ndarray:
    """Atoms that are zero in every non-negative solution of ``a x = b`` (one LP).

    Maximise the number of atoms that can be made positive: ``a x = b t``, ``t >= 1``, ``0 <= z <= 1``,
    ``z <= x``. Scaling by ``t`` lets every atom that can be positive reach 1 at once, so at the optimum
    ``z = 0`` exactly for the atoms that are empty in every feasible table (Freund, Roundy & Todd 1985).
    """
    m, n = a.shape
    if n == 0:
        return np.zeros(0, bool)
    eye = sparse.identity(n, format="csr")
    a_eq = sparse.hstack([a, sparse.csr_matrix((m, n)), sparse.csr_matrix(-b.reshape(-1, 1))]).tocsr()
    a_ub = sparse.hstack([-eye, eye, sparse.csr_matrix((n, 1))]).tocsr()
    c = np.concatenate([np.zeros(n), -np.ones(n), [0.0]])
    bounds = [(0, None)] * n + [(0, 1)] * n + [(0, 0) if homogeneous else (1, None)]
    result = linprog(c, A_ub=a_ub, b_ub=np.zeros(n), A_eq=a_eq, b_eq=np.zeros(m), bounds=bounds, method="highs")
    if result.status == 2:
        raise AuditError("the released counts contradict each other (no table is consistent with them)")
    if result.status != 0:
        raise AuditError("the audit's linear program did not solve; the release is withheld")
    return result.x[n : 2 * n] < 0.5


# --- the audit --------------------------------------------------------------------------------------------


@dataclass
class _Statement:
    release: int
    name: str
    box: int | None  # index into the boxes; None = an empty definition


class Audit:
    """The refinement of every definition released to a study: built once, evaluated per candidate release.

    ``earlier`` are the facts of earlier releases (and of releases held for approval) to the same study;
    ``current`` is the release being audited. :meth:`evaluate` takes the audited release's values (``None``
    = suppressed), so that more suppression can be tried without rebuilding the refinement.
    """

    def __init__(self, earlier: Sequence[ReleaseFacts], current: ReleaseFacts) -> None:
        started = time.perf_counter()
        self.releases = [*earlier, current]
        self.current = len(self.releases) - 1
        box_index: dict[Box, int] = {}
        self.statements: list[_Statement] = []
        self.by_name: list[dict[str, _Statement]] = []
        for r, release in enumerate(self.releases):
            names: dict[str, _Statement] = {}
            for name, definition in release.definitions.items():
                box = normalise(definition.where, release.bundle)
                index = None if box is None else box_index.setdefault(box, len(box_index))
                statement = _Statement(r, name, index)
                self.statements.append(statement)
                names[name] = statement
            self.by_name.append(names)
        self.boxes = list(box_index)
        atom_masks = refine(self.boxes)
        n_boxes, n_atoms = len(self.boxes), len(atom_masks)
        members = [_bits(mask, n_boxes) for mask in atom_masks]
        rows = np.concatenate(members) if members else np.zeros(0, int)
        cols = np.repeat(np.arange(n_atoms), [len(m) for m in members]) if members else np.zeros(0, int)
        # incidence[box, atom] = 1 when the atom lies in the box
        self.incidence = sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(n_boxes, n_atoms))
        indptr, indices = self.incidence.indptr, self.incidence.indices
        self.box_index = [indices[indptr[j] : indptr[j + 1]] for j in range(n_boxes)]  # atoms of each box
        self.box_atoms = [frozenset(index.tolist()) for index in self.box_index]
        self.relation_rows = self._relation_rows()
        self.structural_zero = self._structural_zeros()
        self._pool = _Pool()
        self.build_seconds = time.perf_counter() - started

    def _relation_rows(self) -> sparse.csr_matrix:
        """Each relation ``total = sum(parts)`` as a homogeneous row over the atoms (duplicates dropped)."""
        n_atoms = self.incidence.shape[1]
        unique: dict[tuple, sparse.csr_matrix] = {}
        for r, release in enumerate(self.releases):
            for relation in release.relations:
                members = [self.by_name[r].get(n) for n in relation.members]
                if any(m is None for m in members):
                    continue
                vector = np.zeros(n_atoms)
                for position, member in enumerate(members):
                    if member is not None and member.box is not None:
                        vector[self.box_index[member.box]] += 1.0 if position == 0 else -1.0
                nonzero = np.flatnonzero(vector)
                if len(nonzero):
                    key = (tuple(nonzero), tuple(vector[nonzero]))
                    unique.setdefault(key, sparse.csr_matrix(vector))
        if not unique:
            return sparse.csr_matrix((0, n_atoms))
        return sparse.vstack(list(unique.values())).tocsr()

    def _structural_zeros(self) -> np.ndarray:
        """Atoms empty in every table that satisfies the relations alone: known to everyone, never a finding."""
        n = self.incidence.shape[1]
        if self.relation_rows.shape[0] == 0 or n == 0:
            return np.zeros(n, bool)
        return _implicit_zeros(self.relation_rows, np.zeros(self.relation_rows.shape[0]), homogeneous=True)

    def _value(self, statement: _Statement, current_values: Mapping[str, int | None]) -> int | None:
        if statement.release == self.current:
            return current_values.get(statement.name)
        return self.releases[statement.release].values.get(statement.name)

    def _known(self, current_values: Mapping[str, int | None]) -> tuple[dict[int, int], dict[int, int]]:
        """Value of every box some release showed, and the first release that showed it."""
        known: dict[int, int] = {}
        first: dict[int, int] = {}
        for statement in self.statements:
            value = self._value(statement, current_values)
            if value is None:
                continue
            if statement.box is None:
                if value != 0:
                    raise AuditError(f"count {statement.name!r} has an empty definition but a value other than 0")
                continue
            if statement.box in known and known[statement.box] != value:
                raise AuditError(
                    f"count {statement.name!r} differs from the same count in release "
                    f"{self.releases[first[statement.box]].label}: the records changed since an earlier release to "
                    "this study, and the audit cannot protect differences between two versions of the data; "
                    "answer every request of a study from the same data extract"
                )
            known[statement.box] = int(value)
            first[statement.box] = min(first.get(statement.box, statement.release), statement.release)
        return known, first

    def evaluate(
        self,
        current_values: Mapping[str, int | None],
        min_cell_size: int,
        allow_zero: bool,
        protection_width: int = 2,
        exact: bool = True,
    ) -> AuditResult:
        """Check every suppressed count and every differencing region; see the module docstring."""
        # One BLAS thread: the factorisations are small, and threads fighting for two busy cores made them
        # hundreds of times slower.
        with threadpool_limits(limits=1, user_api="blas"):
            return self._evaluate(current_values, min_cell_size, allow_zero, protection_width, exact)

    def _evaluate(
        self,
        current_values: Mapping[str, int | None],
        min_cell_size: int,
        allow_zero: bool,
        protection_width: int,
        exact: bool,
    ) -> AuditResult:
        started = time.perf_counter()
        n_atoms = self.incidence.shape[1]
        known, first = self._known(current_values)
        # boxes known only from the audited release: the only ones suppression can still take back
        self._suppressible = {box for box, r in first.items() if r == self.current}

        def unsafe(value: int) -> bool:
            return (0 < value < min_cell_size) or (value == 0 and not allow_zero)

        known_boxes = sorted(known)
        data_rows = self.incidence[known_boxes] if known_boxes else sparse.csr_matrix((0, n_atoms))
        a = sparse.vstack([data_rows, self.relation_rows]).tocsr()
        b = np.concatenate([np.array([known[j] for j in known_boxes], float), np.zeros(self.relation_rows.shape[0])])
        row_box: list[int | None] = [*known_boxes, *([None] * self.relation_rows.shape[0])]
        zero = self.structural_zero.copy()
        released_zero = np.zeros(n_atoms, bool)
        for box, value in known.items():
            if value == 0:
                released_zero[self.box_index[box]] = True
        system = _build_system(a, b, row_box, zero | released_zero)

        findings: list[Finding] = []
        seen_regions: set[frozenset[int]] = set()
        intervals: dict[str, Interval] = {}

        self._pool.valid_for(known)
        targets = self._targets(current_values, first)
        vectors = {box: self._vector(box) for box in targets}
        batch = system.residuals(np.stack(list(vectors.values()))) if vectors else np.zeros(0)
        residuals = dict(zip(vectors, batch.tolist(), strict=True))

        # Exact disclosures first (linear algebra only): a suppressed count pinned down, and differencing
        # (atoms, and differences of nested boxes, pinned down to a value the policy would hide). If any is
        # found, more suppression is needed anyway, so the LPs for the remaining counts wait for the next round.
        if protection_width >= 2:
            for box, (release, names) in targets.items():
                if residuals[box] < _TOL:
                    seen_regions.add(self.box_atoms[box])
                    vector = vectors[box]
                    candidates = self._candidates(system.combination(vector), system, vector)
                    findings.append(Finding("suppressed", self.releases[release].label, tuple(names), candidates))
            self._atoms_pinned(system, unsafe, released_zero, findings, seen_regions)
            self._nested_pinned(system, unsafe, findings, seen_regions)
        if findings:
            targets = {}

        # 1. suppressed counts: the interval must hold at least `protection_width` whole numbers
        open_targets = [v for box, v in vectors.items() if residuals[box] >= _TOL and not system.unbounded(v)]
        if len(open_targets) >= 6 and len(self._pool.points) < 2:
            rounds = 1 if len(open_targets) < 20 else 3
            self._pool.add(system.spread_points(np.stack(open_targets), rounds))
        for box, (release, names) in targets.items():
            vector, residual = vectors[box], residuals[box]
            duals: dict[int, float] | None = None
            exact_interval = True
            small = system.atoms_in_blocks(vector) <= MILP_MAX_ATOMS
            if residual < _TOL:
                low = high = system.value(vector)
            else:
                seen = self._pool.range(vector) if not system.unbounded(vector) else (0.0, math.inf)
                margin = 2 if (exact and small) else 0  # leave room for the integer programs where they run
                if seen is not None and _whole_numbers(*seen) >= protection_width + margin:
                    low, high = seen  # an inner bound is enough: the count is at least this uncertain
                    exact_interval = False
                else:
                    low, high, duals, points = system.lp_interval(vector)
                    self._pool.add(points)
            lo_int = max(0, math.ceil(low - 1e-6))
            hi_int = None if math.isinf(high) else math.floor(high + 1e-6)
            if exact and small and exact_interval and hi_int is not None and residual >= _TOL:
                if hi_int - lo_int + 1 < protection_width + 2:
                    lo_int, hi_int = system.milp_interval(vector, lo_int, hi_int)
            interval = Interval(names[0], lo_int, hi_int, exact_interval)
            if release == self.current:
                intervals.update({name: Interval(name, lo_int, hi_int, exact_interval) for name in names})
            if interval.values < protection_width and self.box_atoms[box] not in seen_regions:
                seen_regions.add(self.box_atoms[box])
                weights = duals if duals else system.combination(vector)
                findings.append(
                    Finding(
                        "suppressed",
                        self.releases[release].label,
                        tuple(names),
                        self._candidates(weights, system, vector),
                    )
                )

        return AuditResult(
            ok=not findings,
            intervals=intervals,
            findings=findings,
            atoms=int((~self.structural_zero).sum()),
            constraints=int(a.shape[0]),
            releases=len(self.releases),
            seconds=time.perf_counter() - started + self.build_seconds,
            protection_width=protection_width,
            unrepairable=any(not f.candidates for f in findings),
        )

    def _vector(self, box: int) -> np.ndarray:
        vector = np.zeros(self.incidence.shape[1])
        vector[self.box_index[box]] = 1.0
        return vector

    def _targets(self, current_values: Mapping[str, int | None], first: dict[int, int]) -> dict[int, tuple[int, list]]:
        """Suppressed boxes that must stay uncertain: those hidden by a release before any earlier release showed
        them (hiding a count an earlier release made public protects nothing, so it is not a target)."""
        targets: dict[int, tuple[int, list[str]]] = {}
        for statement in self.statements:
            if statement.box is None or self._value(statement, current_values) is not None:
                continue
            if statement.box in first and first[statement.box] < statement.release:
                continue
            release, names = targets.setdefault(statement.box, (statement.release, []))
            if statement.release == release:
                names.append(statement.name)
        return targets

    def _atoms_pinned(
        self,
        system: _System,
        unsafe: Any,
        released_zero: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
    ) -> None:
        determined = system.zero.copy()
        for block in system.blocks:
            if block.basis.shape[1]:
                determined[block.atoms] = np.einsum("ij,ij->i", block.basis, block.basis) > 1 - 1e-6
        for atom in np.flatnonzero(determined & ~self.structural_zero & ~released_zero):
            value = 0 if system.zero[atom] else int(round(system.solution[atom]))
            region = frozenset([int(atom)])
            if not unsafe(value) or region in seen:
                continue
            seen.add(region)
            vector = np.zeros(self.incidence.shape[1])
            vector[atom] = 1.0
            weights = system.combination(vector)
            findings.append(
                Finding(
                    "difference",
                    self.releases[self.current].label,
                    self._names_overlapping(vector),
                    self._candidates(weights, system, vector),
                )
            )

    def _nested_pinned(self, system: _System, unsafe: Any, findings: list[Finding], seen: set[frozenset[int]]) -> None:
        """Nested boxes G inside F whose difference F \\ G is pinned down to a value the policy would hide.

        F \\ G is pinned down exactly when F and G have the same residual (distance from the row space), so
        boxes are grouped by residual (sorted on a random projection, then compared) and, inside a group,
        sorted by value so that only pairs whose difference could be small are compared.
        """
        n_boxes, n_atoms = self.incidence.shape
        if n_boxes < 2:
            return
        live = np.flatnonzero(~system.zero)
        rng = np.random.default_rng(0)
        # key = residual . g for a random g, computed without forming the residual matrix
        key = np.zeros(n_boxes)
        for block in system.blocks:
            g = rng.standard_normal(len(block.atoms))
            sub = self.incidence[:, block.atoms]
            key += sub @ g - (sub @ block.basis) @ (block.basis.T @ g)
        free_atoms = np.flatnonzero(system.free)
        if len(free_atoms):
            key += self.incidence[:, free_atoms] @ rng.standard_normal(len(free_atoms))
        values = self.incidence @ system.solution
        live_mask = np.zeros(n_atoms, bool)
        live_mask[live] = True
        cache: dict[int, frozenset[int]] = {}

        def region_of(box: int) -> frozenset[int]:
            if box not in cache:
                index = self.box_index[box]
                cache[box] = frozenset(index[live_mask[index]].tolist())
            return cache[box]

        order = np.argsort(key, kind="stable")
        start = 0
        while start < n_boxes:
            stop = start + 1
            while stop < n_boxes and abs(key[order[stop]] - key[order[stop - 1]]) < 1e-7:
                stop += 1
            group = sorted((int(j) for j in order[start:stop]), key=lambda j: values[j])
            start = stop
            for gi, g in enumerate(group):
                for f in group[gi + 1 :]:
                    difference = int(round(values[f] - values[g]))
                    if difference > 0 and not unsafe(difference):
                        break  # sorted by value: every later difference is at least as large
                    if not unsafe(difference) or not region_of(g) < region_of(f):
                        continue
                    region = region_of(f) - region_of(g)
                    if region in seen:
                        continue
                    vector = self._vector(f) - self._vector(g)
                    if system.residual(vector) > 1e-6:
                        continue
                    seen.add(region)
                    findings.append(
                        Finding(
                            "difference",
                            self.releases[self.current].label,
                            (self._box_label(f), self._box_label(g)),
                            self._candidates(system.combination(vector), system, vector),
                        )
                    )

    def _box_label(self, box: int) -> str:
        for statement in self.statements:
            if statement.box == box:
                return f"{statement.name} (release {self.releases[statement.release].label})"
        return "?"

    def _names_overlapping(self, vector: np.ndarray) -> tuple[str, ...]:
        overlap = self.incidence @ vector
        boxes = set(np.flatnonzero(overlap > 0.5).tolist())
        names = sorted(s.name for s in self.statements if s.release == self.current and s.box in boxes)
        return tuple(names[:6])

    def _candidates(self, weights: dict[int, float], system: _System, vector: np.ndarray) -> tuple[str, ...]:
        """Counts of the audited release whose suppression could break the finding, smallest value first.

        From the rows of a combination of released counts that yields the region (or the binding rows of the
        LP); if none is suppressible, the audited release's counts that overlap the region.
        """
        # rows that carry real weight in the combination (min-norm weights spread thinly over rows that do
        # not matter); among those, the smallest count is hidden first
        top = max((w for r, w in weights.items() if system.row_box[r] in self._suppressible), default=0.0)
        boxes = {
            system.row_box[r] for r, w in weights.items() if system.row_box[r] in self._suppressible and w >= top / 4
        }
        if not boxes:
            overlap = self.incidence @ vector
            boxes = {int(j) for j in np.flatnonzero(np.abs(overlap) > 0.5) if int(j) in self._suppressible}
        known = {system.row_box[i]: system.b[i] for i in range(len(system.row_box)) if system.row_box[i] is not None}
        ranked = sorted(
            (known.get(s.box, 0.0), s.name) for s in self.statements if s.release == self.current and s.box in boxes
        )
        return tuple(name for _, name in ranked)
