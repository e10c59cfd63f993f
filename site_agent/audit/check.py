"""The audit itself: the refinement of every definition the site released, evaluated per candidate release
(see :mod:`site_agent.audit`)."""

from __future__ import annotations

import copy
import functools
import itertools
import math
import time
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import sparse
from scipy.optimize import Bounds, LinearConstraint
from threadpoolctl import ThreadpoolController

from . import programs
from .branches import Branches
from .decompose import Cells, decompose
from .facts import (
    _TOL,
    MAX_ATOMS,
    MILP_MAX_ATOMS,
    VALUES_REFUSED,
    AuditError,
    AuditResult,
    Finding,
    Interval,
    ReleaseFacts,
)
from .model import Occupied, joint_boxes, meet_entries, models_for_old_entries
from .programs import integer_program
from .refinement import Box, Domain, _bits, _whole_numbers, normalise, refine
from .system import _build_system, _implicit_zeros, _Pool, _System

# --- the audit --------------------------------------------------------------------------------------------


_CONTROLLER: ThreadpoolController | None = None
# Where the grouped model's answer is not clear, the full model decides when it has at most this many atoms
# (a few seconds); beyond, the grouped model's own findings do (see ``evaluate``).
FULL_MAX_ATOMS = 5_000
# Triples of atoms are searched in blocks of at most this many atoms (``_few_atoms_pinned``)
UNION_MAX_ATOMS = 3_000
UNION_FAMILY_BOXES = 40  # a family with more boxes inside one F is not searched (the search is quadratic in them)
# Where the full model has at most this many live atoms in its equations, every union of them is checked
# (``_any_union_pinned``: 65,535 unions, one matrix product).
ANY_UNION_MAX_ATOMS = 16
# Beyond it, unions of two atoms of one block are searched in any system (by sorting), of three where the block has
# at most UNION_MAX_ATOMS atoms (one search per pair), of four where it has at most this many (``_few_atoms_pinned``),
FOUR_MAX_ATOMS = 400
# unions of five or six where it has at most this many (the sums of every three atoms: 161,700 at 100),
SIX_MAX_ATOMS = 100
# and unions of seven or eight where it has at most this many (the sums of every four atoms: 91,390 at 40).
EIGHT_MAX_ATOMS = 40
# Unions larger than those (nine atoms or more; seven or more in a block of more than EIGHT_MAX_ATOMS) are found by
# an integer program in blocks of at most this many atoms (``_many_atoms_pinned``), at most MANY_TRIES programs a
# block, each stopped after MANY_OPTIONS' nodes (a count, not a time: the same answer on every machine)
MANY_MAX_ATOMS = 60
# Beyond MANY_MAX_ATOMS the program runs over the block's sparse rows (one variable per set of atoms every row
# takes or leaves together), in blocks of at most this many open atoms. Beyond, it is not run (named in the
# audit's result): in make bench's history, programs of 489-649 sets ran past HiGHS's own time and node limits
# in most releases from the 23rd on (each now stopped by programs.py after 32 s, and its release took 35-41 s
# instead of under 1 s); up to 400 they changed what four of its first 20 releases withhold (threat model R14)
LARGE_MAX_ATOMS = 400
MANY_TRIES = 20
# A withheld count whose blocks hold more than facts.MILP_MAX_ATOMS atoms and at most this many is decided over
# whole numbers too (two integer programs, whatever its interval over the reals, unless it holds one whole number
# or whole-number tables already give it enough values). 1,500 was tried on 2026-12-05 (night): in make bench's
# history at 50 earlier releases nine such counts in a block of 1,469 atoms took 3-6 s a program (18.1 s for the
# request instead of 0.80 s), and it found no leak (threat model R3)
WHOLE_MAX_ATOMS = 400
# Each atom of a block of at most this many atoms is decided over whole numbers too (``_whole_atoms_pinned``; on
# the demo, whose largest blocks hold 741-1,447 atoms, 20 integer programs and 1.1 s in all at this limit)
ATOMS_WHOLE_MAX_ATOMS = 1_500
# Wall-clock seconds the integer programs of one request (every round of its audit) may take together; once they
# are spent the request is refused (programs.Budget; threat model R9)
PROGRAM_SECONDS = 120.0
TIME_REFUSED = (
    "the disclosure audit did not finish within its time for integer programs ({seconds:g} s a request); ask for "
    "fewer analyses, or fewer or wider bands"
)
MANY_OPTIONS = {"node_limit": 1_000, "time_limit": 30.0, "mip_rel_gap": 0.0}
# A split (three and two atoms, three and three, ...) whose sums cancel more often than this is not searched
# (time; the random releases of R14 reach 1.5 million); the matches are taken MATCH_CHUNK at a time (memory).
MAX_MATCHES = 20_000_000
MATCH_CHUNK = 500_000


def _cancelling(numbers: np.ndarray, tolerance: float) -> list[tuple[int, int]]:
    """Positions ``(p, q)``, ``p < q``, of two numbers whose sum is within ``tolerance`` of zero (sorted once,
    each number's negation searched)."""
    order = np.argsort(numbers, kind="stable")
    ranked = numbers[order]
    lows = np.searchsorted(ranked, -numbers - tolerance, "left")
    highs = np.searchsorted(ranked, -numbers + tolerance, "right")
    return [(p, q) for p in np.flatnonzero(highs > lows).tolist() for q in order[lows[p] : highs[p]].tolist() if p < q]


@functools.lru_cache(maxsize=64)
def _combinations(n: int, size: int) -> np.ndarray:
    """Every set of ``size`` of ``range(n)`` (rows, ascending; kept: the same block sizes recur in every round)."""
    sets = np.array(list(itertools.combinations(range(n), size)), dtype=np.int64).reshape(-1, size)
    sets.flags.writeable = False
    return sets


def _subset_sums(numbers: np.ndarray, size: int, tolerance: float) -> tuple[np.ndarray, np.ndarray]:
    """Every set of ``size`` positions (rows, ascending) whose numbers' sum is not within ``tolerance`` of
    zero, with those sums: a set whose own sum is zero is a smaller union on its own."""
    sets = _combinations(len(numbers), size)
    sums = numbers[sets].sum(axis=1)
    keep = np.abs(sums) > tolerance
    return sets[keep], sums[keep]


def _cancelling_unions(
    numbers: np.ndarray,
    tolerance: float,
    values: np.ndarray,
    unsafe: Any,
    splits: Sequence[tuple[int, int]],
    left_out: list[tuple[int, int]] | None = None,
) -> list[tuple[int, ...]]:
    """Positions of distinct numbers that add up to zero and whose ``values`` add up to a whole number ``unsafe``
    holds, each found as a set of ``large`` numbers whose sum cancels that of ``small`` others, for each
    ``(large, small)`` of ``splits``: (2, 2) gives fours, (3, 2) fives, (3, 3) sixes, (4, 3) sevens, (4, 4) eights.
    No part's own sum is zero: every set of that size splits so, or holds a smaller union pinned on its own
    beside the rest (a union of two pinned parts is small only if one of them is). A split with more than
    ``MAX_MATCHES`` cancelling pairs of sums is left out (a bound on time and memory, not a proof), and added to
    ``left_out``."""
    sums = {size: _subset_sums(numbers, size, tolerance) for size in sorted({n for split in splits for n in split})}
    out: set[tuple[int, ...]] = set()
    for large, small in splits:
        if not len(sums[large][0]):
            continue
        (big_sets, big_sums), (sets, totals) = sums[large], sums[small]
        # every (small set, large set) whose sums cancel: each small sum's negation searched among the large
        order = np.argsort(big_sums, kind="stable")
        lows = np.searchsorted(big_sums[order], -totals - tolerance, "left")
        highs = np.searchsorted(big_sums[order], -totals + tolerance, "right")
        hits = highs - lows
        ends = np.cumsum(hits)
        if not len(ends):
            continue
        if ends[-1] > MAX_MATCHES:
            if left_out is not None:
                left_out.append((large, small))
            continue  # sums that coincide this often (many atoms whose differences are pinned): not searched
        # in chunks of about MATCH_CHUNK matches (memory: each is a row of up to eight positions)
        cuts = [0, *np.searchsorted(ends, np.arange(MATCH_CHUNK, int(ends[-1]), MATCH_CHUNK), "right").tolist()]
        for first, last in zip(cuts, [*cuts[1:], len(totals)], strict=True):
            chunk = hits[first:last]
            small_at = np.repeat(np.arange(first, last), chunk)
            large_at = order[
                np.repeat(lows[first:last] - np.cumsum(chunk) + chunk, chunk) + np.arange(int(chunk.sum()))
            ]
            if large == small:
                small_at, large_at = small_at[small_at < large_at], large_at[small_at < large_at]
            # only a union whose value the policy would hide is a candidate (told apart before it is built)
            value = values[big_sets[large_at]].sum(axis=1) + values[sets[small_at]].sum(axis=1)
            rounded = np.round(value)
            whole = np.abs(value - rounded) <= 1e-6
            hidden = [r for r in np.unique(rounded[whole]).tolist() if unsafe(int(r))]
            keep = whole & np.isin(rounded, hidden)
            unions = np.sort(np.hstack([big_sets[large_at[keep]], sets[small_at[keep]]]), axis=1)
            out.update(map(tuple, unions[np.all(np.diff(unions, axis=1) > 0, axis=1)].tolist()))  # distinct
    return sorted(out)


def _open_in(block: Any, live: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """A block's live atoms that the shown counts do not pin on their own (positions in ``block.atoms``: the
    atoms a union search takes), and each atom's squared distance from the row space (0: pinned on its own)."""
    distance = 1.0 - np.einsum("ij,ij->i", block.basis, block.basis)
    return np.flatnonzero(live[block.atoms] & (distance > 1e-6)), distance


def _union_program(
    block: Any, usable: np.ndarray, others: np.ndarray, dense: bool
) -> tuple[list[np.ndarray], sparse.csr_matrix, sparse.csr_matrix, int]:
    """The 0/1 units and equations of :meth:`Audit._many_atoms_pinned`'s program over one block: a union ``v`` of
    units lies in the row space (``v = W y``) and takes no other open atom (``W[others] y = 0``). ``dense``: one
    unit per usable atom and ``W`` the row space's orthonormal basis. Otherwise ``W`` is the block's independent
    rows, transposed (sparse), and usable atoms that every row takes or leaves together are one unit: a vector
    of the row space is the same on them, so a union takes all of them or none (a block of many atoms has far
    fewer rows: the demo's blocks of 353-1,447 open atoms have 20-53). Returns the units (positions in
    ``block.atoms``), the equations for ``v`` and for the other atoms, and the number of ``y``."""
    if dense:
        basis = block.basis
        equal = sparse.hstack([sparse.identity(len(usable)), sparse.csr_matrix(-basis[usable])]).tocsr()
        rest = sparse.hstack([sparse.csr_matrix((len(others), len(usable))), sparse.csr_matrix(basis[others])])
        return [np.array([u]) for u in usable.tolist()], equal, rest.tocsr(), basis.shape[1]
    columns = block.a[block.independent].T.tocsr()  # atoms x rows
    columns.sort_indices()

    def signature(atom: int) -> tuple:
        start, end = columns.indptr[atom], columns.indptr[atom + 1]
        return (tuple(columns.indices[start:end].tolist()), tuple(columns.data[start:end].tolist()))

    classes: dict[tuple, list[int]] = {}
    for atom in usable.tolist():
        classes.setdefault(signature(atom), []).append(atom)
    units = [np.array(members) for members in classes.values()]
    firsts = [int(unit[0]) for unit in units]
    ny = columns.shape[1]
    equal = sparse.hstack([sparse.identity(len(units)), -columns[firsts]]).tocsr()
    other_classes: dict[tuple, int] = {}
    for atom in others.tolist():
        other_classes.setdefault(signature(atom), atom)
    other_firsts = list(other_classes.values())
    rest = sparse.hstack([sparse.csr_matrix((len(other_firsts), len(units))), columns[other_firsts]]).tocsr()
    return units, equal, rest, ny


@dataclass
class _Statement:
    release: int
    name: str
    box: int | None  # index into the boxes; None = an empty definition


class Audit:
    """The refinement of every definition released to a study: built once, evaluated per candidate release.

    ``earlier`` are the facts of earlier releases (and of releases awaiting approval) of the site, to any study;
    ``current`` is the release being audited. :meth:`evaluate` takes the audited release's values (``None``
    = suppressed), so that more suppression can be tried without rebuilding the refinement.

    ``group=False`` audits in the full model alone. Where the full model has more than ``full_max_atoms`` atoms
    (known when the audit is built), the grouped model (:mod:`~.decompose`) decides; elsewhere the full model
    does and the grouped model is not built. Where the grouped model decides, with ``shortcut`` (the
    default) its clear-only pass is skipped: that pass could only defer to this evaluation or agree with it
    (see :meth:`evaluate`). ``shortcut=False`` runs it anyway; tests compare both ways. ``carry_tables=False``
    does not keep the second look's tables (:mod:`~.branches`) from one evaluation to the next: each repair round then
    searches afresh, as a new audit of that round would.
    """

    def __init__(
        self,
        earlier: Sequence[ReleaseFacts],
        current: ReleaseFacts,
        occupied: Occupied | None = None,
        group: bool = True,
        shortcut: bool = True,
        full_max_atoms: int = FULL_MAX_ATOMS,
        carry_tables: bool = True,
    ) -> None:
        started = time.perf_counter()
        programs.start()  # the integer programs' worker imports scipy while the system is built
        self._budget: programs.Budget | None = None  # the request's time for integer programs (first evaluation on)
        self.releases = [*earlier, current]
        self.domains: dict[str, Domain] = {}
        schema_entries: dict[str, dict[str, Any]] = {}
        models: dict[str, Mapping[str, Any]] = {}
        for release in self.releases:
            for name, raw in release.domains.items():
                domain = Domain.from_dict(raw)
                self.domains[name] = self.domains[name].meet(domain) if name in self.domains else domain
                schema_entries[name] = meet_entries(schema_entries.get(name), raw)
            for model in release.models.values():
                if model.get("id"):
                    models[f"score@m:{model['id']}"] = model
        self.current = len(self.releases) - 1
        described = models_for_old_entries(self.releases)
        box_index: dict[Box, int] = {}
        self.statements: list[_Statement] = []
        self.by_name: list[dict[str, _Statement]] = []
        for r, release in enumerate(self.releases):
            names: dict[str, _Statement] = {}
            for name, definition in release.definitions.items():
                box = normalise(definition.where, release.bundle, self.domains, described.get(r, release.models))
                index = None if box is None else box_index.setdefault(box, len(box_index))
                statement = _Statement(r, name, index)
                self.statements.append(statement)
                names[name] = statement
            self.by_name.append(names)
        self.boxes = list(box_index)
        # what the recipient knows about the models: score bands as regions of the features they read
        self._joined, self._joint_values, self.joints = joint_boxes(self.boxes, models, schema_entries, occupied)
        self.cells: Cells | None = None  # the grouped model's separator cells (None: the full model)
        self._union_answers: dict[tuple, tuple[int, ...] | None] = {}  # see _unions_pinned
        # per live-atom mask, each box's number of live atoms; the boxes by atom (see _listed_or_cells_of_a_table)
        self._live_sizes: tuple[int, np.ndarray] | None = None
        self._columns: sparse.csc_matrix | None = None
        # the earlier releases' equations alone, and their system (_history_equations, _history_system)
        self._history_inputs: tuple | None = None
        self._history: _System | None = None
        # whole-number tables the second looks found, tried first in later evaluations (see Branches); None:
        # each evaluation searches afresh (tests compare repair rounds with fresh audits that way)
        self._branch_tables: list[np.ndarray] | None = [] if carry_tables else None
        self._grouped: Audit | None = None
        self._full = False
        self._too_large = False
        self._full_masks: list[int] | None = None
        self.shortcut = shortcut
        self.full_max_atoms = full_max_atoms
        if group:
            # Whether the full model is small enough to decide is known before any evaluation: its refinement
            # stops as soon as it passes FULL_MAX_ATOMS (milliseconds, even after 200 releases). Where it is, it
            # decides: the grouped model searches unions of atoms within one group only (threat model R14), and
            # when it answered first, with no such search, its "clear" let a union of two cells pinned small go
            # out (site_agent/test_withheld.py::test_no_pair_of_cells_is_pinned_small_where_the_model_has_groups).
            try:
                self._full_masks = refine(self._joined, self.domains, self._joint_values, full_max_atoms)
            except AuditError:
                self._too_large = True
        grouped = decompose(self._joined, self.domains, self._joint_values) if self._too_large else None
        if grouped is not None:
            self._grouped = copy.copy(self)
            own = [copy.copy(s) for s in self.statements]  # each model makes equal definitions one count
            lookup = {id(s): o for s, o in zip(self.statements, own, strict=True)}
            self._grouped.statements = own
            self._grouped.by_name = [{n: lookup[id(s)] for n, s in names.items()} for names in self.by_name]
            self._grouped._space(grouped.incidence, grouped.separators, Cells(grouped))
        else:
            self._build_full()
        self.build_seconds = time.perf_counter() - started
        if self._grouped is not None:
            self._grouped.build_seconds = self.build_seconds

    def _build_full(self, limit: int = MAX_ATOMS) -> None:
        """The common refinement of every box (see :mod:`site_agent.audit`): the full model."""
        if self._full_masks is not None and limit >= self.full_max_atoms:
            atom_masks = self._full_masks
        else:
            atom_masks = refine(self._joined, self.domains, self._joint_values, limit)
        n_boxes, n_atoms = len(self.boxes), len(atom_masks)
        members = [_bits(mask, n_boxes) for mask in atom_masks]
        rows = np.concatenate(members) if members else np.zeros(0, int)
        cols = np.repeat(np.arange(n_atoms), [len(m) for m in members]) if members else np.zeros(0, int)
        # incidence[box, atom] = 1 when the atom lies in the box
        incidence = sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(n_boxes, n_atoms))
        self._space(incidence, None, None)
        self._full = True

    def _space(self, incidence: sparse.csr_matrix, separators: sparse.csr_matrix | None, cells: Cells | None) -> None:
        """Set the atoms the system is written over (full model, or the grouped model and its separator rows)."""
        self.incidence = incidence
        self.cells = cells
        n_boxes = incidence.shape[0]
        indptr, indices = self.incidence.indptr, self.incidence.indices
        self.box_index = [indices[indptr[j] : indptr[j + 1]] for j in range(n_boxes)]  # atoms of each box
        self.box_atoms = [frozenset(index.tolist()) for index in self.box_index]
        # Through the models, two definitions can hold the same records (score 30 or more, and age 30 or more,
        # for a score that is the age): one count, whichever name shows it. A definition the model makes
        # empty (score 30 or more, age below 24) holds nobody.
        canonical: dict[frozenset[int], int] = {}
        for statement in self.statements:
            if statement.box is None:
                continue
            atoms = self.box_atoms[statement.box]
            statement.box = canonical.setdefault(atoms, statement.box) if atoms else None
        self.relation_rows = self._relation_rows()
        if separators is not None and separators.shape[0]:
            self.relation_rows = sparse.vstack([self.relation_rows, separators]).tocsr()
        self.structural_zero = self._structural_zeros()
        self._pool = _Pool()
        self._whole = _Pool()

    def _relation_rows(self) -> sparse.csr_matrix:
        """Each relation ``total = sum(parts)`` as a homogeneous row over the atoms (duplicates dropped)."""
        n_atoms = self.incidence.shape[1]
        unique: dict[tuple, np.ndarray] = {}  # (atoms, coefficients) -> atoms
        signatures: set[tuple] = set()  # the same boxes related again (every release repeats the flow's)
        for r, release in enumerate(self.releases):
            for relation in release.relations:
                members = [self.by_name[r].get(n) for n in relation.members]
                if any(m is None for m in members):
                    continue
                signature = tuple(m.box for m in members if m is not None)
                if signature in signatures:
                    continue
                signatures.add(signature)
                vector = np.zeros(n_atoms)
                for position, member in enumerate(members):
                    if member is not None and member.box is not None:
                        vector[self.box_index[member.box]] += 1.0 if position == 0 else -1.0
                nonzero = np.flatnonzero(vector)
                if len(nonzero):
                    unique.setdefault((tuple(nonzero), tuple(vector[nonzero])), nonzero)
        if not unique:
            return sparse.csr_matrix((0, n_atoms))
        rows = np.repeat(np.arange(len(unique)), [len(cols) for cols in unique.values()])
        cols = np.concatenate(list(unique.values()))
        data = np.concatenate([np.array(key[1]) for key in unique])
        return sparse.csr_matrix((data, (rows, cols)), shape=(len(unique), n_atoms))

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
                    raise AuditError(
                        f"count {statement.name!r} has an empty definition but a value other than 0", VALUES_REFUSED
                    )
                continue
            if statement.box in known and known[statement.box] != value:
                raise AuditError(
                    f"count {statement.name!r} differs from the same count in release "
                    f"{self.releases[first[statement.box]].label}: the records, or the mapping that reads them, "
                    "changed since an earlier release of this site, and the audit cannot protect differences between "
                    "two versions of the data; answer from the data extract and mapping earlier releases used (see "
                    "docs/threat-model.md, data versions)",
                    VALUES_REFUSED,
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
        current_rules: Mapping[str, str] | None = None,
        current_zero: Mapping[str, bool] | None = None,
    ) -> AuditResult:
        """Check every suppressed count and every differencing region; see the module docstring.

        ``current_rules`` names the rule that withheld each count of the audited release, and ``current_zero``
        says which of those withheld as not small are 0; what the rules tell (a ``minimum_cell_size`` count
        lies in 1..k−1, a ``complementary`` one is not small: :func:`~.facts.withheld_bounds`) is a fact, as it
        is for every earlier release.
        """
        # One BLAS thread: the factorisations are small, and threads fighting for two busy cores made them
        # hundreds of times slower.
        global _CONTROLLER
        if _CONTROLLER is None:  # scanning the loaded libraries costs more than a small audit: once per process
            _CONTROLLER = ThreadpoolController()
        if self._budget is None:  # the request's time for integer programs starts now
            self._budget = programs.Budget(PROGRAM_SECONDS)
        try:
            with _CONTROLLER.limit(limits=1, user_api="blas"), programs.within(self._budget):
                told = (current_rules or {}, current_zero or {})
                if self._grouped is not None:
                    # The full model is too large to decide (it would take minutes), so the grouped model's own
                    # findings do (exact; their candidates come from its rows, so repairs may choose other counts
                    # than the full model). With ``shortcut=False`` its clear-only pass runs first, as the site did
                    # when that pass came before every full model: it is clear only where this evaluation is
                    # (every check it makes is at least as strict: exact LP intervals, integer programs for narrow
                    # ones), so skipping it spares the integer programs it runs on every narrow interval of every
                    # earlier release (most of the cost of a long history).
                    # tests/site_agent/test_audit_shortcut.py compares both ways on random histories.
                    self._grouped.build_seconds = self.build_seconds
                    if not self.shortcut:
                        clear = self._grouped._evaluate(
                            current_values, min_cell_size, allow_zero, protection_width, exact, told, clear_only=True
                        )
                        if clear is not None:
                            return clear
                    result = self._grouped._evaluate(
                        current_values, min_cell_size, allow_zero, protection_width, exact, told
                    )
                    assert result is not None
                    return result
                return self._evaluate(current_values, min_cell_size, allow_zero, protection_width, exact, told)
        except programs.BudgetSpent:
            # refused rather than released with the searches after it named as not run: a request crafted to spend
            # the budget on a few stalling programs would otherwise skip every search that follows
            raise AuditError(TIME_REFUSED.format(seconds=self._budget.seconds)) from None

    def _equations(
        self,
        current_values: Mapping[str, int | None],
        told: tuple[Mapping[str, str], Mapping[str, bool]],
        known: dict[int, int],
    ) -> tuple[sparse.csr_matrix, np.ndarray, list[int | None], np.ndarray, np.ndarray, tuple, set[int]]:
        """The system's inputs: every shown count and relation as a row ``a x = b`` (and the box of each row),
        the atoms empty in every table (structurally, or by a rule's fact) and those a shown 0 empties, the
        rules' facts as bound rows (:meth:`_bound_rows`), and the boxes a fact says are empty."""
        n_atoms = self.incidence.shape[1]
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
        g, g_low, g_high, empty = self._bound_rows(current_values, told, known)
        for box in empty:
            zero[self.box_index[box]] = True
        return a, b, row_box, zero, released_zero, (g, g_low, g_high), empty

    def _bound_rows(
        self,
        current_values: Mapping[str, int | None],
        told: tuple[Mapping[str, str], Mapping[str, bool]],
        known: dict[int, int],
    ) -> tuple[sparse.csr_matrix, np.ndarray, np.ndarray, set[int]]:
        """The rules' facts as rows ``low <= count <= high`` over the atoms, one per withheld box, and the boxes
        a fact says are empty (their atoms are fixed at zero like a shown 0's, instead of a row)."""
        bounds: dict[int, tuple[float, float]] = {}
        for r, release in enumerate(self.releases):
            facts = release.bounds(*told) if r == self.current else release.bounds()
            for name, (low, high) in facts.items():
                statement = self.by_name[r].get(name)
                if statement is None or statement.box is None or statement.box in known:
                    continue
                if r == self.current and current_values.get(name) is not None:
                    continue
                old = bounds.get(statement.box, (0.0, math.inf))
                bounds[statement.box] = (max(old[0], low), min(old[1], high))
        n_atoms = self.incidence.shape[1]
        empty = {j for j, (_, high) in bounds.items() if high <= 0}
        boxes = sorted(set(bounds) - empty)
        if not boxes:
            return sparse.csr_matrix((0, n_atoms)), np.zeros(0), np.zeros(0), empty
        rows = self.incidence[boxes]
        return rows, np.array([bounds[j][0] for j in boxes]), np.array([bounds[j][1] for j in boxes]), empty

    def _evaluate(
        self,
        current_values: Mapping[str, int | None],
        min_cell_size: int,
        allow_zero: bool,
        protection_width: int,
        exact: bool,
        told: tuple[Mapping[str, str], Mapping[str, bool]],
        clear_only: bool = False,
    ) -> AuditResult | None:
        """The audit over this object's atoms (``told``: the audited release's rules and which of its counts
        withheld as not small are 0).
        ``clear_only`` (the grouped model): None unless the answer is clear (nothing found, and every
        suppressed count's interval too wide for integer programs to matter), and every interval of the audited
        release an exact LP interval."""
        started = time.perf_counter()
        self._k = min_cell_size
        known, first = self._known(current_values)
        # boxes known only from the audited release: the only ones suppression can still take back
        self._suppressible = {box for box, r in first.items() if r == self.current}

        def unsafe(value: int) -> bool:
            return (0 < value < min_cell_size) or (value == 0 and not allow_zero)

        a, b, row_box, zero, released_zero, (g, g_low, g_high), empty = self._equations(current_values, told, known)
        # A repair round withholds more of the audited release: every table the round before allowed is still
        # allowed, so only the atoms it left empty can be empty now (the pool keeps them while that holds).
        self._pool.valid_for(known)
        self._whole.valid_for(known)  # whole-number tables (programs' optima, LP tables whole on their atoms)
        system = _build_system(a, b, row_box, zero | released_zero, g, g_low, g_high, self._pool.zero)
        self._pool.zero = system.zero.copy()
        self._branches_for = (known, told, min_cell_size, allow_zero, self.structural_zero | released_zero)
        self._system = system
        small_system = int((~system.zero).sum()) <= MILP_MAX_ATOMS
        self._branches: Branches | None = None
        self._opened_cache: dict[tuple, tuple[int, int] | None] = {}

        findings: list[Finding] = []
        seen_regions: set[frozenset[int]] = set()
        intervals: dict[str, Interval] = {}
        # what the searches for unions covered: (block, group) -> (open atoms, size up to which every union was
        # searched), and block -> (least size the integer program searched from, whether it finished)
        self._searched: dict[tuple[int, int], tuple[int, int]] = {}
        self._programs: dict[int, tuple[int, bool]] = {}
        narrow_unchecked = 0  # narrow intervals of counts whose blocks are too large for integer programs

        # A count withheld as not small whose value is 0 is fixed at 0 (the branch it is in) and is no target:
        # the recipient knows only "0, or at least k", and a 0 is a count this policy shows.
        targets = {box: v for box, v in self._targets(current_values, first).items() if box not in empty}
        vectors = {box: self._vector(box) for box in targets}
        batch = system.residuals(np.stack(list(vectors.values()))) if vectors else np.zeros(0)
        residuals = dict(zip(vectors, batch.tolist(), strict=True))

        # Exact disclosures first (linear algebra only): a suppressed count pinned down, and differencing
        # (atoms, and differences of nested boxes, pinned down to a value the policy would hide). If any is
        # found, more suppression is needed anyway, so the LPs for the remaining counts wait for the next round.
        if protection_width >= 2:
            for box, (release, names) in targets.items():
                if residuals[box] < _TOL:
                    pinned = round(system.value(vectors[box]))
                    if self._opened(vectors[box], protection_width, pinned, pinned) is not None:
                        continue  # open for a recipient who knows only "0, or at least k" (the interval below)
                    seen_regions.add(self.box_atoms[box])
                    vector = vectors[box]
                    candidates = self._candidates(system.combination(vector), system, vector)
                    findings.append(Finding("suppressed", self.releases[release].label, tuple(names), candidates))
            self._atoms_pinned(system, unsafe, released_zero, findings, seen_regions)
            key = self._residual_keys(system)
            self._nested_pinned(system, unsafe, findings, seen_regions, key)
            # (the grouped model: unions of one group's atoms, each a region of the full model, never two
            # groups' atoms together, which could count a full atom twice)
            self._unions_pinned(system, unsafe, findings, seen_regions, key)
            if self.cells is None:
                self._any_union_pinned(system, unsafe, released_zero, findings, seen_regions)
            self._few_atoms_pinned(system, unsafe, released_zero, findings, seen_regions)
            if self.cells is None:
                self._many_atoms_pinned(system, unsafe, released_zero, findings, seen_regions, large=False)
                if not findings:  # the costly programs only where nothing else was found (the next round asks again)
                    self._many_atoms_pinned(system, unsafe, released_zero, findings, seen_regions, large=True)
            if exact and self.cells is None and small_system:
                self._whole_pinned(system, unsafe, released_zero, findings, seen_regions)
        if findings:
            if clear_only:
                return None
            targets = {}

        # 1. suppressed counts: the interval must hold at least `protection_width` whole numbers
        open_targets = [v for box, v in vectors.items() if residuals[box] >= _TOL and not system.unbounded(v)]
        if len(open_targets) >= 6 and len(self._pool.points) < 2:
            # One random direction besides the sum: with each block's program kept in HiGHS, an interval the
            # spread tables leave open costs little (hot), while each further direction moves every block far
            # (at 200 earlier releases: three directions 9.5-9.9 s in all, one 9.1 s and 15 more intervals)
            self._add_tables(system.spread_points(np.stack(open_targets), 1))
        for box, (release, names) in targets.items():
            vector, residual = vectors[box], residuals[box]
            duals: dict[int, float] | None = None
            exact_interval = True
            in_blocks = system.atoms_in_blocks(vector)
            small = in_blocks <= MILP_MAX_ATOMS
            if residual < _TOL:
                low = high = system.value(vector)
            else:
                seen = (
                    self._pool.range(vector, system.block_atoms(vector))
                    if not system.unbounded(vector)
                    else (0.0, math.inf)
                )
                margin = 2 if (exact and small) else 0  # leave room for the integer programs where they run
                if clear_only:  # which counts the full model would give integer programs is not known here
                    margin = 2 if exact else 0
                    if release == self.current and not system.unbounded(vector):
                        seen = None  # the audited release's intervals are reported: exact ones
                if seen is not None and _whole_numbers(*seen) >= protection_width + margin:
                    low, high = seen  # an inner bound is enough: the count is at least this uncertain
                    exact_interval = False
                else:
                    low, high, duals, points = system.lp_interval(vector, hot=True)
                    self._add_tables(points)
            lo_int = max(0, math.ceil(low - 1e-6))
            hi_int = None if math.isinf(high) else math.floor(high + 1e-6)
            whole = exact and not small and hi_int is not None and residual >= _TOL and in_blocks <= WHOLE_MAX_ATOMS
            if clear_only and whole:
                return None  # its integer programs run in the evaluation that follows
            if clear_only and hi_int is not None and hi_int - lo_int + 1 < protection_width + (2 if exact else 0):
                # A narrow interval: the full model may run integer programs (on its small blocks). An earlier
                # release's count is clear if even the integer interval is wide enough (the groups' integer
                # tables are the full model's); the audited release's intervals are reported: the full model's.
                if release == self.current or not exact_interval or residual < _TOL:
                    return None
                checked = system.milp_interval(vector, lo_int, hi_int, strict=True)
                if checked is None or checked[1] - checked[0] + 1 < protection_width:
                    return None
            if whole:
                # a block of more than MILP_MAX_ATOMS atoms and at most WHOLE_MAX_ATOMS: over whole numbers the
                # count can keep fewer values than over the reals, however wide that interval (a count of 2 kept
                # three values over the reals, 1 to 3, and one over whole numbers, in a block of 76 atoms:
                # site_agent/test_withheld.py::test_a_count_whole_numbers_pin_in_a_large_block_is_not_released),
                # so its two integer programs run (each bounded by the worker); one stopped at its limit leaves
                # the count named as not decided over whole numbers
                tables = self._whole.range(vector, system.block_atoms(vector))
                if exact_interval and lo_int == hi_int:
                    pass  # one whole number over the reals: the same one over whole numbers (the records' table)
                elif tables is None or _whole_numbers(*tables) < protection_width:
                    found: list[tuple[np.ndarray, np.ndarray]] = []
                    checked = system.milp_interval(vector, 0, 10**9, strict=True, tables=found)
                    self._whole.add(found)
                    if checked is None:
                        narrow_unchecked += 1
                    else:
                        (lo_int, hi_int), exact_interval = checked, True
                # else: whole-number tables found for other counts give it enough values
            elif exact_interval and hi_int is not None and residual >= _TOL:
                if hi_int - lo_int + 1 < protection_width + 2:
                    if exact and small:
                        lo_int, hi_int = system.milp_interval(vector, lo_int, hi_int)
                    else:
                        narrow_unchecked += 1
            if hi_int is not None and hi_int - lo_int + 1 < protection_width:
                opened = self._opened(vector, protection_width, lo_int, hi_int)
                if opened is not None:  # the recipient's own disjunctions keep it open
                    (lo_int, hi_int), exact_interval = opened, False
            interval = Interval(names[0], lo_int, hi_int, exact_interval)
            if release == self.current:
                intervals.update({name: Interval(name, lo_int, hi_int, exact_interval) for name in names})
            if interval.values < protection_width and self.box_atoms[box] not in seen_regions:
                seen_regions.add(self.box_atoms[box])
                if duals is not None:  # the counts to withhold come from a fresh solve's duals (hot: see lp_interval)
                    duals = system.lp_interval(vector)[2]
                weights = duals if duals else system.combination(vector)
                findings.append(
                    Finding(
                        "suppressed",
                        self.releases[release].label,
                        tuple(names),
                        self._candidates(weights, system, vector),
                    )
                )

        # 2. (continued) atoms that only whole numbers pin, in a system too large for _whole_pinned: those of its
        # blocks of at most ATOMS_WHOLE_MAX_ATOMS atoms, once nothing else was found (the next round asks again)
        stopped = None  # (not run)
        if exact and self.cells is None and protection_width >= 2 and not findings and not small_system:
            stopped = self._whole_atoms_pinned(system, unsafe, released_zero, findings, seen_regions)
        if clear_only and findings:
            return None
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
            grouped=self.cells is not None,
            unsearched=self._unsearched(system, exact, narrow_unchecked, stopped),
        )

    def _add_tables(self, points: list[tuple[np.ndarray, np.ndarray]]) -> None:
        """Tables of the LP relaxation for the pool; where one is whole on the atoms it holds (a vertex of a
        count table's relaxation usually is), it is a whole-number table too, on those atoms."""
        self._pool.add(points)
        self._whole.add([(point, mask & (np.abs(point - np.round(point)) <= 1e-6)) for point, mask in points])

    def _unsearched(self, system: _System, exact: bool, narrow: int, stopped: int | None) -> tuple[dict[str, Any], ...]:
        """What this evaluation's searches did not cover, in fixed kinds (no value: the site's own review says
        where the audit did not look; threat model R14). ``unions``: unions of ``size`` or more open atoms in
        ``parts`` blocks (groups, in the grouped model), the largest of ``largest`` open atoms; ``across_groups``:
        unions taking atoms of two groups of the grouped model; ``whole_numbers``: regions only whole numbers pin,
        in a system of more than ``limit`` (``facts.MILP_MAX_ATOMS``) atoms, where withheld counts whose blocks
        hold at most ``withheld_up_to`` atoms were decided over whole numbers, and ``narrow`` withheld counts whose
        interval was rounded inward near the limit, or whose integer programs stopped, not so decided; each atom
        of a block of at most ``atoms_up_to`` atoms (0: not searched in this round, which found something else
        first, or the grouped model) was decided over whole numbers too, but ``atoms_stopped`` atoms whose
        integer programs stopped at their limit."""
        parts: dict[int, list[int]] = {}
        for (number, _), (n, searched) in self._searched.items():
            least, finished = self._programs.get(number, (0, False))
            if n <= searched or (self.cells is None and finished and least <= searched + 1):
                continue
            parts.setdefault(searched + 1, []).append(n)
        out: list[dict[str, Any]] = [
            {"kind": "unions", "size": size, "parts": len(sizes), "largest": max(sizes)}
            for size, sizes in sorted(parts.items())
        ]
        if self.cells is not None:
            out.append({"kind": "across_groups", "groups": int(len(np.unique(self.cells.atom_group)))})
        atoms = int((~system.zero).sum())
        if not (exact and self.cells is None and atoms <= MILP_MAX_ATOMS):
            out.append(
                {
                    "kind": "whole_numbers",
                    "atoms": atoms,
                    "limit": MILP_MAX_ATOMS,
                    "narrow": narrow,
                    "withheld_up_to": WHOLE_MAX_ATOMS if exact else 0,
                    "atoms_up_to": ATOMS_WHOLE_MAX_ATOMS if stopped is not None else 0,
                    "atoms_stopped": stopped or 0,
                }
            )
        return tuple(out)

    def _opened(self, vector: np.ndarray, need: int, low: int, high: int) -> tuple[int, int] | None:
        """Whether a recipient who knows each "0, or at least k" as the disjunction it is (not the branch the
        audit took) keeps at least ``need`` values of ``vector``, which the audit's own facts narrow to
        ``low..high`` (:mod:`~.branches`): an interval the recipient cannot narrow, or None (the finding
        stands). Only in the full model: the grouped model's atoms are not whole tables."""
        if self.cells is not None:
            return None
        on = np.flatnonzero(vector)
        key = (tuple(on.tolist()), tuple(vector[on].tolist()), need, low, high)
        if key not in self._opened_cache and self._system.stated(vector, self._branches_for[4]):
            self._opened_cache[key] = None  # the shown counts alone give it, whichever branch a count is in
        if key not in self._opened_cache:
            if self._branches is None:
                known, told, k, allow_zero, zero = self._branches_for
                facts = []
                for r, release in enumerate(self.releases):
                    boxes = {n: s.box for n, s in self.by_name[r].items() if s.box is not None}
                    if r == self.current:
                        facts.append((told[0], told[1], k, allow_zero, boxes))
                    else:
                        facts.append((release.rules, release.zero, release.min_cell_size, release.allow_zero, boxes))
                self._branches = Branches(self.incidence, known, self.relation_rows, zero, facts, self._branch_tables)
            self._opened_cache[key] = self._branches.open(vector, need, low, high)
        return self._opened_cache[key]

    def _vector(self, box: int) -> np.ndarray:
        return self._indicator(self.box_index[box])

    def _indicator(self, atoms: Any) -> np.ndarray:
        """The 0/1 vector over every atom of a region (a box's atoms, or a union)."""
        vector = np.zeros(self.incidence.shape[1])
        vector[list(atoms) if isinstance(atoms, frozenset) else atoms] = 1.0
        return vector

    def _targets(self, current_values: Mapping[str, int | None], first: dict[int, int]) -> dict[int, tuple[int, list]]:
        """Suppressed boxes that must stay uncertain: those hidden by a release before any earlier release showed
        them (hiding a count an earlier release made public protects nothing, so it is not a target)."""
        targets: dict[int, tuple[int, list[str]]] = {}
        for statement in self.statements:
            if statement.box is None or self._value(statement, current_values) is not None:
                continue
            if statement.box in first and first[statement.box] <= statement.release:
                continue  # shown already (or, through a model, under another name in this release)
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
        live = ~system.zero
        for atom in np.flatnonzero(determined & ~self.structural_zero & ~released_zero):
            value = 0 if system.zero[atom] else int(round(system.solution[atom]))
            region = frozenset([int(atom)])
            if not unsafe(value) or region in seen:
                continue
            vector = np.zeros(self.incidence.shape[1])
            vector[atom] = 1.0
            if self.cells is not None and value > 0 and not self.cells.whole(int(atom), live):
                # a union of full atoms, each of which other groups' counts leave open: a union pinned small,
                # passed over as the searches for unions pass one over (a listed count, cells of one table, ...)
                self._pinned_union(system, region, vector, value, live, [], seen, findings)
                continue
            if self._opened(vector, 2, value, value) is not None:
                continue
            seen.add(region)
            findings.append(self._difference(system, vector))

    def _difference(self, system: _System, vector: np.ndarray) -> Finding:
        """A region of the audited release worked out by differencing: its counts, and those whose suppression
        could break it."""
        return Finding(
            "difference",
            self.releases[self.current].label,
            self._names_overlapping(vector),
            self._candidates(system.combination(vector), system, vector),
        )

    def _whole_pinned(
        self,
        system: _System,
        unsafe: Any,
        released_zero: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
    ) -> None:
        """A small system (at most ``MILP_MAX_ATOMS`` live atoms): every atom and every difference of two nested
        boxes that the real relaxation leaves open, decided over whole numbers (two integer programs each). A
        recipient reasoning with whole numbers can pin down a region the relaxation cannot (five cells, a few
        overlapping counts and two feasible tables in all); in a small system that is cheap to rule out."""
        live = ~system.zero & ~self.structural_zero & ~released_zero
        regions: dict[frozenset[int], np.ndarray] = {}
        for atom in np.flatnonzero(live):
            vector = np.zeros(self.incidence.shape[1])
            vector[atom] = 1.0
            regions.setdefault(frozenset([int(atom)]), vector)
        boxes = {j: frozenset(a for a in atoms if live[a]) for j, atoms in enumerate(self.box_atoms)}
        for f, large in boxes.items():
            for g, small in boxes.items():
                if small < large and small:
                    regions.setdefault(large - small, self._vector(f) - self._vector(g))
        # A few whole-number tables first: a region that takes two values among them is open, and one that
        # takes a single value the policy shows needs no proof either; only the rest get integer programs.
        tables = np.array(system.whole_tables(6))
        for region, vector in regions.items():
            if region in seen or system.residual(vector) < 1e-6:
                continue  # decided already (pinned over the reals, or found)
            values = tables @ vector
            if not np.isnan(values).any() and (np.ptp(values) > 0.5 or not unsafe(int(round(values[0])))):
                continue
            interval = system.milp_interval(vector, 0, 10**9, strict=True)
            if interval is None or interval[0] != interval[1] or not unsafe(interval[0]):
                continue
            if self._opened(vector, 2, interval[0], interval[0]) is not None:
                continue
            seen.add(region)
            findings.append(self._difference(system, vector))

    def _whole_atoms_pinned(
        self,
        system: _System,
        unsafe: Any,
        released_zero: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
    ) -> int:
        """A system of more than ``MILP_MAX_ATOMS`` live atoms: every atom of its blocks of at most
        ``ATOMS_WHOLE_MAX_ATOMS`` atoms that the real relaxation leaves open, decided over whole numbers.
        Whole-number tables decide most: an atom that takes two values among them is open, and one that takes a
        single value the policy shows needs no proof (if it is pinned, it is pinned there). They are, in turn: the
        tables found so far (``self._whole``), six vertices of the relaxation of the blocks whose atoms those
        leave undecided (random objectives; a vertex is a whole table where it is whole), six integer programs
        over the blocks still undecided (many small blocks to a program: the sum both ways, four random
        directions), and each later program's own optima; only atoms none of them decides get their two integer
        programs (a cell of 1 record that six cells and five counts left between 0 and 1 over the reals, and at 1
        over whole numbers, went out in a block of 76 atoms: ``site_agent/test_withheld.py``,
        ``test_a_cell_whole_numbers_pin_in_a_large_block_is_not_released``).
        Returns the number of atoms whose programs stopped at their limit (named in the audit's result)."""
        live = ~system.zero & ~self.structural_zero & ~released_zero
        stopped = 0

        def undecided(block: Any, atoms: np.ndarray) -> np.ndarray:
            tables = self._whole.on(block.atoms)
            if len(tables) == 0:
                return atoms
            values = tables[:, atoms]
            single = np.ptp(values, axis=0) < 0.5
            small = np.array([unsafe(int(round(v))) for v in values[0]], bool)
            return atoms[single & small]

        left: list[tuple[Any, np.ndarray]] = []
        for block in system.blocks:
            if len(block.atoms) > ATOMS_WHOLE_MAX_ATOMS:
                continue
            atoms = np.array(
                [a for a in block.atoms[live[block.atoms]] if frozenset([int(a)]) not in seen], dtype=np.int64
            )
            if len(atoms) and len(atoms := undecided(block, atoms)):
                left.append((block, atoms))
        if left:  # vertices of the relaxation first (usually whole, and cheap), then whole-number tables
            self._add_tables(system.vertex_tables([block for block, _ in left], 6))
            left = [(block, rest) for block, atoms in left if len(rest := undecided(block, atoms))]
        if left:  # six whole-number tables of those blocks, many small blocks to a program
            tables = system.whole_tables(6, blocks=[block for block, _ in left])
            self._whole.add([(np.nan_to_num(t), system.zero | ~np.isnan(t)) for t in tables])
        for block, atoms in left:
            for atom in undecided(block, atoms):
                if len(undecided(block, np.array([atom]))) == 0:
                    continue  # a program's table for an earlier atom opened it
                vector = np.zeros(self.incidence.shape[1])
                vector[atom] = 1.0
                if system.residual(vector) < 1e-6:
                    continue  # pinned over the reals: _atoms_pinned decided it
                found: list[tuple[np.ndarray, np.ndarray]] = []
                interval = system.milp_interval(vector, 0, 10**9, strict=True, tables=found)
                self._whole.add(found)
                if interval is None:
                    stopped += 1
                    continue
                if interval[0] != interval[1] or not unsafe(interval[0]):
                    continue
                if self._opened(vector, 2, interval[0], interval[0]) is not None:
                    continue
                seen.add(frozenset([int(atom)]))
                findings.append(self._difference(system, vector))
        return stopped

    def _nested_pinned(
        self, system: _System, unsafe: Any, findings: list[Finding], seen: set[frozenset[int]], key: np.ndarray
    ) -> None:
        """Nested boxes G inside F whose difference F \\ G is pinned down to a value the policy would hide.

        F \\ G is pinned down exactly when F and G have the same residual (distance from the row space), so
        boxes are grouped by residual (sorted on a random projection, then compared) and, inside a group,
        sorted by value so that only pairs whose difference could be small are compared. ``key``: each box's
        residual against one random vector (:meth:`_residual_keys`, shared with :meth:`_unions_pinned`).
        """
        n_boxes = self.incidence.shape[0]
        if n_boxes < 2:
            return
        values = self.incidence @ system.solution
        live_mask = ~system.zero
        cache: dict[int, frozenset[int]] = {}

        def region_of(box: int) -> frozenset[int]:
            if box not in cache:
                cache[box] = self._live_region(box, live_mask)
            return cache[box]

        if self.cells is not None:
            self.cells.forget()
        order = np.argsort(key, kind="stable")
        start = 0
        while start < n_boxes:
            stop = start + 1
            while stop < n_boxes and abs(key[order[stop]] - key[order[stop - 1]]) < 1e-7:
                stop += 1
            if stop - start < 2:
                start = stop
                continue
            group = sorted((int(j) for j in order[start:stop]), key=lambda j: values[j])
            start = stop
            sorted_values = values[group]
            for gi, g in enumerate(group):
                # sorted by value: only the later boxes whose difference is small (0 too, when zeros are hidden)
                first = gi + 1 if unsafe(0) else int(np.searchsorted(sorted_values, sorted_values[gi] + 0.5))
                last = int(np.searchsorted(sorted_values, sorted_values[gi] + self._k - 0.5))
                for f in group[max(first, gi + 1) : last]:
                    difference = int(round(values[f] - values[g]))
                    if not unsafe(difference):
                        continue
                    if self.cells is not None and self.cells.box_group[f] != self.cells.box_group[g]:
                        # boxes of two groups: nested as regions of live full atoms (see decompose.Cells)
                        small, large = self._in_group(g), self._in_group(f)
                        if not self.cells.inside(small, large, live_mask) or self.cells.inside(large, small, live_mask):
                            continue
                    elif not region_of(g) < region_of(f):
                        continue
                    region = region_of(f) - region_of(g)
                    if region in seen:
                        continue
                    vector = self._vector(f) - self._vector(g)
                    if system.residual(vector) > 1e-6 or self._opened(vector, 2, difference, difference) is not None:
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

    def _residual_keys(self, system: _System) -> np.ndarray:
        """Per box, its residual (distance from the row space) dotted with one random vector: two boxes have the
        same key exactly when the system pins their difference down, and a box has key 0 when it pins the box
        itself (almost surely); computed without forming the residual matrix."""
        rng = np.random.default_rng(0)
        key = np.zeros(self.incidence.shape[0])
        for block in system.blocks:
            g = rng.standard_normal(len(block.atoms))
            sub = self.incidence[:, block.atoms]
            key += sub @ g - (sub @ block.basis) @ (block.basis.T @ g)
        free_atoms = np.flatnonzero(system.free)
        if len(free_atoms):
            key += self.incidence[:, free_atoms] @ rng.standard_normal(len(free_atoms))
        return key

    def _live_region(self, box: int, live: np.ndarray) -> frozenset[int]:
        """The atoms of a box that some table can fill (``live``: not fixed at zero)."""
        index = self.box_index[box]
        return frozenset(index[live[index]].tolist())

    def _unions_pinned(
        self, system: _System, unsafe: Any, findings: list[Finding], seen: set[frozenset[int]], key: np.ndarray
    ) -> None:
        """A box F less two or more boxes inside it, no two overlapping, all pinned down (shown, or worked out):
        what is left of F is pinned down too, and must not hold 1..k−1 records (0 too, when zeros are hidden).

        Two nested boxes are checked by :meth:`_nested_pinned`; here, per box F, an exact search over sums
        (:meth:`_sibling_search`) asks which sibling boxes inside F (one family: the cells of one table, the
        bands of one analysis, across every release), no two sharing an atom and leaving F's records in one
        stretch, take away all but a value the policy would hide, with at least one count of the audited release
        among them; a rest the earlier releases alone pin, or that is the family's own other cells, is passed
        over. Not searched: bands on F's own variable (thresholds and bands of one score: searching them cascaded
        into refusals over dense histories), families with more than ``UNION_FAMILY_BOXES`` boxes inside F, and
        boxes of different families together. Found by our red team: the 2x2 table's positives aged 24-59 in one
        study, less two bands of a comparison model (ages 30-44 and 45-59) in another, gave the three positives
        aged 24-29 while a third model's bands split them into two open atoms; and one ordinary agreement
        request gave the positives with no second reference (the analysed positives less the two pair cells
        with one). Long histories are searched too: until 2026-12-05 a system of more than 3,000 live atoms or
        1,500 pinned boxes was not, and after one earlier release of 3,057 open cells, nine cells less two shown
        cells gave 4 (site_agent/test_withheld.py::
        test_nine_cells_less_two_shown_cells_are_not_pinned_small_after_a_long_history)."""
        live_mask = ~system.zero
        values = self.incidence @ system.solution
        # the boxes pinned down (key 0) that hold a record, as rows of their live atoms, by size (then number)
        pinned = np.flatnonzero((np.abs(key) < 1e-7) & (np.round(values) >= 1))
        member = self.incidence[pinned][:, np.flatnonzero(live_mask)].tocsr()
        sizes = np.diff(member.indptr)
        keep = np.lexsort((pinned, sizes))
        keep = keep[sizes[keep] > 0]
        boxes, member, sizes = pinned[keep].tolist(), member[keep], sizes[keep]
        member.data[:] = 1.0
        audited = np.fromiter((b in self._suppressible for b in boxes), bool, count=len(boxes))
        if not audited.any():
            return
        # An F is searched only if it, or a box inside it, is of the audited release (the loop below passes the
        # others over): which boxes hold one comes from one sparse product, so that a long history's thousands
        # of pinned boxes cost little (before 2026-12-05, systems of more than 3,000 live atoms or 1,500 pinned
        # boxes were not searched at all)
        holds = (member @ member[audited].T).tocsr()  # live atoms each box shares with each of the audited
        holds.data = (holds.data == sizes[audited][holds.indices]).astype(float)
        holds.eliminate_zeros()
        searched = np.flatnonzero(audited | (np.diff(holds.indptr) > 0))
        shared = (member[searched] @ member.T).tocsr()  # live atoms each such F shares with every pinned box
        low, high = (0 if unsafe(0) else 1), self._k - 1
        rounded = {b: int(round(values[b])) for b in boxes}
        regions: dict[int, frozenset[int]] = {}
        signature = hash(live_mask.tobytes())
        for line, n in enumerate(searched.tolist()):
            f = boxes[n]
            total = rounded[f]
            others = shared.indices[shared.indptr[line] : shared.indptr[line + 1]]
            common = shared.data[shared.indptr[line] : shared.indptr[line + 1]]
            within = np.sort(others[(common == sizes[others]) & (sizes[others] < sizes[n])])
            inside = [boxes[m] for m in within.tolist() if rounded[boxes[m]] <= total - low]
            own = bool(audited[n])
            if len(inside) < 2 or not (own or any(g in self._suppressible for g in inside)):
                continue
            if total - sum(rounded[g] for g in inside) > high:
                continue  # even all of them together leave too many records
            for b in (f, *inside):
                if b not in regions:
                    regions[b] = self._live_region(b, live_mask)
            # the same question comes back in every repair round and every cut-back attempt of a release
            # (which of them the audited release shows is part of the question: a repair round withholds more)
            shown = (own, *(g in self._suppressible for g in inside))
            question = (f, total, signature, tuple(inside), tuple(rounded[g] for g in inside), shown)
            if question in self._union_answers:
                chosen = self._union_answers[question]
            else:
                chosen = self._sibling_search(
                    inside, regions, values, total - high, total - low, own, (regions[f], live_mask, f)
                )
                self._union_answers[question] = chosen
            if chosen is None:  # (a chain whose rest is its own table's other cells was passed over already)
                continue
            region = regions[f].difference(*(regions[g] for g in chosen))
            if region in seen:
                continue
            vector = self._vector(f) - sum(self._vector(g) for g in chosen)
            rest = int(round(values[f] - sum(values[g] for g in chosen)))
            if self._opened(vector, 2, rest, rest) is not None:
                continue
            if self._pinned_before(vector):
                continue  # the earlier releases alone pin it: public before this release, no cut of it can help
            seen.add(region)
            names = tuple(self._box_label(b) for b in [f, *chosen][:6])
            candidates = self._candidates(system.combination(vector), system, vector)
            findings.append(Finding("difference", self.releases[self.current].label, names, candidates))

    def _any_union_pinned(
        self,
        system: _System,
        unsafe: Any,
        released_zero: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
    ) -> None:
        """A small system (at most ``ANY_UNION_MAX_ATOMS`` live atoms in its equations): every union of atoms
        the shown counts pin down to a value the policy would hide, whatever counts it takes. The searches above
        look for an atom, a difference of two nested counts and a count less counts inside it; with five cells,
        a+d less b+d plus b+e gave a+e = 3 while a and e each stayed open (threat model R14). Passed over, as by
        those searches: a union that is a listed count, or the other cells of one table (withheld cells add up
        to a shown total less its shown cells, each protected on its own), or that the earlier releases alone
        pin, or that a recipient who keeps each "0, or at least k" open cannot pin. Only the smallest unions are
        reported in a round (a larger one that still holds is found in the next)."""
        live = ~system.zero & ~self.structural_zero & ~released_zero & ~system.free
        atoms = np.flatnonzero(live & (system.atom_block >= 0))
        if not 2 <= len(atoms) <= ANY_UNION_MAX_ATOMS:
            return
        # every non-empty union as a 0/1 row over these atoms, and its distance from the row space
        unions = ((np.arange(1, 2 ** len(atoms))[:, None] >> np.arange(len(atoms))) & 1).astype(float)
        squared = system.residuals(unions, atoms) ** 2
        values = unions @ system.solution[atoms]
        rounded = np.round(values)
        small = ((rounded > 0) & (rounded < self._k)) | ((rounded == 0) & unsafe(0))
        pinned = np.flatnonzero((squared < 1e-9) & small & (np.abs(values - rounded) < 1e-6))
        if len(pinned) == 0:
            return
        found: list[frozenset[int]] = []
        for row in sorted(pinned.tolist(), key=lambda r: (unions[r].sum(), r)):
            region = frozenset(atoms[unions[row] > 0].tolist())
            self._pinned_union(system, region, self._indicator(region), int(rounded[row]), live, found, seen, findings)

    def _pinned_union(
        self,
        system: _System,
        region: frozenset[int],
        vector: np.ndarray,
        value: int,
        live: np.ndarray,
        found: list[frozenset[int]],
        seen: set[frozenset[int]],
        findings: list[Finding],
    ) -> None:
        """A union of atoms (``vector`` its indicator) the shown counts pin to ``value``, which the policy hides:
        a finding, unless it is passed over (seen already, or larger than one found; a listed count; cells of
        one table; pinned by the earlier releases alone; open for a recipient who keeps each "0, or at least k"
        open)."""
        if region in seen or any(f < region for f in found) or self._listed_or_cells_of_a_table(region, live):
            return
        if self._pinned_before(vector):
            return  # the earlier releases alone pin it: public before this release
        if self._opened(vector, 2, value, value) is not None:  # (its integer programs cost most: asked last)
            return
        found.append(region)
        seen.add(region)
        findings.append(self._difference(system, vector))

    def _few_atoms_pinned(
        self,
        system: _System,
        unsafe: Any,
        released_zero: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
    ) -> None:
        """Beyond a small system: every union of two atoms of one block, and of three where the block has at most
        ``UNION_MAX_ATOMS`` atoms (four, in a block of at most ``FOUR_MAX_ATOMS`` atoms; five or six, in one of
        at most ``SIX_MAX_ATOMS``, and seven or eight in one of at most ``EIGHT_MAX_ATOMS``:
        :func:`_cancelling_unions`) that the shown counts pin down to a value the policy would hide (threat model
        R14: c + e = (a+b+c+e) − (a+b+d+e) + (d+e) gave 3 while c and e each stayed open, in a system too large
        for :meth:`_any_union_pinned`).

        A union is pinned when its indicator lies in the row space: when its atoms' distances from the row
        space (vectors) add up to zero. One random direction turns each atom's distance into a number, as
        :meth:`_residual_keys` does for boxes; pairs whose numbers add up to zero are found by sorting, triples
        by one search per pair of the sorted numbers, fours and more by searching the sorted sums of pairs,
        threes or fours (:func:`_cancelling_unions`, which keeps only unions whose value the policy would hide),
        and each candidate whose value the policy would hide is proved by its exact
        distance. A union across blocks needs no search: each block's part of it is then
        pinned on its own, and smaller. Passed over as by :meth:`_any_union_pinned`; only the smallest unions
        are reported in a round. Pairs are searched in any system, long histories too (sorting costs little);
        triples and more only in the blocks named (the searches are quadratic and more). Until 2026-12-05 no
        system of more than ``UNION_MAX_ATOMS`` live atoms was searched: after one earlier release of 3,030
        open cells the five cells above gave a+e = 3 (site_agent/test_withheld.py::
        test_no_pair_of_cells_is_pinned_small_after_a_long_history). Whether the earlier releases alone pin a
        union found may need their own system (:meth:`_pinned_before`). In the
        grouped model (a history whose full model is too large) it searches the atoms of one group at a time:
        each such union is a region of the full model, while a union of two groups' atoms could count a full
        atom twice."""
        live = ~system.zero & ~self.structural_zero & ~released_zero & ~system.free
        if int(live.sum()) <= ANY_UNION_MAX_ATOMS:
            return  # a small system: every union was checked
        rng = np.random.default_rng(1)
        for number, block in enumerate(system.blocks):
            if not block.basis.shape[1]:
                continue
            g = rng.standard_normal(len(block.atoms))
            key = g - block.basis @ (block.basis.T @ g)
            usable, _ = _open_in(block, live)
            groups = self.cells.atom_group[block.atoms[usable]] if self.cells is not None else np.zeros(len(usable))
            for group in np.unique(groups).tolist():  # the grouped model: one group's atoms at a time
                mine = usable[groups == group]
                searched = self._unions_of_block(system, unsafe, key[mine], block.atoms[mine], live, findings, seen)
                self._searched[(number, group)] = (len(mine), searched)

    def _many_atoms_pinned(
        self,
        system: _System,
        unsafe: Any,
        released_zero: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
        large: bool = False,
    ) -> None:
        """In a block of at most ``MANY_MAX_ATOMS`` atoms (the full model): unions larger than
        :meth:`_few_atoms_pinned` searches there (nine or more atoms in a block of at most ``EIGHT_MAX_ATOMS``,
        seven or more beyond), of any size, that the shown counts pin down to a value the policy would hide. One
        integer program per union (HiGHS, :data:`MANY_OPTIONS`): a 0/1 choice of the block's open atoms that
        is a combination of the block's rows (``v = Q y``, Q its row space's orthonormal basis), whose value the
        policy hides, the fewest atoms first. Each union found is proved by its exact distance from the row
        space and passed over as by :meth:`_any_union_pinned`; a union passed over is excluded and the program
        solved again (at most ``MANY_TRIES`` times a block). A chain of three boxes reaches any number of atoms:
        nine cells, each split by an earlier release, A = a0..a4 + d, D = d + e and E = e + a5..a8 gave
        A - D + E = 3 (k = 5; 29 atoms) until 2026-12-05
        (site_agent/test_withheld.py::test_nine_cells_of_a_chain_are_not_pinned_small).

        ``large``: the blocks of more than ``MANY_MAX_ATOMS`` atoms instead, those with at most
        ``LARGE_MAX_ATOMS`` open atoms: from the smallest size the sorting searches left out there, over the
        block's sparse rows (:func:`_union_program`), each program first asked whether any union exists. The
        same chain with longer paths (65 and 119 open atoms) went out until then (site_agent/test_withheld.py::
        test_nine_cells_of_a_chain_in_a_large_block_are_not_pinned_small). What ran and whether it finished is
        kept for :meth:`_unsearched`."""
        live = ~system.zero & ~self.structural_zero & ~released_zero & ~system.free
        if int(live.sum()) <= ANY_UNION_MAX_ATOMS:
            return  # a small system: every union was checked
        low, high = (0 if unsafe(0) else 1), self._k - 1
        for number, block in enumerate(system.blocks):
            n, rank = block.basis.shape
            if not rank or large != (n > MANY_MAX_ATOMS):
                continue
            usable, distance = _open_in(block, live)
            if n <= MANY_MAX_ATOMS:
                least = 9 if n <= EIGHT_MAX_ATOMS else 7
            elif len(usable) > LARGE_MAX_ATOMS:
                continue  # not searched (named in the result: threat model R14)
            else:  # every size the sorting searches of _few_atoms_pinned left out
                least = self._searched.get((number, 0), (0, 1))[1] + 1
            self._programs[number] = (least, True)  # every union of at least ``least`` open atoms, unless stopped
            if len(usable) < least:
                continue
            # the block's other open atoms take no part (an atom pinned on its own may: it changes no pin)
            others = np.flatnonzero(~live[block.atoms] & (distance > 1e-6))
            units, equal, rest, ny = _union_program(block, usable, others, n <= MANY_MAX_ATOMS)
            m = len(units)
            atoms = [block.atoms[unit] for unit in units]
            sizes = np.array([len(unit) for unit in units], float)
            values = np.array([system.solution[a].sum() for a in atoms])
            rows = [
                LinearConstraint(equal, np.zeros(m), np.zeros(m)),
                LinearConstraint(rest, np.zeros(rest.shape[0]), np.zeros(rest.shape[0])),
                LinearConstraint(np.concatenate([values, np.zeros(ny)])[None, :], low - 1e-6, high + 1e-6),
                LinearConstraint(np.concatenate([sizes, np.zeros(ny)])[None, :], least, np.inf),
            ]
            # the fewest atoms first, then the lowest atom numbers (so that the union found does not turn on how
            # the solver breaks a tie: the same releases on every machine, section 7 of docs/threat-model.md), in
            # whole numbers: with the tie-break as fractions of 1/(m(m+1)) one program of 352 sets ran for minutes
            # past HiGHS's time and node limits, and in whole numbers it took 0.18 s, the same union
            order = np.argsort(np.argsort([a.min() for a in atoms]))
            cost = np.concatenate([sizes * (m * (m + 1)) + (order + 1), np.zeros(ny)])
            integrality = np.concatenate([np.ones(m), np.zeros(ny)])
            bounds = Bounds(
                np.concatenate([np.zeros(m), np.full(ny, -np.inf)]),
                np.concatenate([np.ones(m), np.full(ny, np.inf)]),
            )
            found: list[frozenset[int]] = []
            for _ in range(MANY_TRIES):
                if n > MANY_MAX_ATOMS:
                    # is there any such union? (without the fewest-atoms cost HiGHS proves "none", the usual answer,
                    # in 40-75% of the time on the demo's largest blocks); if so, the fewest atoms as below
                    result = integer_program(
                        np.zeros_like(cost),
                        constraints=rows,
                        integrality=integrality,
                        bounds=bounds,
                        options=MANY_OPTIONS,
                    )
                    if result.status == 0:
                        result = integer_program(
                            cost, constraints=rows, integrality=integrality, bounds=bounds, options=MANY_OPTIONS
                        )
                else:
                    result = integer_program(
                        cost, constraints=rows, integrality=integrality, bounds=bounds, options=MANY_OPTIONS
                    )
                if result.status != 0 or result.x is None:
                    # none left (2: infeasible), or the program stopped at its limit (threat model R14)
                    self._programs[number] = (least, result.status == 2)
                    break
                chosen = np.flatnonzero(result.x[:m] > 0.5)
                region = frozenset(int(a) for c in chosen.tolist() for a in atoms[c])
                vector = self._indicator(region)
                value = float(values[chosen].sum())
                cut = np.zeros(m + ny)
                cut[:m] = -1.0
                cut[chosen] = 1.0
                exact = abs(value - round(value)) <= 1e-6
                if system.residual(vector) <= 1e-6 and exact and unsafe(round(value)):
                    self._pinned_union(system, region, vector, round(value), live, found, seen, findings)
                # a union that holds one found this round (by any search) is excluded with all that hold it: what it
                # adds is pinned too, and goes with it when a count is withheld; any other, itself alone
                if any(other <= region for other in seen):
                    cut[:m] = np.where(cut[:m] > 0, 1.0, 0.0)
                rows.append(LinearConstraint(cut[None, :], -np.inf, len(chosen) - 1))
            else:
                self._programs[number] = (least, False)  # MANY_TRIES programs, each found one: more may be left

    def _unions_of_block(
        self,
        system: _System,
        unsafe: Any,
        key: np.ndarray,
        atoms: np.ndarray,
        live: np.ndarray,
        findings: list[Finding],
        seen: set[frozenset[int]],
    ) -> int:
        """The search of :meth:`_few_atoms_pinned` among ``atoms`` (of one block, and in the grouped model of one
        group; ``key``: their random numbers). Returns the size up to which every union was searched."""
        if len(atoms) < 2:
            return len(atoms)
        order = np.argsort(key, kind="stable")
        keys, atoms = key[order], atoms[order]
        values = system.solution[atoms]
        tolerance = 1e-7 * max(1.0, float(np.abs(keys).max()))
        candidates: list[tuple[int, ...]] = list(_cancelling(keys, tolerance))
        positions = np.arange(len(keys)) if len(keys) <= UNION_MAX_ATOMS else np.zeros(0, int)
        for start in range(0, len(positions) - 2, 128):  # every pair (first < second), 128 firsts at a time
            firsts, seconds = np.nonzero(positions[None, :] > positions[start : start + 128, None])
            firsts += start
            sums = keys[firsts] + keys[seconds]
            near = np.clip(np.searchsorted(keys, -sums), 1, len(keys) - 1)
            hit = np.minimum(np.abs(keys[near] + sums), np.abs(keys[near - 1] + sums)) <= tolerance
            found_pairs = zip(firsts[hit].tolist(), seconds[hit].tolist(), sums[hit].tolist(), strict=True)
            for first, second, total in found_pairs:
                low = int(np.searchsorted(keys, -total - tolerance, "left"))
                high = int(np.searchsorted(keys, -total + tolerance, "right"))
                candidates += [(first, second, third) for third in range(max(low, second + 1), high)]
        splits = [(2, 2)] if len(keys) <= FOUR_MAX_ATOMS else []
        splits += [(3, 2), (3, 3)] if len(keys) <= SIX_MAX_ATOMS else []
        splits += [(4, 3), (4, 4)] if len(keys) <= EIGHT_MAX_ATOMS else []
        left_out: list[tuple[int, int]] = []
        candidates += _cancelling_unions(keys, tolerance, values, unsafe, splits, left_out) if splits else []
        sizes = {2, *([3] if len(keys) <= UNION_MAX_ATOMS else []), *(sum(s) for s in splits if s not in left_out)}
        searched = 1
        while searched + 1 in sizes:
            searched += 1
        found: list[frozenset[int]] = []
        # by the atoms' own indices (twins' numbers may swap places with the BLAS kernel's rounding)
        for union in sorted(candidates, key=lambda u: (len(u), sorted(atoms[list(u)].tolist()))):
            value = float(values[list(union)].sum())
            rounded = round(value)
            if abs(value - rounded) > 1e-6 or not unsafe(rounded):
                continue
            region = frozenset(int(atoms[i]) for i in union)
            if region in seen:
                continue
            vector = self._indicator(region)
            if system.residual(vector) > 1e-6:
                continue  # the random direction's coincidence: not pinned
            self._pinned_union(system, region, vector, rounded, live, found, seen, findings)
        return searched

    def _listed_or_cells_of_a_table(self, region: frozenset[int], live: np.ndarray) -> bool:
        """Whether ``region`` (live atoms) is the live part of a listed count, or of two or more cells of one table
        (sibling boxes, no two sharing an atom): a sum of counts the release lists, each protected on its own
        (as :meth:`_rest_is_listed`). Asked of the boxes at once (sparse products), not box by box: after 200
        releases, listing every box's live atoms took 1.25 s per evaluation."""
        key = hash(live.tobytes())
        if self._live_sizes is None or self._live_sizes[0] != key:
            self._families()
            if self._columns is None:
                self._columns = self.incidence.tocsc()
            self._live_sizes = (key, np.asarray(self.incidence @ live.astype(float)).ravel())
        sizes = self._live_sizes[1]
        atoms = np.fromiter(sorted(region), dtype=np.int64, count=len(region))
        columns = self._columns[:, atoms]
        within = np.asarray(columns.sum(axis=1)).ravel()  # the region's atoms in each box
        if np.any((within == len(region)) & (sizes == len(region))):
            return True  # a listed count
        inside = (within == sizes) & (sizes > 0)  # boxes whose live atoms all lie in the region
        families = {n for box in np.flatnonzero(inside).tolist() for n in self._family_index.get(box, [])}
        for number in sorted(families):
            parts = [m for m in self._sibling_families[number][1] if inside[m]]
            if len(parts) >= 2 and sizes[parts].sum() == len(region):
                if np.all(np.asarray(columns[parts].sum(axis=0)).ravel() >= 1):
                    return True  # they cover the region, so no two overlap
        return False

    def _pinned_before(self, vector: np.ndarray) -> bool:
        """Whether the earlier releases alone pin the region ``vector`` (every count of the audited release
        withheld, with no rule's fact): public before this release.

        First without building their system: where this evaluation's own combination for the region uses no
        count the audited release alone shows, and holds on every atom but those the earlier releases
        themselves leave empty (:meth:`_System.stated`), it is a combination of their counts. Otherwise their
        system is built (once per audit, on first need: 1.9 s after 200 releases of ``make bench``'s history)."""
        system = self._system
        rows = system.combination(vector)
        if rows and not any(system.row_box[r] in self._suppressible for r in rows):
            if system.stated(vector, self._history_equations()[3]):
                return True
        return self._history_system().residual(vector) < 1e-6

    def _history_equations(self) -> tuple:
        """The earlier releases' equations alone (every count of the audited release withheld, with no rule's
        fact): ``a``, ``b``, each row's box, the atoms they leave empty (structurally, by a shown 0 or by a
        rule's fact) and their bound rows. Worked out once, on first need."""
        if self._history_inputs is None:
            none = {s.name: None for s in self.statements if s.release == self.current}
            known, _ = self._known(none)
            a, b, row_box, zero, released_zero, bounds, _ = self._equations(none, ({}, {}), known)
            self._history_inputs = (a, b, row_box, zero | released_zero, bounds)
        return self._history_inputs

    def _history_system(self) -> _System:
        """The system of the earlier releases alone: what was public before this release. Built once, on first
        need."""
        if self._history is None:
            a, b, row_box, zero, bounds = self._history_equations()
            # every table this evaluation's system allows, the earlier releases allow too: only the atoms it
            # leaves empty in every table can be empty in all of theirs (its LP asks about those alone)
            self._history = _build_system(a, b, row_box, zero, *bounds, self._system.zero)
        return self._history

    def _families(self) -> list[tuple[str, list[int]]]:
        """Sibling boxes: the same conditions but on one variable, where each names other values (the bands of
        one analysis, the cells of one table, across every release); per family, that variable and its boxes."""
        if not hasattr(self, "_sibling_families"):
            groups: dict[tuple, list[int]] = {}
            for j, box in enumerate(self.boxes):
                for variable, _ in box:
                    rest = tuple(item for item in box if item[0] != variable)
                    groups.setdefault((variable, rest), []).append(j)
            self._sibling_families = [(key[0], members) for key, members in groups.items() if len(members) > 1]
            self._family_of: dict[int, list[list[int]]] = {}
            self._family_index: dict[int, list[int]] = {}
            self._family_order: list[dict[int, int]] = []
            for number, (variable, members) in enumerate(self._sibling_families):
                for member in members:
                    self._family_of.setdefault(member, []).append(members)
                    self._family_index.setdefault(member, []).append(number)

                def order(g: int, variable: str = variable) -> tuple:
                    condition = dict(self.boxes[g])[variable]
                    return (0, *condition) if isinstance(condition, tuple) else (1, tuple(sorted(condition)))

                ranked = sorted(members, key=order)  # bands by their lower edges, categories by name
                self._family_order.append({g: n for n, g in enumerate(ranked)})
        return self._sibling_families

    def _one_gap(
        self, variable: str, family: list[int], chain: tuple[int, ...], whole: tuple[frozenset[int], np.ndarray, int]
    ) -> bool:
        """For bands (a numeric variable): whether what the chosen bands leave of the line holds F's records in one
        stretch only, so that the rest is F within one band of the variable, a group a request could name. A
        rest in two stretches (the records below one band and above another) is not looked for (threat model,
        R14). A stretch counts as empty when bands of the family cover it and hold none of F's live atoms.
        Categories: any rest is F within a set of categories."""
        conditions = [dict(self.boxes[g])[variable] for g in chain]
        if not all(isinstance(c, tuple) for c in conditions):
            return True
        region, live, _ = whole
        edges = sorted(conditions)
        gaps, start = [], -math.inf
        for low, high in edges:
            if low > start:
                gaps.append((start, low))
            start = max(start, high)
        if start < math.inf:
            gaps.append((start, math.inf))
        filled = 0
        for low, high in gaps:
            cover = [
                (c[0], c[1], g)
                for g in family
                if isinstance(c := dict(self.boxes[g])[variable], tuple) and low <= c[0] and c[1] <= high
            ]
            reach, empty = low, True
            for c_low, c_high, g in sorted(cover):
                if c_low > reach:
                    break
                if region & self._live_region(g, live):
                    empty = False
                    break
                reach = max(reach, c_high)
            if not (empty and reach >= high):
                filled += 1
        return filled == 1

    def _rest_is_listed(
        self, whole: frozenset[int], chosen: tuple[int, ...], regions: dict[int, frozenset[int]], live: np.ndarray
    ) -> bool:
        """Whether what is left of ``whole`` is exactly the other cells of a chosen box's own table inside it
        (siblings that share no atom with the chosen): the rest is then a sum of counts the release lists, each
        withheld and protected on its own, as a table's withheld cells add up to its total less its shown cells
        (records read less those analysed and those left out for one reason). The check answers for groups a
        release does not list (threat model R14)."""
        self._families()
        taken = frozenset().union(*(regions[g] for g in chosen))
        rest = whole - taken
        for box in chosen:
            for members in self._family_of.get(box, []):
                listed: set[int] = set()
                for member in members:
                    region = self._live_region(member, live)
                    if region and region <= whole and not region & taken:
                        listed |= region
                if listed == rest:
                    return True
        return False

    def _sibling_search(
        self,
        inside: list[int],
        regions: dict[int, frozenset[int]],
        values: np.ndarray,
        low: float,
        high: float,
        own: bool,
        whole: tuple[frozenset[int], np.ndarray, int],
    ) -> tuple[int, ...] | None:
        """Two or more sibling boxes of ``inside`` (:meth:`_families`), no two sharing an atom, whose values sum
        to ``low``..``high`` (one of them of the audited release unless ``own``), by exact dynamic programming
        over sums: the bands of a family are taken in the order of their lower edges and each chain of them,
        one after another without overlap, keeps the sums it can reach (bit sets). A family whose other cells
        make up what is left of ``whole`` (the region of F, and the live atoms) is passed over
        (:meth:`_rest_is_listed`). None if there is none."""
        top = int(high)
        if top < 0:
            return None
        limit = (1 << (top + 1)) - 1
        window = limit & ~((1 << max(int(np.ceil(low)), 0)) - 1)
        self._families()
        # only the families with two boxes inside F, one of them of the audited release unless F is
        candidates: dict[int, list[int]] = {}
        for g in inside:
            for number in self._family_index.get(g, ()):
                candidates.setdefault(number, []).append(g)
        for number in sorted(candidates):
            variable, family = self._sibling_families[number]
            members = candidates[number]
            if len(members) < 2 or len(members) > UNION_FAMILY_BOXES:
                continue
            if isinstance(dict(self.boxes[members[0]])[variable], tuple) and whole[2] in self._family_order[number]:
                continue  # bands of F's own variable: not searched (threat model R14)
            mine = [g in self._suppressible for g in members]
            weight = [int(round(values[g])) for g in members]
            if not (own or any(mine)) or sum(weight) < low:
                continue
            position = self._family_order[number]
            order = sorted(range(len(members)), key=lambda n: position[members[n]])
            members = [members[n] for n in order]
            weight = [weight[n] for n in order]
            mine = [mine[n] for n in order]
            # reach[j][(more, involved)]: sums of chains ending at member j (more: two members or more)
            reach: list[dict[tuple[bool, bool], int]] = []
            for j, g in enumerate(members):
                state = {(False, mine[j]): (1 << weight[j]) & limit}
                for i in range(j):
                    if regions[members[i]] & regions[g]:
                        continue
                    for (_, involved), sums in reach[i].items():
                        key = (True, involved or mine[j])
                        state[key] = state.get(key, 0) | ((sums << weight[j]) & limit)
                reach.append(state)
                for (more, involved), sums in state.items():
                    if more and (involved or own) and sums & window:
                        total = (sums & window).bit_length() - 1
                        chain = self._chain(members, weight, mine, reach, regions, j, total, involved)
                        # a chain checks each member against the one before it: enough for bands, which are
                        # taken in order; categories that overlap across releases are checked here
                        if chain is None or any(
                            regions[a] & regions[b] for n, a in enumerate(chain) for b in chain[n + 1 :]
                        ):
                            continue
                        if self._rest_is_listed(whole[0], chain, regions, whole[1]):
                            break  # this family's remainders are its own withheld cells
                        if not self._one_gap(variable, family, chain, whole):
                            continue
                        return chain
                else:
                    continue
                break
        return None

    @staticmethod
    def _chain(
        members: list[int],
        weight: list[int],
        mine: list[bool],
        reach: list[dict[tuple[bool, bool], int]],
        regions: dict[int, frozenset[int]],
        j: int,
        total: int,
        involved: bool,
    ) -> tuple[int, ...] | None:
        """The members of a chain ending at ``j`` with sum ``total`` (two or more), read back from ``reach``."""
        chain = [members[j]]
        need, flag = total - weight[j], involved
        while True:
            step = None
            for i in range(j):
                if regions[members[i]] & regions[members[j]]:
                    continue
                for (more, was), sums in reach[i].items():
                    if (was or mine[j]) == flag and need >= 0 and (sums >> need) & 1:
                        step = (i, more, was)
                        break
                if step is not None:
                    break
            if step is None:
                return None
            i, more, was = step
            chain.append(members[i])
            if not more:
                return tuple(chain)
            j, need, flag = i, need - weight[i], was

    def _in_group(self, box: int) -> tuple[np.ndarray, int]:
        return self.box_index[box], int(self.cells.box_group[box]) if self.cells is not None else 0

    def _box_label(self, box: int) -> str:
        if not hasattr(self, "_labels"):
            self._labels: dict[int, str] = {}
            for statement in reversed(self.statements):  # the first statement of a box names it
                if statement.box is not None:
                    self._labels[statement.box] = f"{statement.name} (release {self.releases[statement.release].label})"
        return self._labels.get(box, "?")

    def _names_overlapping(self, vector: np.ndarray) -> tuple[str, ...]:
        overlap = self.incidence @ vector
        boxes = set(np.flatnonzero(overlap > 0.5).tolist())
        names = sorted(s.name for s in self.statements if s.release == self.current and s.box in boxes)
        return tuple(names[:6])

    def _candidates(self, weights: dict[int, float], system: _System, vector: np.ndarray) -> tuple[str, ...]:
        """Counts of the audited release whose suppression could break the finding, smallest value first.

        From the rows of a combination of released counts that yields the region (or the binding rows of the
        LP); if none is suppressible, the audited release's counts that overlap the region; if none, every
        count the audited release shows.
        """
        # every row of the combination (the caller picks among them by the analyses' fixed priority)
        boxes = {system.row_box[r] for r, w in weights.items() if system.row_box[r] in self._suppressible and w > 1e-9}
        if not boxes:
            overlap = self.incidence @ vector
            boxes = {int(j) for j in np.flatnonzero(np.abs(overlap) > 0.5) if int(j) in self._suppressible}
        if not boxes:
            # A shown count can work a region out through no row of the combination: a shown 0, or two shown
            # counts whose difference is 0, empties atoms the region's other counts then pin. Any shown count of
            # this release may be the one (the caller picks by the fixed priority); refusing instead would
            # tell the recipient that the values of this release, not the request, left nothing to withhold.
            boxes = {j for j in system.row_box if j is not None and j in self._suppressible}
        # by name, never by value: the choice must tell a recipient who knows this rule nothing about values
        # (the caller reorders by the analyses' priority, which does not look at values either)
        own = [s for s in self.by_name[self.current].values() if s.box is not None]
        return tuple(sorted(s.name for s in own if s.box in boxes))
