"""What a recipient can work out about a site's withheld counts from everything that site sent.

Every count a release shows is the number of records satisfying a conjunction of conditions (the
definitions the site's ledger keeps; docs/formats.md, "Release results"). The coordinator rebuilds those
definitions from the release's own structure — the flow, the 2×2 tables, ROC bands, calibration bins,
margin bands, agreement cells, the paired table and the subgroup levels — for every release the site sent
to the study (the site refuses a second release whose records changed, so all of them count the same
records). Record space is then cut into *atoms*, the regions no definition splits (records excluded for
one reason; analysed records by outcome, by score band of each model, by second-reference state and by
subgroup level), every count is a sum of atoms, and a withheld count's feasible range is the minimum and
maximum of its sum over non-negative atom counts that reproduce every released count: two linear
programs (HiGHS via :func:`scipy.optimize.linprog`), bounds rounded inward to whole numbers.

This is the same reasoning the site's disclosure audit applies before sending (docs/threat-model.md),
seen from the other side: a cell withheld by the audit with a feasible range of 120..140 is nearly as
informative as a released one, and the pooling uses the range (:class:`federation.stats.ReleasedTable`).
The ranges ignore the suppression rule itself (which values the rule could have hidden); the likelihood
(:mod:`federation.stats.suppression`) intersects the two.

Reference: Hundepool A et al. (2012). Statistical Disclosure Control. Wiley, section 4.3 (the attacker's
feasible intervals for suppressed cells by linear programming).
"""

from __future__ import annotations

import math
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from itertools import product
from typing import Any

import numpy as np
from scipy import optimize, sparse

from federation.protocol import Release
from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _number
from federation.stats.auc_bounds import Pieces, auc_bounds

__all__ = [
    "Count",
    "auc_range",
    "auc_ranges",
    "count_definitions",
    "feasible_ranges",
    "primary_ranges",
    "subgroup_auc_ranges",
]

_MAX_ATOMS = 60_000  # beyond this the coordinator gives up on ranges (the likelihood then uses the rule alone)
_ALL = "all"  # a count of every record read

Interval = tuple[float, float]


@dataclass(frozen=True)
class Count:
    """One released or withheld count: its name, value (None = withheld) and definition.

    ``where`` maps a variable to the records included: a frozenset of values for ``status``, ``outcome``,
    ``reference2`` and category features; a half-open ``(low, high)`` interval for scores and numeric
    features. ``where = None`` means every record read (the flow's ``read``).
    """

    name: str
    value: int | None
    where: Mapping[str, frozenset[str] | Interval] | None


def _bound(value: Any, default: float) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        return default
    return float(value)


def _interval(low: Any, high: Any) -> Interval:
    return (_bound(low, -math.inf), _bound(high, math.inf))


_ANALYSED = {"status": frozenset({"analysed"})}
_OUTCOME = {1: frozenset({"1"}), 0: frozenset({"0"})}


class _Builder:
    def __init__(self, prefix: str, score: str) -> None:
        self.prefix = prefix
        self.score = score
        self.counts: list[Count] = []

    def add(self, name: str, value: Any, **where: frozenset[str] | Interval) -> None:
        if value is not None and _count(value) is None:
            return  # not a count (a malformed entry says nothing)
        self.counts.append(Count(f"{self.prefix}{name}", value, {**_ANALYSED, **where}))

    def cell(self, name: str, value: Any, outcome: int, low: Any, high: Any, **extra: Any) -> None:
        self.add(name, value, outcome=_OUTCOME[outcome], **{self.score: _interval(low, high)}, **extra)


def _confusion(b: _Builder, tables: Any, level: dict[str, Any]) -> None:
    if not isinstance(tables, list):
        return
    for i, table in enumerate(tables):
        if not isinstance(table, dict) or not isinstance(table.get("cells"), dict):
            continue
        t = _bound(table.get("threshold"), math.nan)
        if math.isnan(t):
            continue
        cells = table["cells"]
        b.cell(f"confusion[{i}].tp", cells.get("tp"), 1, t, None, **level)
        b.cell(f"confusion[{i}].fp", cells.get("fp"), 0, t, None, **level)
        b.cell(f"confusion[{i}].fn", cells.get("fn"), 1, None, t, **level)
        b.cell(f"confusion[{i}].tn", cells.get("tn"), 0, None, t, **level)


def _banded(b: _Builder, section: Any, name: str, rows: str, keys: tuple[str, str], level: dict[str, Any]) -> None:
    if not isinstance(section, dict):
        return
    for j, band in enumerate(section.get(rows) or []):
        if isinstance(band, dict):
            b.cell(f"{name}.{rows}[{j}].{keys[0]}", band.get(keys[0]), 1, band.get("low"), band.get("high"), **level)
            b.cell(f"{name}.{rows}[{j}].{keys[1]}", band.get(keys[1]), 0, band.get("low"), band.get("high"), **level)
    total_keys = ("positive", "negative") if name == "roc" else ("observed", "non_events")
    for outcome, key in zip((1, 0), total_keys, strict=True):
        if key in section:
            b.add(f"{name}.{key}", section.get(key), outcome=_OUTCOME[outcome], **level)


def _margin(b: _Builder, tables: Any, level: dict[str, Any]) -> None:
    if not isinstance(tables, list):
        return
    for i, table in enumerate(tables):
        if not isinstance(table, dict):
            continue
        for side, correct_outcome in (("called_positive", 1), ("called_negative", 0)):
            for j, row in enumerate(table.get(side) or []):
                if not isinstance(row, dict):
                    continue
                low, high = row.get("score_low"), row.get("score_high")
                b.cell(f"margin[{i}].{side}[{j}].correct", row.get("correct"), correct_outcome, low, high, **level)
                b.cell(f"margin[{i}].{side}[{j}].wrong", row.get("wrong"), 1 - correct_outcome, low, high, **level)


def _agreement(b: _Builder, section: Any) -> None:
    if not isinstance(section, dict) or not isinstance(section.get("tables"), list):
        return
    states = {1: frozenset({"1"}), 0: frozenset({"0"}), None: frozenset({"missing"})}
    known = frozenset({"1", "0"})
    for i, table in enumerate(section["tables"]):
        if not isinstance(table, dict):
            continue
        t = _bound(table.get("threshold"), math.nan)
        if math.isnan(t):
            continue
        calls = {1: (t, None), 0: (None, t)}
        for entry in table.get("cells") or []:
            if not isinstance(entry, dict) or entry.get("model") not in (0, 1) or entry.get("reference") not in (0, 1):
                continue
            if entry.get("reference2") not in states:
                continue
            m, r, s = entry["model"], entry["reference"], entry["reference2"]
            b.cell(f"agreement[{i}].m{m}r{r}s{s}", entry.get("count"), r, *calls[m], reference2=states[s])
        pairs = table.get("pairs") if isinstance(table.get("pairs"), dict) else {}
        for pair, content in pairs.items():
            cells = content.get("cells") if isinstance(content, dict) else None
            if not isinstance(cells, dict):
                continue
            for key, value in cells.items():
                if len(key) != 2 or not set(key) <= {"0", "1"}:
                    continue
                a, c = int(key[0]), int(key[1])
                name = f"agreement[{i}].{pair}.{key}"
                if pair == "model_reference":
                    b.cell(name, value, c, *calls[a], reference2=known)
                elif pair == "model_reference2":
                    b.add(name, value, **{b.score: _interval(*calls[a])}, reference2=states[c])
                elif pair == "reference_reference2":
                    b.add(name, value, outcome=_OUTCOME[a], reference2=states[c])


def _paired(b: _Builder, section: Any) -> None:
    if not isinstance(section, dict):
        return
    t, u = _bound(section.get("threshold"), math.nan), _bound(section.get("compare_threshold"), math.nan)
    other = section.get("compare_bundle_sha256")
    if math.isnan(t) or math.isnan(u) or not isinstance(other, str):
        return
    compare = f"score@{other}"
    for label, outcome in (("diseased", 1), ("non_diseased", 0)):
        table = section.get(label)
        if not isinstance(table, dict):
            continue
        for a, c in product((1, 0), (1, 0)):
            own = (t, None) if a == 1 else (None, t)
            theirs = (u, math.inf) if c == 1 else (-math.inf, u)
            b.cell(f"paired.{label}.m{a}c{c}", table.get(f"model{a}_compare{c}"), outcome, *own, **{compare: theirs})
        b.add(f"paired.{label}.total", table.get("total"), outcome=_OUTCOME[outcome])


def _inner(b: _Builder, results: Mapping[str, Any], level: dict[str, Any]) -> None:
    _confusion(b, results.get("confusion"), level)
    _banded(b, results.get("roc"), "roc", "bands", ("positive", "negative"), level)
    calibration = results.get("calibration")
    rows = "bins" if isinstance(calibration, dict) and "bins" in calibration else "bands"  # "bins": older releases
    _banded(b, calibration, "calibration", rows, ("events", "non_events"), level)
    _margin(b, results.get("margin"), level)


def _level_condition(level: Any) -> frozenset[str] | Interval | None:
    """The records a subgroup level holds: a category, or a numeric band (None: not a level's shape)."""
    label = level.get("level") if isinstance(level, dict) else None
    if isinstance(label, dict):
        return _interval(label.get("low"), label.get("high"))
    return frozenset({label}) if isinstance(label, str) else None


def _subgroups(b: _Builder, section: Any) -> None:
    if not isinstance(section, dict) or not isinstance(section.get("variables"), list):
        return
    for variable in section["variables"]:
        if not isinstance(variable, dict) or not isinstance(variable.get("variable"), str):
            continue
        feature = f"feature:{variable['variable']}"
        for index, level in enumerate(variable.get("levels") or []):
            condition = _level_condition(level)
            if condition is None:
                continue
            where = {feature: condition}
            sub = _Builder(f"{b.prefix}subgroups.{variable['variable']}[{index}].", b.score)
            sub.add("analysed_positive", level.get("analysed_positive"), outcome=_OUTCOME[1], **where)
            sub.add("analysed_negative", level.get("analysed_negative"), outcome=_OUTCOME[0], **where)
            _inner(sub, level, where)
            b.counts.extend(sub.counts)


def count_definitions(release: Release, prefix: str = "") -> list[Count]:
    """Every count a release shows or withholds, with the definition the site's ledger gives it.

    Names are ``PREFIX`` + the count's place in the release (``flow.read``, ``confusion[0].tp``,
    ``roc.bands[3].positive``, ``subgroups.sex[1].confusion[0].fn``...); entries a release does not carry
    in the documented shape are skipped (they then constrain nothing).
    """
    score = f"score@{release.bundle_sha256}"
    b = _Builder(prefix, score)
    flow = release.flow
    if "read" in flow:
        read = flow.get("read")
        if read is None or _count(read) is not None:
            b.counts.append(Count(f"{prefix}flow.read", read, None))
    b.add("flow.analysed", flow.get("analysed"))
    b.add("flow.analysed_positive", flow.get("analysed_positive"), outcome=_OUTCOME[1])
    b.add("flow.analysed_negative", flow.get("analysed_negative"), outcome=_OUTCOME[0])
    excluded = flow.get("excluded") if isinstance(flow.get("excluded"), dict) else {}
    for reason, value in excluded.items():
        if value is None or _count(value) is not None:
            b.counts.append(
                Count(f"{prefix}flow.excluded.{reason}", value, {"status": frozenset({f"excluded:{reason}"})})
            )
    confusion = [{"threshold": t.threshold, "cells": dict(t.cells)} for t in release.confusion]
    _inner(b, {**release.extra, "confusion": confusion}, {})
    _agreement(b, release.extra.get("agreement"))
    _paired(b, release.extra.get("paired"))
    _subgroups(b, release.extra.get("subgroups"))
    return b.counts


class _Axis:
    """The pieces one variable's conditions cut its range into."""

    def __init__(self, conditions: Iterable[frozenset[str] | Interval]) -> None:
        conditions = list(conditions)
        self.numeric = bool(conditions) and isinstance(conditions[0], tuple)
        if self.numeric:
            cuts = sorted({v for c in conditions for v in c if math.isfinite(v)})  # type: ignore[union-attr]
            edges = [-math.inf, *cuts, math.inf]
            self.pieces: list[Any] = list(zip(edges[:-1], edges[1:], strict=True))
        else:
            self.pieces = sorted({v for c in conditions for v in c})  # type: ignore[union-attr]

    def inside(self, condition: frozenset[str] | Interval) -> np.ndarray:
        if self.numeric:
            low, high = condition  # type: ignore[misc]
            return np.array([low <= a and b <= high for a, b in self.pieces])
        return np.array([p in condition for p in self.pieces])  # type: ignore[operator]


def _membership(counts: Sequence[Count]) -> sparse.csr_matrix | None:
    """Count-by-atom incidence matrix (None when the atoms would be too many)."""
    reasons = sorted(
        {next(iter(c.where["status"])) for c in counts if c.where and c.where.get("status") != _ANALYSED["status"]}
    )
    variables: dict[str, list[Any]] = {}
    for c in counts:
        if c.where is None or c.where.get("status") != _ANALYSED["status"]:
            continue
        for name, condition in c.where.items():
            if name != "status":
                variables.setdefault(name, []).append(condition)
    kinds = {name: {isinstance(c, tuple) for c in conds} for name, conds in variables.items()}
    if any(len(k) != 1 for k in kinds.values()):
        return None  # one variable used both as a category and a number: not a release this code wrote
    names = sorted(variables)
    axes = [_Axis(variables[n]) for n in names]
    if "outcome" in variables:  # an analysed record's outcome is 0 or 1, whether or not both are named
        axes[names.index("outcome")].pieces = ["0", "1"]
    sizes = [len(a.pieces) for a in axes]
    n_analysed = int(np.prod(sizes)) if sizes else 1
    if n_analysed + len(reasons) > _MAX_ATOMS:
        return None
    rows, cols = [], []
    for i, c in enumerate(counts):
        if c.where is None:
            hits = np.arange(n_analysed + len(reasons))
        elif c.where.get("status") != _ANALYSED["status"]:
            hits = np.array([n_analysed + reasons.index(next(iter(c.where["status"])))])
        else:
            mask = np.ones(sizes or [1], dtype=bool)
            for d, (name, axis) in enumerate(zip(names, axes, strict=True)):
                if name in c.where:
                    shape = [1] * len(sizes)
                    shape[d] = sizes[d]
                    mask = mask & axis.inside(c.where[name]).reshape(shape)
            hits = np.flatnonzero(mask.ravel())
        rows.extend([i] * hits.size)
        cols.extend(hits.tolist())
    return sparse.csr_matrix((np.ones(len(rows)), (rows, cols)), shape=(len(counts), n_analysed + len(reasons)))


def feasible_ranges(counts: Sequence[Count], targets: Iterable[str]) -> dict[str, tuple[int, int]]:
    """The range each target count can take given every released count (LP bounds, rounded inward).

    Parameters
    ----------
    counts : sequence of Count
        Everything the site sent (one or several releases; names unique).
    targets : iterable of str
        Names of withheld counts whose ranges are wanted.

    Returns
    -------
    dict
        ``name -> (low, high)`` for each target the system bounds; empty when the released counts are
        inconsistent with one another (then nothing can be said) or the system is too large.
    """
    matrix = _membership(counts)
    index = {c.name: i for i, c in enumerate(counts)}
    wanted = [t for t in targets if t in index]
    if matrix is None or not wanted:
        return {}
    shown = [i for i, c in enumerate(counts) if c.value is not None]
    a_eq = matrix[shown]
    b_eq = np.array([counts[i].value for i in shown], dtype=float)
    out: dict[str, tuple[int, int]] = {}
    for name in wanted:
        row = matrix[index[name]].toarray().ravel()
        bounds = []
        for sign in (1.0, -1.0):
            solved = optimize.linprog(sign * row, A_eq=a_eq, b_eq=b_eq, bounds=(0, None), method="highs")
            if solved.status == 2:  # infeasible: the released counts contradict each other
                return {}
            bounds.append(None if solved.status != 0 else sign * solved.fun)
        low = 0 if bounds[0] is None else max(0, math.ceil(bounds[0] - 1e-7))
        if bounds[1] is None:
            continue  # unbounded above: nothing released bounds it
        out[name] = (low, math.floor(bounds[1] + 1e-7))
    return out


PRIMARY = {
    "tp": "confusion[{i}].tp",
    "fp": "confusion[{i}].fp",
    "fn": "confusion[{i}].fn",
    "tn": "confusion[{i}].tn",
    "positives": "flow.analysed_positive",
    "negatives": "flow.analysed_negative",
    "analysed": "flow.analysed",
}


def primary_ranges(release: Release, table_index: int, others: Sequence[Release] = ()) -> dict[str, tuple[int, int]]:
    """Feasible ranges of the withheld cells and margins of one 2×2 table of ``release``.

    ``others`` are the same site's other releases to the same study: everything the recipient holds.
    Keys are ``tp``, ``fp``, ``fn``, ``tn``, ``positives``, ``negatives``, ``analysed`` (withheld ones only).
    """
    counts = count_definitions(release)
    for j, other in enumerate(others):
        counts.extend(count_definitions(other, prefix=f"release[{j}]."))
    names = {key: pattern.format(i=table_index) for key, pattern in PRIMARY.items()}
    values = {c.name: c.value for c in counts}
    withheld = {key: name for key, name in names.items() if name in values and values[name] is None}
    found = feasible_ranges(counts, withheld.values())
    return {key: found[name] for key, name in withheld.items() if name in found}


def _rule_pieces(low: int, high: int, rule: Any, k: int | None, allow_zero: bool) -> list[tuple[int, int]]:
    """A withheld count's feasible range ``low..high`` cut by what its rule says (docs/formats.md)."""
    if k is None or rule not in ("minimum_cell_size", "complementary", "audit"):
        return [(low, high)]  # coarsened (any value), or no rule stated
    if rule == "minimum_cell_size":
        pieces = [(max(low, 1 if allow_zero else 0), min(high, k - 1))]
    else:  # not small: 0 where zeros are shown, or at least k
        pieces = [(0, 0)] if allow_zero and low == 0 else []
        pieces.append((max(low, k), high))
    return [(a, b) for a, b in pieces if a <= b]


@dataclass(frozen=True)
class _WithheldAuc:
    """A ROC section whose AUC the release withheld: where its counts are named and which records it counts."""

    roc: Mapping[str, Any]
    prefix: str  # "" for the whole release, "subgroups.sex[1]." for a subgroup level
    where: Mapping[str, frozenset[str] | Interval]  # the level's condition ({} for the whole release)


def _withheld_auc(roc: Any, prefix: str, where: Mapping[str, Any]) -> _WithheldAuc | None:
    """The section, when it withheld its AUC and has bands in the shape the site sends (ascending score)."""
    if not isinstance(roc, dict) or _number(roc.get("auc")) is not None:
        return None
    bands = roc.get("bands")
    if not isinstance(bands, list) or not bands or not all(isinstance(b, dict) for b in bands):
        return None
    lows = [_bound(b.get("low"), -math.inf) for b in bands]
    if any(not b < a for a, b in zip(lows[1:], lows, strict=False)):
        return None  # not in ascending order of score: not the shape the site sends
    if 0 in (roc.get("positive"), roc.get("negative")):
        return None  # one class empty: no AUC to bound
    return _WithheldAuc(roc, prefix, where)


def _auc_ranges(
    release: Release, others: Sequence[Release], sections: Mapping[Any, _WithheldAuc]
) -> dict[Any, tuple[float, float]]:
    """The smallest and largest AUC each section's bands allow, given everything the site sent to the study.

    A class total the section withholds is taken where the other counts pin it (its feasible range is one
    number: a level's own ``analysed_positive``, say); otherwise the section gets no bounds.
    """
    if not sections:
        return {}
    counts = count_definitions(release)
    for j, other in enumerate(others):
        counts.extend(count_definitions(other, prefix=f"release[{j}]."))
    keys = ("positive", "negative")
    withheld = [
        f"{section.prefix}roc.{key}" for section in sections.values() for key in keys if section.roc.get(key) is None
    ]
    pinned = feasible_ranges(counts, withheld) if withheld else {}
    totals: dict[Any, list[int]] = {}
    for key_of, section in sections.items():
        found = []
        for key in keys:
            shown, bounds = section.roc.get(key), pinned.get(f"{section.prefix}roc.{key}")
            found.append(
                _count(shown) if shown is not None else bounds[0] if bounds and bounds[0] == bounds[1] else None
            )
        if None not in found:
            totals[key_of] = found  # type: ignore[assignment]
    if not totals:
        return {}
    # Each class's count in bands 0..j (below the band's upper edge): what the other counts say about it.
    below = _Builder("", f"score@{release.bundle_sha256}")
    targets: list[str] = []
    for s, key_of in enumerate(totals):
        section = sections[key_of]
        bands = section.roc["bands"]
        hidden = [
            f"{section.prefix}roc.bands[{j}].{key}"
            for j, band in enumerate(bands)
            for key in keys
            if band.get(key) is None
        ]
        targets += hidden
        for j, band in enumerate(bands[:-1] if hidden else []):  # every band shown: nothing to narrow
            for outcome, key in zip((1, 0), keys, strict=True):
                below.cell(f"below[{s}][{j}].{key}", None, outcome, None, band.get("high"), **section.where)
    ranges = feasible_ranges([*counts, *below.counts], [*targets, *(c.name for c in below.counts)])
    k = release.policy.get("min_cell_size")
    k = k if isinstance(k, int) and not isinstance(k, bool) and k >= 1 else None
    allow_zero = bool(release.policy.get("allow_zero", True))
    out: dict[Any, tuple[float, float]] = {}
    for s, (key_of, (n_positive, n_negative)) in enumerate(totals.items()):
        section = sections[key_of]
        rules = section.roc.get("suppressed_by") if isinstance(section.roc.get("suppressed_by"), dict) else {}
        cells: dict[str, list[Pieces]] = {"positive": [], "negative": []}
        bands = section.roc["bands"]
        contradicted = False
        for j, band in enumerate(bands):
            for key, total in zip(keys, (n_positive, n_negative), strict=True):
                value = band.get(key)
                if value is not None:
                    contradicted |= _count(value) is None
                    cells[key].append([(value, value)])
                    continue
                low, high = ranges.get(f"{section.prefix}roc.bands[{j}].{key}", (0, total))
                pieces = _rule_pieces(low, min(high, total), rules.get(f"band[{j}].{key}"), k, allow_zero)
                contradicted |= not pieces
                cells[key].append(pieces)
        if contradicted:
            continue
        cumulative = tuple(
            [ranges.get(f"below[{s}][{j}].{key}", (0, total)) for j in range(len(bands) - 1)] + [(total, total)]
            for key, total in zip(keys, (n_positive, n_negative), strict=True)
        )
        found = auc_bounds(cells["positive"], cells["negative"], n_positive, n_negative, cumulative)
        if found is not None:
            out[key_of] = found
    return out


def _withheld_aucs(release: Release, whole: bool = True, levels: bool = True) -> dict[Any, _WithheldAuc]:
    """The release's ROC sections that withheld their AUC: ``None`` for the whole release (``whole``),
    ``(variable, level index)`` for each subgroup level (``levels``)."""
    sections: dict[Any, _WithheldAuc] = {}
    section = _withheld_auc(release.extra.get("roc"), "", {}) if whole else None
    if section is not None:
        sections[None] = section
    subgroups = release.extra.get("subgroups") if levels else None
    variables = subgroups.get("variables") if isinstance(subgroups, dict) else None
    for variable in variables if isinstance(variables, list) else []:
        if not isinstance(variable, dict) or not isinstance(variable.get("variable"), str):
            continue
        name = variable["variable"]
        for index, level in enumerate(variable.get("levels") or []):
            condition = _level_condition(level)
            if condition is None:
                continue
            found = _withheld_auc(level.get("roc"), f"subgroups.{name}[{index}].", {f"feature:{name}": condition})
            if found is not None:
                sections[(name, index)] = found
    return sections


def auc_range(release: Release, others: Sequence[Release] = ()) -> tuple[float, float] | None:
    """Where a site withheld its AUC, the smallest and largest AUC its ROC bands allow.

    Each withheld band count takes its feasible range given everything the site sent to the study
    (:func:`feasible_ranges`), cut by what its rule says (``suppressed_by``: 1..k−1, or "0, or at least k");
    :func:`federation.stats.auc_bounds.auc_bounds` then finds the extremes over every table those allow with
    the class totals (released, or pinned by the other counts). ``None`` where the release shows the AUC, has
    no bands or class totals, or its counts contradict one another.
    """
    return _auc_ranges(release, others, _withheld_aucs(release, levels=False)).get(None)


def subgroup_auc_ranges(release: Release, others: Sequence[Release] = ()) -> dict[tuple[str, int], tuple[float, float]]:
    """:func:`auc_range` for each subgroup level that withheld its AUC: ``(variable, level index) -> (low, high)``.

    A level's bands count the records of that level only, and so do its class totals. Levels with
    one class empty (an AUC needs both) and levels whose counts allow no table get none.
    """
    return _auc_ranges(release, others, _withheld_aucs(release, whole=False))


def auc_ranges(release: Release, others: Sequence[Release] = ()) -> dict[Any, tuple[float, float]]:
    """:func:`auc_range` (key ``None``) and :func:`subgroup_auc_ranges` together, from one set of programs."""
    return _auc_ranges(release, others, _withheld_aucs(release))
