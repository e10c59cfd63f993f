"""Named counts with their definitions: the common language of analyses, disclosure control and audit.

Every number a site releases is a count of records satisfying a conjunction of conditions (a
:class:`CountDef`), or a statistic derived from such counts. Analyses produce a :class:`CountSet`;
disclosure control decides which counts may be shown; the audit re-reads the definitions of everything
released to a study so far to check that no suppressed count can be recovered by combining releases.

Variables used in definitions (extend, do not rename):

- ``status``: ``"analysed"`` or ``"excluded:<reason>"`` (every record read has exactly one status);
- ``outcome``: ``"1"`` (condition present by the reference standard) or ``"0"``;
- ``score``: the requested model's score (numeric); ``score.compare``: the comparison model's score;
- ``reference2``: a second reference standard (``"1"``/``"0"``), where a site maps one;
- any schema feature by its schema name (``age_months``, ``sex``, ...), numeric or categorical.

A numeric condition is the half-open interval ``low <= value < high`` (``None`` = unbounded); a
categorical condition lists the values that are included.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Any


@dataclass(frozen=True)
class Condition:
    variable: str
    values: tuple[str, ...] = ()
    low: float | None = None
    high: float | None = None

    @property
    def numeric(self) -> bool:
        return not self.values

    def to_dict(self) -> dict[str, Any]:
        if self.values:
            return {"variable": self.variable, "values": list(self.values)}
        return {"variable": self.variable, "low": self.low, "high": self.high}

    @classmethod
    def from_dict(cls, raw: dict[str, Any]) -> Condition:
        if "values" in raw:
            return cls(raw["variable"], tuple(str(v) for v in raw["values"]))
        return cls(raw["variable"], (), raw.get("low"), raw.get("high"))


@dataclass(frozen=True)
class CountDef:
    """``name`` is unique within a release (e.g. ``confusion[0].tp``); ``where`` is a conjunction."""

    name: str
    where: tuple[Condition, ...]

    def to_dict(self) -> dict[str, Any]:
        return {"name": self.name, "where": [c.to_dict() for c in self.where]}

    @classmethod
    def from_dict(cls, raw: dict[str, Any]) -> CountDef:
        return cls(raw["name"], tuple(Condition.from_dict(c) for c in raw["where"]))


ANALYSED = Condition("status", ("analysed",))
POSITIVE = Condition("outcome", ("1",))
NEGATIVE = Condition("outcome", ("0",))


def excluded(reason: str) -> Condition:
    return Condition("status", (f"excluded:{reason}",))


@dataclass(frozen=True)
class Relation:
    """``total`` equals the sum of ``parts`` (names of counts in the same set)."""

    total: str
    parts: tuple[str, ...]

    @property
    def members(self) -> tuple[str, ...]:
        return (self.total, *self.parts)


@dataclass
class CountSet:
    """Counts an analysis computed, before disclosure control.

    ``derived`` maps a statistic's name to (value, names of the counts it rests on); disclosure control
    releases a derived statistic only when every count it rests on is released.
    """

    definitions: dict[str, CountDef] = field(default_factory=dict)
    values: dict[str, int] = field(default_factory=dict)
    relations: list[Relation] = field(default_factory=list)
    derived: dict[str, tuple[Any, frozenset[str]]] = field(default_factory=dict)

    def add(self, name: str, value: int, *where: Condition) -> None:
        if name in self.values:
            raise ValueError(f"count {name!r} defined twice")
        self.definitions[name] = CountDef(name, tuple(where))
        self.values[name] = int(value)

    def relate(self, total: str, *parts: str) -> None:
        self.relations.append(Relation(total, tuple(parts)))

    def merge(self, other: CountSet) -> None:
        for name, definition in other.definitions.items():
            if name in self.values and self.definitions[name] != definition:
                raise ValueError(f"count {name!r} defined twice with different meanings")
            self.definitions[name] = definition
            self.values[name] = other.values[name]
        self.relations.extend(other.relations)
        self.derived.update(other.derived)
