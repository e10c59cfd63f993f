"""Subgroups: the requested analyses within each level of one or more variables.

A variable is a schema feature the site policy allows (``allowed_subgroups``): a category feature has one
level per category; a numeric feature (e.g. ``age_months``) is cut at the request's edges into levels
low <= value < high. Every record analysed has a value for it (records missing a required feature are
excluded; a feature scored as a stated value when missing counts at that value). Within each level the
inner analyses (confusion, and roc, calibration and margin when the request names them) run on that
level's records; their counts are named ``subgroups.VAR[LEVEL].<inner name>`` with the level's condition
added to every definition.

For every inner count that all levels define in the same way, the release also names its total over the
levels and states that the total is the sum of the levels, so disclosure control cannot release all but
one level of a table whose total is known.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from federation.protocol import Feature

from ..banding import intervals
from ..counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountDef, CountSet
from ..data import PreparedChunk
from .base import CellPolicy, LocalAnalysis


@dataclass(frozen=True)
class Level:
    label: Any  # category name, or {"low": ..., "high": ...}
    condition: Condition


def levels_of(feature: Feature, edges: tuple[float, ...]) -> list[Level]:
    if feature.type == "category":
        return [Level(name, Condition(feature.name, (name,))) for name in feature.categories]
    return [
        Level({"low": low, "high": high}, Condition(feature.name, low=low, high=high)) for low, high in intervals(edges)
    ]


def level_index(feature: Feature, edges: tuple[float, ...], values: np.ndarray) -> np.ndarray:
    """The level of each record: the category's position, or the band of the value cut at ``edges``."""
    if feature.type == "category":
        return values.astype(np.int64)
    return np.searchsorted(np.asarray(edges, dtype=np.float64), values, side="right")


def rename(counts: CountSet, prefix: str, condition: Condition) -> CountSet:
    """The counts of one level: names prefixed, the level's condition added, ``flow.X`` → ``PREFIX.X``."""

    def name_of(name: str) -> str:
        return f"{prefix}.{name.removeprefix('flow.')}" if name.startswith("flow.") else f"{prefix}.{name}"

    out = CountSet()
    for name, definition in counts.definitions.items():
        out.add(name_of(name), counts.values[name], *definition.where, condition)
    for relation in counts.relations:
        out.relate(name_of(relation.total), *(name_of(p) for p in relation.parts))
    for name, (value, rests_on) in counts.derived.items():
        if callable(value):  # computed from the released counts: give it this level's counts by their own names
            value = _scoped(value, prefix)
        out.derived[name_of(name)] = (value, frozenset(name_of(n) for n in rests_on))
    return out


def _scoped(function: Callable[[dict[str, Any]], Any], prefix: str) -> Callable[[dict[str, Any]], Any]:
    return lambda released: function(_view(released, prefix))


def _view(mapping: dict[str, Any], prefix: str) -> dict[str, Any]:
    start = prefix + "."
    return {name[len(start) :]: value for name, value in mapping.items() if name.startswith(start)}


class Subgroups:
    name = "subgroups"

    def __init__(
        self, variables: list[tuple[Feature, tuple[float, ...]]], factory: Callable[[str], list[LocalAnalysis]]
    ) -> None:
        """``factory(variable)`` makes the inner analyses of one level of ``variable``."""
        self.variables = [(feature, edges, levels_of(feature, edges)) for feature, edges in variables]
        self.inner = [[factory(feature.name) for _ in levels] for feature, _, levels in self.variables]
        self.totals = [np.zeros((len(levels), 2), dtype=np.int64) for _, _, levels in self.variables]

    def add(self, chunk: PreparedChunk, scores: np.ndarray) -> None:
        for v, (feature, edges, _) in enumerate(self.variables):
            which = level_index(feature, edges, chunk.columns[feature.name])
            for index in np.unique(which):
                keep = which == index
                part = chunk.subset(keep)
                diseased = int(part.outcome.sum())
                self.totals[v][index] += (diseased, len(part) - diseased)
                for analysis in self.inner[v][index]:
                    analysis.add(part, scores[keep])

    def counts(self, policy: CellPolicy) -> CountSet:
        out = CountSet()
        for v, (feature, _, levels) in enumerate(self.variables):
            per_level = []
            for index, level in enumerate(levels):
                prefix = f"subgroups.{feature.name}[{index}]"
                own = CountSet()
                own.add(f"{prefix}.analysed_positive", self.totals[v][index][0], ANALYSED, POSITIVE, level.condition)
                own.add(f"{prefix}.analysed_negative", self.totals[v][index][1], ANALYSED, NEGATIVE, level.condition)
                inner = CountSet()
                for analysis in self.inner[v][index]:
                    inner.merge(analysis.counts(policy))
                own.merge(rename(inner, prefix, level.condition))
                per_level.append((prefix, inner))
                out.merge(own)
            self._totals(out, feature.name, per_level)
        return out

    @staticmethod
    def _totals(out: CountSet, variable: str, per_level: list[tuple[str, CountSet]]) -> None:
        """Totals over levels for counts every level defines alike, each related to its levels."""
        total = f"subgroups.{variable}.all"
        for klass, outcome in (("analysed_positive", POSITIVE), ("analysed_negative", NEGATIVE)):
            values = [out.values[f"{prefix}.{klass}"] for prefix, _ in per_level]
            out.add(f"{total}.{klass}", sum(values), ANALYSED, outcome)
            out.relate(f"{total}.{klass}", *(f"{prefix}.{klass}" for prefix, _ in per_level))
        first = per_level[0][1]
        for name, definition in first.definitions.items():
            if not all(inner.definitions.get(name) == definition for _, inner in per_level):
                continue
            out.definitions[f"{total}.{name}"] = CountDef(f"{total}.{name}", definition.where)
            out.values[f"{total}.{name}"] = sum(inner.values[name] for _, inner in per_level)
            out.relate(f"{total}.{name}", *(f"{prefix}.{name}" for prefix, _ in per_level))

    def render(self, released: dict[str, int | None], derived: dict[str, Any]) -> dict[str, Any]:
        variables = []
        for v, (feature, edges, levels) in enumerate(self.variables):
            rendered = []
            for index, level in enumerate(levels):
                prefix = f"subgroups.{feature.name}[{index}]"
                shown = _view(released, prefix)
                stats = _view(derived, prefix)
                entry: dict[str, Any] = {
                    "level": level.label,
                    "analysed_positive": shown.get("analysed_positive"),
                    "analysed_negative": shown.get("analysed_negative"),
                }
                for analysis in self.inner[v][index]:
                    entry[analysis.name] = analysis.render(shown, stats)
                rendered.append(entry)
            variables.append({"variable": feature.name, "edges": list(edges) if edges else None, "levels": rendered})
        return {"variables": variables}
