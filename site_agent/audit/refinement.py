"""Boxes (normalised count definitions) and their common refinement into atoms (see :mod:`site_agent.audit`)."""

from __future__ import annotations

import math
from bisect import bisect_left
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..counts import Condition
from .facts import ANALYSED, MAX_ATOMS, OTHER, OUTCOME, OUTCOME_VALUES, SCORED, STATUS, AuditError

# --- boxes: normalised definitions ------------------------------------------------------------------------

Constraint = tuple[float, float] | frozenset[str]  # numeric [low, high) or categorical value set
Box = tuple[tuple[str, Constraint], ...]


@dataclass(frozen=True)
class Domain:
    """What the schema says every analysed record's value of a feature is: a whole number (``int``) or a
    number (``float``) in [minimum, maximum], or one of the listed categories. The recipient knows it."""

    kind: str
    minimum: float = -math.inf
    maximum: float = math.inf
    categories: frozenset[str] = frozenset()

    @classmethod
    def from_dict(cls, raw: Mapping[str, Any]) -> Domain:
        kind = str(raw.get("type", "float"))
        low = raw.get("min")
        high = raw.get("max")
        return cls(
            kind,
            -math.inf if low is None else float(low),
            math.inf if high is None else float(high),
            frozenset(str(c) for c in raw.get("categories", ())),
        )

    def meet(self, other: Domain) -> Domain:
        """Both domains at once (two schemas of the same feature): the narrower reading."""
        kinds = {self.kind, other.kind}
        kind = "category" if "category" in kinds else ("int" if "int" in kinds else "float")
        if self.categories and other.categories:
            categories = self.categories & other.categories
        else:
            categories = self.categories or other.categories
        return Domain(kind, max(self.minimum, other.minimum), min(self.maximum, other.maximum), categories)

    def snap(self, low: float, high: float) -> tuple[float, float]:
        """The band [low, high) as the values of the domain it holds: whole-number edges for an ``int``
        feature, and no edge beyond the range (a band 23.2-23.5 of whole months is empty; 0-24 and −∞-24
        are the same band when no value is below 0)."""
        if self.kind == "int":
            low = math.ceil(low) if math.isfinite(low) else low
            high = math.ceil(high) if math.isfinite(high) else high
            if low <= self.minimum:
                low = -math.inf
            if high > self.maximum:
                high = math.inf
        else:
            if low <= self.minimum:
                low = -math.inf
            if high > self.maximum and math.isfinite(self.maximum):
                high = math.inf
        return low, high

    def holds(self, low: float, high: float) -> bool:
        """Whether a value of the domain can lie in [low, high)."""
        first = max(low, self.minimum)
        if self.kind == "int" and math.isfinite(first):
            first = math.ceil(first)
        return first < high and first <= self.maximum


Domains = Mapping[str, Domain]


def _qualified(variable: str, bundle: str, models: Mapping[str, Mapping[str, Any]] | None = None) -> str:
    """A score variable named by its model (``score@m:<id>``: the same function in two bundles is one
    variable), or by the bundle when the facts do not describe the model (ledgers written before)."""
    if variable not in SCORED:
        return variable
    model = (models or {}).get(variable)
    if model is not None and model.get("id"):
        return f"score@m:{model['id']}"
    return f"{variable}@{bundle}" if bundle else variable


def _base(variable: str) -> str:
    return variable.split("@", 1)[0]


def normalise(
    where: Sequence[Condition],
    bundle: str = "",
    domains: Domains | None = None,
    models: Mapping[str, Mapping[str, Any]] | None = None,
) -> Box | None:
    """The box of a conjunction (conditions on one variable intersected); ``None`` if it is empty.

    With ``domains``, a box of analysed records only is read within the features' domains: numeric bands
    snapped to the values they can hold, categories outside the list dropped, and a condition that every
    analysed record meets (all categories, a band spanning the range) dropped. With ``models`` (variable ->
    the model's description, :mod:`site_agent.audit.model`), score variables are named by the model.
    """
    parts: dict[str, Constraint] = {}
    for condition in where:
        name = _qualified(condition.variable, bundle, models)
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
    if domains and parts.get(STATUS) == frozenset({ANALYSED}):
        for name, constraint in list(parts.items()):
            domain = domains.get(name)
            if domain is None:
                continue
            if isinstance(constraint, tuple):
                constraint = domain.snap(*constraint)
                if constraint == (-math.inf, math.inf):
                    del parts[name]
                    continue
                if not domain.holds(*constraint):
                    return None
            elif domain.categories:
                constraint = constraint & domain.categories
                if constraint == domain.categories:
                    del parts[name]
                    continue
            parts[name] = constraint
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


def _cell_masks(
    variable: str, boxes: Sequence[Box], joint: Mapping[str, list[str]] | None = None
) -> tuple[list[Any], list[int], bool]:
    """Cells of one variable and, per cell, the bitmask of boxes containing it.

    Numeric cells are the intervals between consecutive edges plus a last cell for "no value"; categorical
    cells are the named values plus one cell for every other value (or none); a joint variable's cells are
    its values plus "no value" (records not analysed).
    """
    constrained = [(j, dict(box)[variable]) for j, box in enumerate(boxes) if variable in dict(box)]
    unconstrained = 0
    for j, box in enumerate(boxes):
        if variable not in dict(box):
            unconstrained |= 1 << j
    if joint and variable in joint:
        own = list(joint[variable])
        masks = _masks(own, constrained, len(boxes))
        return [*own, None], [unconstrained | m for m in masks] + [unconstrained], False
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
        bounds = [-math.inf, *edges, math.inf]
        cells: list[Any] = [(bounds[i], bounds[i + 1]) for i in range(n)] + [None]  # None = no value
        masks.append(unconstrained)
        return cells, masks, True
    values = sorted({v for _, s in constrained for v in s})
    if variable == STATUS and ANALYSED not in values:
        values.append(ANALYSED)
    if variable == OUTCOME:
        values = sorted(set(values) | set(OUTCOME_VALUES))
    cells = [*values, OTHER]
    return cells, [unconstrained | m for m in _masks(cells, constrained, len(boxes))], False


def _masks(cells: Sequence[Any], constrained: Sequence[tuple[int, Any]], n_boxes: int) -> list[int]:
    """Per cell, the bitmask of the ``constrained`` boxes (position, allowed cells) that allow it: built as one
    bit matrix and packed (shifting a bit into a mask of thousands of boxes once per pair was the refinement's
    slowest step at 200 earlier releases)."""
    position = {cell: i for i, cell in enumerate(cells)}
    member = np.zeros((len(cells), n_boxes), bool)
    for j, allowed in constrained:
        rows = [position[cell] for cell in allowed]
        member[rows, j] = True
    packed = np.packbits(member, axis=1, bitorder="little")
    return [int.from_bytes(row.tobytes(), "little") for row in packed]


def _possible(variable: str, cell: Any, domains: Domains, named: frozenset[str]) -> bool:
    """Whether an analysed record can have a value of ``variable`` in ``cell`` (its schema domain)."""
    domain = domains.get(variable)
    if domain is None:
        return True
    if cell is None:
        return False  # every analysed record has a value (missing values are excluded or scored as a value)
    if isinstance(cell, tuple):
        return domain.holds(*cell)
    if cell == OTHER:
        return not domain.categories or bool(domain.categories - named)
    return not domain.categories or cell in domain.categories


def refine(
    boxes: Sequence[Box],
    domains: Domains | None = None,
    joint: Mapping[str, list[str]] | None = None,
    limit: int = MAX_ATOMS,
) -> list[int]:
    """Atoms of the common refinement, each as the bitmask of the boxes that contain it.

    Variables are split one at a time; partial regions contained in the same boxes so far are merged,
    because their further splits are identical (a decision-diagram reduction). Regions in no box are dropped:
    nothing released says anything about them. With ``domains``, analysed records take only values their
    features' domains allow (an empty band between two whole numbers is no atom). ``joint`` gives the values
    of the joint variables that stand for a model's score and the features it reads
    (:func:`site_agent.audit.model.joint_boxes`).
    """
    domains = domains or {}
    if not boxes:
        return []
    variables = _variable_order({v for box in boxes for v, _ in box})
    groups: dict[tuple[int, bool | None], None] = {((1 << len(boxes)) - 1, None): None}
    for variable in variables:
        cells, masks, numeric = _cell_masks(variable, boxes, joint)
        scored = _base(variable) in SCORED
        named = frozenset(c for c in cells if isinstance(c, str))
        possible = [_possible(variable, cell, domains, named) for cell in cells]
        new: dict[tuple[int, bool | None], None] = {}
        for mask, analysed in groups:
            for cell, cell_mask, allowed in zip(cells, masks, possible, strict=True):
                if scored and (cell is None) == bool(analysed):
                    continue  # only analysed records have a score, and every analysed record has one
                if analysed and not allowed:
                    continue  # outside the feature's domain
                if variable == OUTCOME and analysed and cell not in OUTCOME_VALUES:
                    continue  # an analysed record's outcome is 0 or 1
                merged = mask & cell_mask
                if not merged:
                    continue
                state = (cell == ANALYSED) if variable == STATUS else analysed
                new[(merged, state)] = None
        groups = new
        if len(groups) > limit:
            raise AuditError(
                "the requests answered by this site define too many distinct regions to audit; ask for fewer bands"
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
