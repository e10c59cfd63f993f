"""The audit's fast path: a release with no history whose counts nest like a tree (the flow and one 2×2 table).

When a site has released nothing before and every count of the release is a box over the record's status,
outcome and one score threshold, the boxes form a *laminar* family (any two are nested or disjoint): records
read ⊃ analysed ⊃ with / without the condition ⊃ the 2×2 cells, and the exclusions. Over such a tree the
linear programs of :mod:`site_agent.audit.check` have closed forms, computed exactly over whole numbers:

- the feasible range of every count is its own range (released value, or what the withheld rule tells:
  1..k−1, or for a count withheld as not small 0 or k.., :func:`~.facts.withheld_bounds`)
  intersected with the sum of its children's ranges (bottom up) and with its parent's range minus its
  siblings' ranges (top down); two passes are exact on a tree (sums of whole-number intervals are
  whole-number intervals);
- the regions a recipient can work out by differencing are, for every released count, the part of it no
  released count below it covers (it minus its highest released descendants): each must be 0 (when zeros are
  shown) or at least k. Every other determined region is a disjoint union of these and released counts.

Anything else (history, bands, subgroups, a second threshold) goes to the full audit. The fast path only
ever says "safe" when the full audit would; when it finds a problem the full audit runs and repairs it.
"""

from __future__ import annotations

import math
import time
from collections.abc import Mapping

from ..counts import CountDef
from .facts import ANALYSED, OUTCOME_VALUES, AuditResult, Interval

Range = tuple[float, float]


def _atoms_of(definition: CountDef, statuses: list[str], threshold: float | None) -> frozenset[tuple] | None:
    """The lattice atoms (status, outcome, side) a definition holds; None if it is not of the lattice."""
    allowed_status, allowed_outcome, side = set(statuses), set(OUTCOME_VALUES), {"above", "below"}
    scored = False
    for condition in definition.where:
        if condition.variable == "status" and condition.values:
            allowed_status &= set(condition.values)
        elif condition.variable == "outcome" and condition.values:
            allowed_outcome &= set(condition.values)
            scored = scored or False
        elif condition.variable == "score" and not condition.values:
            if condition.low is None and condition.high is None:
                continue
            if condition.low is not None and condition.high is None and condition.low == threshold:
                side &= {"above"}
            elif condition.high is not None and condition.low is None and condition.high == threshold:
                side &= {"below"}
            else:
                return None
        else:
            return None
    conditioned = any(c.variable in ("outcome", "score") for c in definition.where)
    atoms = set()
    for status in allowed_status:
        if status != ANALYSED:
            if not conditioned:  # excluded records have no outcome or score
                atoms.add((status, None, None))
            continue
        for outcome in allowed_outcome:
            for s in side:
                atoms.add((status, outcome, s))
    return frozenset(atoms)


def tree_audit(
    definitions: Mapping[str, CountDef],
    values: Mapping[str, int | None],
    bounds: Mapping[str, tuple[int, int]],
    min_cell_size: int,
    allow_zero: bool,
    width: int,
) -> AuditResult | None:
    """The audit of a lone tree-shaped release (see the module docstring); None when the release is not one."""
    started = time.perf_counter()
    thresholds = {
        float(c.low if c.low is not None else c.high)
        for d in definitions.values()
        for c in d.where
        if c.variable == "score" and (c.low is None) != (c.high is None)
    }
    if len(thresholds) > 1:
        return None
    threshold = next(iter(thresholds), None)
    statuses = sorted({v for d in definitions.values() for c in d.where if c.variable == "status" for v in c.values})
    statuses = sorted(set(statuses) | {ANALYSED})
    boxes: dict[frozenset, list[str]] = {}
    for name, definition in definitions.items():
        atoms = _atoms_of(definition, statuses, threshold)
        if atoms is None:
            return None
        boxes.setdefault(atoms, []).append(name)
    if frozenset() in boxes:
        return None
    nodes = sorted(boxes, key=len, reverse=True)
    parent: dict[frozenset, frozenset | None] = {}
    for i, node in enumerate(nodes):
        above = [other for other in nodes[:i] if node < other]
        if any(not (node <= other or node.isdisjoint(other)) for other in nodes[:i]):
            return None  # not laminar
        parent[node] = min(above, key=len) if above else None
    children: dict[frozenset | None, list[frozenset]] = {}
    for node in nodes:
        children.setdefault(parent[node], []).append(node)

    def own(node: frozenset) -> Range:
        low, high = 0.0, math.inf
        for name in boxes[node]:
            value = values.get(name)
            if value is not None:
                low, high = max(low, value), min(high, value)
            elif name in bounds:
                low, high = max(low, bounds[name][0]), min(high, bounds[name][1])
        return low, high

    def remainder(node: frozenset) -> bool:  # atoms of the node in none of its children: free, >= 0
        covered = frozenset().union(*children.get(node, []))
        return bool(node - covered)

    up: dict[frozenset, Range] = {}
    for node in reversed(nodes):  # smallest first: children before parents
        low, high = own(node)
        kids = children.get(node, [])
        if kids:
            sub_low = sum(up[c][0] for c in kids)
            sub_high = math.inf if remainder(node) else sum(up[c][1] for c in kids)
            low, high = max(low, sub_low), min(high, sub_high)
        up[node] = (low, high)
        if low > high:
            return None  # contradictory: let the full audit say so
    down: dict[frozenset, Range] = {}
    for node in nodes:  # largest first: parents before children
        p = parent[node]
        low, high = up[node]
        if p is not None:
            plow, phigh = down[p]
            others = [c for c in children[p] if c != node]
            olow = sum(up[c][0] for c in others)
            ohigh = math.inf if remainder(p) else sum(up[c][1] for c in others)
            low = max(low, plow - ohigh)
            high = min(high, phigh - olow)
        down[node] = (low, high)

    def unsafe(value: float) -> bool:
        return (0 < value < min_cell_size) or (value == 0 and not allow_zero)

    intervals: dict[str, Interval] = {}
    ok = True
    for node in nodes:
        hidden = [n for n in boxes[node] if values.get(n) is None]
        low, high = down[node]
        if hidden:
            interval_high = None if math.isinf(high) else int(high)
            for name in hidden:
                intervals[name] = Interval(name, int(max(low, 0)), interval_high)
            # a count a rule's fact says is 0 (withheld as not small; the policy shows zeros) is no target
            empty = all(name in bounds and bounds[name][1] <= 0 for name in hidden)
            if not empty and not math.isinf(high) and high - max(low, 0) + 1 < width:
                ok = False
        elif width >= 2:
            # differencing: the part of a released count that no released count below it covers
            shown_below: list[frozenset] = []
            stack = list(children.get(node, []))
            while stack:
                child = stack.pop()
                if any(values.get(n) is not None for n in boxes[child]):
                    shown_below.append(child)
                else:
                    stack.extend(children.get(child, []))
            if shown_below:
                rest = down[node][0] - sum(down[c][0] for c in shown_below)
                if unsafe(rest):
                    ok = False
    if not ok:
        return None
    return AuditResult(
        ok=True,
        intervals=intervals,
        findings=[],
        atoms=len(frozenset().union(*nodes)),
        constraints=len(nodes),
        releases=1,
        seconds=time.perf_counter() - started,
        protection_width=width,
    )
