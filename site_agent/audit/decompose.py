"""The audit's model split into clusters of variables: the same answers without the full common refinement.

The full refinement (:func:`~site_agent.audit.refinement.refine`) crosses every variable's cuts with every
other's: a history of ROC bands (fine score cuts) and of age-band subgroup tables (age cuts at one score
threshold) has as many atoms as score cells times age cells, though no released count ever names a fine score
band together with an age band. Here the boxes are split into groups by the variables they name besides status
and outcome (the *hub*, in every group):

- the *centre* holds the model's scores and the boxes that name no other variable (the flow, 2x2 tables,
  ROC bands);
- each *leaf* holds the boxes that name some other variable (age, sex, ...), two variables in one leaf when a
  box names both; a leaf's boxes may also cut the score (a subgroup's 2x2 table), usually at few thresholds.

Each group is refined on its own, together with the *projections* of the leaf boxes onto the hub and the
centre's variables (a subgroup's 2x2 cell projects onto the 2x2 cell of the whole population); the centre's
atoms then refine every leaf's projections, and one homogeneous row per cell of a leaf's projections says that
the centre and the leaf count the same records in it. The feasible sets agree exactly: every table of the full
model gives group tables that meet these rows (sum its atoms), and group tables that meet them glue into a
table of the full model (spread each centre atom's records over the leaf atoms of its cell in proportion, the
leaves independently given the centre; integer tables glue too, by the north-west corner rule one leaf at a
time). So every linear program over box counts has the same optimum in both models (Lauritzen 1996, §3.2:
marginals that agree on the separators of a decomposable model extend to a joint distribution). The model is
used only where every projection is itself a released box, so that each group's atom is a union of full atoms
and a full atom is one atom of each group, all in the same cells (:class:`Cells` answers the atom and nesting
questions of the differencing checks from that).

The grouped model is used only where the full model has too many atoms to build; it has no searches for
unions of atoms (:class:`site_agent.audit.check.Audit` decides which model answers).

Reference: Lauritzen SL. *Graphical Models*. Oxford University Press, 1996, ch. 3.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np
from scipy import sparse

from .facts import ANALYSED, MAX_ATOMS, OUTCOME, SCORED, STATUS, AuditError
from .refinement import Box, Domains, _base, _bits, refine

HUB = frozenset({STATUS, OUTCOME})


@dataclass
class Decomposition:
    """Atoms of every group side by side: ``incidence[box, atom]``, the rows tying the groups together, and
    the group of each box (0 = the centre)."""

    incidence: sparse.csr_matrix
    separators: sparse.csr_matrix
    box_group: np.ndarray
    atom_group: np.ndarray
    cells: list[tuple[int, np.ndarray, np.ndarray]]  # per separator row: leaf, its centre atoms, its leaf atoms


def _variables(box: Box) -> frozenset[str]:
    return frozenset(v for v, _ in box) - HUB


def _project(box: Box, keep: frozenset[str]) -> Box:
    return tuple((v, c) for v, c in box if v in keep or v in HUB)


def decompose(
    boxes: Sequence[Box], domains: Domains | None = None, joint: Mapping[str, list[str]] | None = None
) -> Decomposition | None:
    """The grouped model of ``boxes``, or None when it would be the full model (one group)."""
    names = [_variables(box) for box in boxes]
    # the centre: the model's scores (every analysis crosses them with something, ROC bands cut them finely);
    # the leaves: the other variables, joined when one box names two of them
    centre_vars = frozenset(v for variables in names for v in variables if _base(v) in SCORED)
    parent: dict[str, str] = {}

    def root(v: str) -> str:
        while parent.setdefault(v, v) != v:
            v = parent[v]
        return v

    for variables in names:
        private = sorted(variables - centre_vars)
        for v in private[1:]:
            parent[root(v)] = root(private[0])
    group_of = np.zeros(len(boxes), int)
    leaves: list[str] = []
    for j, variables in enumerate(names):
        private = sorted(variables - centre_vars)
        if not private:
            continue
        leaf = root(private[0])
        if leaf not in leaves:
            leaves.append(leaf)
        group_of[j] = 1 + leaves.index(leaf)
    if not leaves or (len(leaves) == 1 and not np.any(group_of == 0)):
        return None
    members = [np.flatnonzero(group_of == g) for g in range(len(leaves) + 1)]
    projections = [[_project(boxes[j], centre_vars) for j in members[g]] for g in range(1, len(leaves) + 1)]
    known = set(boxes)
    domains = domains or {}
    for g in range(1, len(leaves) + 1):
        # Every projection must be a released box: then each group's atom is a union of full atoms, and a full
        # atom is one atom of each group (its count the audit can check). And a leaf variable's domain binds
        # analysed records only: a leaf box over analysed and other records alike would make a leaf atom hold
        # different values for each, so the groups would not glue.
        if any(p not in known for p in projections[g - 1]):
            return None
        for j in members[g]:
            status = dict(boxes[j]).get(STATUS)
            mixed = status is None or (ANALYSED in status and len(status) > 1)
            if mixed and any(v in domains for v in names[j] - centre_vars):
                return None
    centre_list = [boxes[j] for j in members[0]] + [p for ps in projections for p in ps]
    lists = [centre_list] + [[boxes[j] for j in members[g]] + projections[g - 1] for g in range(1, len(leaves) + 1)]
    atom_masks = [refine(group, domains, joint) for group in lists]
    total_atoms = sum(len(m) for m in atom_masks)
    if total_atoms > MAX_ATOMS:
        raise AuditError(
            "the requests answered by this site define too many distinct regions to audit; ask for fewer bands"
        )
    offsets = np.cumsum([0] + [len(m) for m in atom_masks])
    rows: list[np.ndarray] = []
    cols: list[np.ndarray] = []
    bits_of = [[_bits(mask, len(group)) for mask in masks] for group, masks in zip(lists, atom_masks, strict=True)]
    for g, group_members in enumerate(members):
        own = len(group_members)
        for a, bits in enumerate(bits_of[g]):
            inside = bits[bits < own]
            rows.append(group_members[inside])
            cols.append(np.full(len(inside), offsets[g] + a))
    row_index = np.concatenate(rows) if rows else np.zeros(0, int)
    col_index = np.concatenate(cols) if cols else np.zeros(0, int)
    incidence = sparse.csr_matrix(
        (np.ones(len(row_index)), (row_index, col_index)), shape=(len(boxes), int(offsets[-1]))
    )
    # separators: per leaf, the cells of its projections, counted alike by centre and leaf
    cell_list: list[tuple[int, np.ndarray, np.ndarray]] = []
    start = len(members[0])
    for g in range(1, len(leaves) + 1):
        width = len(projections[g - 1])
        centre_span = (start, start + width)
        start += width
        cells: dict[tuple, list[tuple[int, float]]] = {}
        for a, bits in enumerate(bits_of[0]):
            key = _key(bits, centre_span)
            if key:
                cells.setdefault(key, []).append((int(offsets[0] + a), 1.0))
        own = len(members[g])
        for a, bits in enumerate(bits_of[g]):
            key = _key(bits, (own, own + width))
            if key:
                cells.setdefault(key, []).append((int(offsets[g] + a), -1.0))
        for entries in cells.values():
            centre = np.array([a for a, sign in entries if sign > 0], int)
            leaf = np.array([a for a, sign in entries if sign < 0], int)
            cell_list.append((g, centre, leaf))
    n_atoms = int(offsets[-1])
    if cell_list:
        sizes = [len(c) + len(f) for _, c, f in cell_list]
        columns = np.concatenate([np.concatenate([c, f]) for _, c, f in cell_list])
        signs = np.concatenate([np.r_[np.ones(len(c)), -np.ones(len(f))] for _, c, f in cell_list])
        rows_of = np.repeat(np.arange(len(cell_list)), sizes)
        separators = sparse.csr_matrix((signs, (rows_of, columns)), shape=(len(cell_list), n_atoms))
    else:
        separators = sparse.csr_matrix((0, n_atoms))
    atom_group = np.repeat(np.arange(len(atom_masks)), [len(m) for m in atom_masks])
    return Decomposition(incidence, separators, group_of, atom_group, cell_list)


def _key(bits: np.ndarray, span: tuple[int, int]) -> tuple[int, ...]:
    """An atom's separator cell: which of the leaf's projections hold it (by position)."""
    inside = bits[(bits >= span[0]) & (bits < span[1])] - span[0]
    return tuple(int(i) for i in inside)


class Cells:
    """The separator cells of a grouped model, for questions about the full model's atoms (a full atom is one
    atom of each group, all in the same cells): whether a group's atom is, as a region of live records, one
    full atom, and whether one box holds another as regions of live full atoms."""

    def __init__(self, decomposition: Decomposition) -> None:
        self.atom_group = decomposition.atom_group
        self.box_group = decomposition.box_group
        self.cells = decomposition.cells
        self.leaves = int(decomposition.box_group.max(initial=0))
        n_atoms = len(self.atom_group)
        self.cell_of_leaf_atom: dict[int, int] = {}
        self.cell_of_centre: list[dict[int, int]] = [{} for _ in range(self.leaves + 1)]
        # member[cell, atom] = 1: the atom (of the centre or of the cell's leaf) lies in the cell
        rows, cols = [], []
        for index, (leaf, centre, leaf_atoms) in enumerate(self.cells):
            for atom in leaf_atoms.tolist():
                self.cell_of_leaf_atom[atom] = index
            for atom in centre.tolist():
                self.cell_of_centre[leaf][atom] = index
            rows += [index] * (len(centre) + len(leaf_atoms))
            cols += [*centre.tolist(), *leaf_atoms.tolist()]
        self.member = sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(self.cells), n_atoms))
        self.cell_leaf = np.array([leaf for leaf, _, _ in self.cells], int)
        self.centre = self.atom_group == 0
        self.forget()

    def _live(self, atoms: np.ndarray, live: np.ndarray) -> list[int]:
        return [int(a) for a in atoms if live[a]]

    def _alone_in_leaves(self, centre_atom: int, live: np.ndarray, skip: int = -1) -> bool:
        """Whether every leaf (but ``skip``) has at most one live atom in the centre atom's cell."""
        for leaf in range(1, self.leaves + 1):
            if leaf == skip:
                continue
            index = self.cell_of_centre[leaf].get(centre_atom)
            if index is not None and len(self._live(self.cells[index][2], live)) > 1:
                return False
        return True

    def whole(self, atom: int, live: np.ndarray) -> bool:
        """Whether the live records of a group's atom make up one full atom (so its count is that atom's)."""
        group = int(self.atom_group[atom])
        if group == 0:
            return self._alone_in_leaves(atom, live)
        index = self.cell_of_leaf_atom.get(atom)
        if index is None:
            return True
        centres = self._live(self.cells[index][1], live)
        return len(centres) <= 1 and all(self._alone_in_leaves(c, live, group) for c in centres)

    def reach(self, atoms: np.ndarray, group: int, live: np.ndarray) -> np.ndarray:
        """Live centre atoms that share a full atom with the live ``atoms`` of ``group`` (a mask)."""
        own = np.zeros(len(self.atom_group), bool)
        own[atoms] = True
        own &= live
        if group == 0:
            return own
        cells = (self.member @ own.astype(float)) > 0.5
        return (self.member.T @ cells.astype(float) > 0.5) & live & self.centre

    def held(self, atoms: np.ndarray, group: int, live: np.ndarray) -> np.ndarray:
        """Centre atoms whose every live full atom lies in the box with these ``atoms`` of ``group`` (a mask)."""
        own = np.zeros(len(self.atom_group), bool)
        own[atoms] = True
        if group == 0:
            return own
        outside = live & ~own & (self.atom_group == group)
        bad = (self.member @ outside.astype(float)) > 0.5
        good = ~bad & (self.cell_leaf == group)
        return (self.member.T @ good.astype(float) > 0.5) & self.centre

    def inside(self, small: tuple[np.ndarray, int], large: tuple[np.ndarray, int], live: np.ndarray) -> bool:
        """Whether every live full atom of the box ``small`` (its atoms, its group) lies in the box ``large``."""
        (atoms_s, group_s), (atoms_l, group_l) = small, large
        if group_s == group_l:
            mine = atoms_s[live[atoms_s]]
            return bool(np.isin(mine, atoms_l).all())  # one group: its atoms are full atoms' unions alike
        key_s, key_l = ("reach", id(atoms_s)), ("held", id(atoms_l))
        if key_s not in self._memo:
            self._memo[key_s] = self.reach(atoms_s, group_s, live)
        if key_l not in self._memo:
            self._memo[key_l] = self.held(atoms_l, group_l, live)
        return not np.any(self._memo[key_s] & ~self._memo[key_l])

    def forget(self) -> None:
        """Drop what :meth:`inside` remembered (the live atoms change with every evaluation)."""
        self._memo: dict[tuple[str, int], np.ndarray] = {}
