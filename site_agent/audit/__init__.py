"""Audit by linear programming: what could a recipient of every release to a study work out?

The recipient of a study's releases knows, for every count it was sent, the count's definition (a box: a
conjunction of conditions over record variables) and, where it was not suppressed, its value; it also knows
the additive relations between counts (records read = analysed + excluded, ...). Everything it can infer about
the site's records follows from these linear facts and from counts being non-negative whole numbers.

**Model.** The *atoms* are the common refinement of every box the site released (to every study: recipients of
different studies may be the same party): the largest regions of
record space that no released definition splits (two points of record space lie in the same atom when exactly
the same boxes contain them). The unknowns are the atom counts ``x >= 0``; each released count says that the
sum of its atoms equals its value, and each relation says that two sums are equal. Structural knowledge that
every recipient has is added explicitly: only analysed records have a score, and an analysed record's outcome
is ``"0"`` or ``"1"``. Excluded records therefore have no score or outcome split. The recipient knows the
models too (:mod:`site_agent.audit.model`): a score and the features its model reads are one joint variable
whose values are the (feature values, score band) combinations some input reaches (exactly, for a scorecard;
for an ONNX graph, those a record or a random input reaches), so a score band is a region of the features.

**What is checked.**

1. Every suppressed count, of this release and of every earlier release of the site: its feasible interval
   ``[min, max]`` (two linear programs, HiGHS through :func:`scipy.optimize.linprog`) must hold at least
   ``protection_width`` whole numbers (default 2: it can never be worked out exactly). The facts include
   what each count's withholding rule tells (:func:`~.facts.withheld_bounds`); a count withheld as not small
   whose value is 0 (zeros shown) is fixed at 0 and is no target.
2. Differencing: every atom, and every difference ``F \\ G`` of two nested boxes (``G`` inside ``F``), must
   not be exactly determined with a value the policy would suppress (1..k−1, and 0 when zeros may not be
   shown). A region is exactly determined when its indicator vector lies in the row space of the equality
   system after the atoms that are zero in every feasible table are fixed (found with one LP per block);
   this is exact for the real relaxation and costs one SVD per block instead of one LP per region. Beyond
   two boxes: a pinned box less two or more pinned boxes inside it, no two overlapping (``Audit._unions_pinned``):
   among sibling boxes (the same conditions but on one variable: the cells of one table, the bands of one
   analysis, across every release) by exact dynamic programming over sums, bands only on another variable than
   the box's own. A rest that is exactly the other cells of a chosen box's own table (withheld cells adding up
   to a total less its shown cells) is passed over: each of them is protected by check 1; so is a rest the
   earlier releases alone already pin. It runs in any system: only boxes of the audited release and those
   holding one are looked at.
   In a small system (at most ``ANY_UNION_MAX_ATOMS`` live atoms in its equations) every union of atoms is
   checked (``Audit._any_union_pinned``), with the same passes and two or more cells of one table passed over;
   in a larger one, every union of two atoms of one block, of three in a block of at most ``UNION_MAX_ATOMS``,
   of four in a block of at most ``FOUR_MAX_ATOMS``, of five or six in one of at most ``SIX_MAX_ATOMS`` and of
   seven or eight in one of at most ``EIGHT_MAX_ATOMS`` (``Audit._few_atoms_pinned``: the atoms' distances
   from the row space, turned into numbers by one random direction, add up to zero; each candidate proved by
   its exact distance); and larger unions of any size by an integer program (``Audit._many_atoms_pinned``: a
   0/1 choice of open atoms that is a combination of the block's rows, the fewest atoms first; in a block of
   more than ``MANY_MAX_ATOMS`` and at most ``LARGE_MAX_ATOMS`` open atoms over the block's sparse rows, one
   variable per set of atoms every row takes or leaves together, and only in a round where nothing else was
   found). Each result lists what its searches did not cover (``AuditResult.unsearched``: union sizes in blocks
   where no program ran or one stopped at its limits, unions across the grouped model's groups, whole-number
   reasoning in a system of more than ``MILP_MAX_ATOMS`` atoms); the site's review shows it.

**Scale: the grouped model.** A site's history crosses every variable's cuts with every other's (fine ROC
score bands times age bands: 150,000 atoms after 200 releases of mixed analyses), though no count names a fine
score band and an age band together. Where the full model has more than ``FULL_MAX_ATOMS`` atoms, the audit
therefore answers in a grouped model (:mod:`~site_agent.audit.decompose`): the scores and the boxes over them
in a centre, each other variable's boxes in a leaf, tied by one row per cell of the leaf boxes' projections
onto the centre. Its linear programs have the same optima as the full model's, and its atoms answer the atom
and nesting checks for full atoms exactly; its findings decide (the same regions; the counts it proposes to
withhold come from its own rows, so a repair may withhold other counts than the full model would). Its
searches for unions take one group's atoms at a time (each union of them is a region of the full model; one
across groups could count a full atom twice), and a group's atom pinned small that is a union of several
full atoms is such a union; unions across groups are not searched. So wherever the full model can be built,
the full model decides (until 2026-12-05 the grouped model answered first at any size, without any search for
unions, and its "nothing found" let a union of two cells pinned small go out). Which case applies is known
when the audit is built (the full refinement stops as soon as it passes the limit); beyond the limit the
grouped model evaluates once, without the clear-only pass, which could only agree with that evaluation or
defer to it (it ran integer programs on every narrow interval of every earlier release).

**Integrality.** The true interval of a count over whole-number tables can only be narrower than the LP
relaxation's. We round the LP bounds inward (``ceil(min)``, ``floor(max)``), and where it is cheap (a suppressed
count whose rounded interval holds fewer than ``protection_width + 2`` values) we solve the two integer programs
exactly with :func:`scipy.optimize.milp` under a time limit, keeping the LP bound if the limit is hit. A
withheld count whose blocks hold more atoms, up to ``WHOLE_MAX_ATOMS``, gets its two integer programs whatever
its interval, unless whole-number tables found by earlier programs already give it enough values. Every integer
program runs in a worker process that is killed 2 s after its time limit (:mod:`~.programs`: HiGHS checks its
own limits only between its steps). Differencing (check 2) is decided on the relaxation: a region the relaxation
cannot pin down may, in non-unimodular systems (overlapping counts, or three or more cross-classified
variables), still be pinned down over whole numbers; this is a known limit of the method (Hundepool et al. 2012,
§4.3). Where the whole system is small (at most ``MILP_MAX_ATOMS`` live atoms) every atom and nested difference
the relaxation leaves open is also decided by two integer programs (``Audit._whole_pinned``); larger systems
keep the limit.

**Not small, as a disjunction.** Before a finding makes the site withhold more, :mod:`~.branches` looks for a
whole-number table in which the counts withheld as "0, or at least k" may lie in either branch and the found
count stays open; the finding is dropped only on such a table.

References
----------
Hundepool A, Domingo-Ferrer J, Franconi L, et al. *Statistical Disclosure Control*. Wiley, 2012, ch. 4
(tabular data: sensitivity rules, feasibility intervals, secondary suppression, linked tables).
Fischetti M, Salazar-González JJ. Solving the cell suppression problem on tabular statistical data
protected by lower and upper protection levels. *Management Science* 2001;47(7):1008–1027 (the LP audit).
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from .facts import (
    ANALYSED,
    MAX_ATOMS,
    MILP_MAX_ATOMS,
    OTHER,
    OUTCOME,
    OUTCOME_VALUES,
    SCORED,
    STATUS,
    AuditError,
    AuditResult,
    Finding,
    Interval,
    ReleaseFacts,
)
from .refinement import Box, normalise, refine

if TYPE_CHECKING:
    from .check import Audit


def __getattr__(name: str) -> Any:
    # The linear-programming audit needs scipy (about 0.3 s to import); a lone flow and 2x2 release is checked
    # in closed form (``tree``) and never needs it, so a site process imports it only when an audit does.
    if name == "Audit":
        from .check import Audit

        return Audit
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


__all__ = [
    "ANALYSED",
    "MAX_ATOMS",
    "MILP_MAX_ATOMS",
    "OTHER",
    "OUTCOME",
    "OUTCOME_VALUES",
    "SCORED",
    "STATUS",
    "Audit",
    "AuditError",
    "AuditResult",
    "Box",
    "Finding",
    "Interval",
    "ReleaseFacts",
    "normalise",
    "refine",
]
