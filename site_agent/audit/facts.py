"""What the audit works on: the facts of each release, and what it finds (see :mod:`site_agent.audit`)."""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from federation.protocol import PolicyViolation

from ..counts import CountDef, Relation

STATUS = "status"
ANALYSED = "analysed"
OUTCOME = "outcome"
OUTCOME_VALUES = ("0", "1")
SCORED = ("score", "score.compare")  # variables only analysed records have
OTHER = "\x00other"  # the categorical cell for every value no definition names (never shown)
MAX_ATOMS = 200_000
MILP_MAX_ATOMS = 60  # integer programs run where a count's blocks are this small (cheap); else inward rounding
_TOL = 1e-7
# Rules that withhold a count only after primary suppression has run: the count was not small (0 or at least
# k when zeros are shown, at least k when they are not). ``coarsened`` withholds a whole part whatever its values.
NOT_SMALL_RULES = ("complementary", "audit")


def withheld_bounds(
    rules: Mapping[str, str], zero: Mapping[str, bool], min_cell_size: int, allow_zero: bool
) -> dict[str, tuple[float, float]]:
    """What the rules tell a recipient who knows the algorithm about each withheld count, as ``(low, high)``.

    ``minimum_cell_size``: 1..k−1 (0..k−1 when zeros are hidden). ``complementary`` and ``audit``: not small.
    When zeros are hidden that is ``k..``; when they are shown it is the disjunction "0, or k..", which is not a
    linear fact, so the audit takes the branch the count is really in (``zero[name]``): the recipient can
    only know less than that, so every interval the audit computes is at most as wide as the recipient's. A
    count whose branch is unknown (a ledger entry written before it was recorded) gets no fact.
    """
    if min_cell_size < 1:
        return {}
    small_low = 1 if allow_zero else 0
    out: dict[str, tuple[float, float]] = {}
    for name, rule in rules.items():
        if rule == "minimum_cell_size":
            out[name] = (small_low, min_cell_size - 1)
        elif rule in NOT_SMALL_RULES:
            if not allow_zero:
                out[name] = (min_cell_size, math.inf)
            elif name in zero:
                out[name] = (0, 0) if zero[name] else (min_cell_size, math.inf)
    return out


# What travels to the coordinator when the audit stops on the values themselves (two releases give the same
# count different values, the counts contradict each other, a linear program fails): one fixed line, whatever
# count or value caused it. The message naming the count stays at the site (its terminal and ledger): a
# refusal that named the count that changed told the recipient which group held the records that differ.
VALUES_REFUSED = (
    "the audit cannot relate this release to the site's earlier releases (the records, or how a bundle's schema "
    "reads them, differ from before); the site's ledger says more"
)


class AuditError(PolicyViolation):
    """The audit cannot model the facts (they contradict each other, or are too many).

    ``public`` is what may travel to the coordinator instead of the message, for a failure that depends on
    values (:data:`VALUES_REFUSED`); None: the message depends on the request, the bundles and the ledger's
    definitions alone, and travels as it is."""

    def __init__(self, message: str, public: str | None = None) -> None:
        super().__init__(message)
        self.public = public


@dataclass(frozen=True)
class ReleaseFacts:
    """What one release told (or, for the release being audited, would tell) the study's recipient.

    ``values[name]`` is ``None`` for a suppressed count. ``bundle`` qualifies the score variables, so that two
    releases scored with different models are not mistaken for the same variable; ``models`` describes each
    score's model (:mod:`site_agent.audit.model`), which the recipient knows: then the score variable is named
    by the model, and its level sets over the features are part of the audit.
    """

    label: str
    definitions: Mapping[str, CountDef]
    values: Mapping[str, int | None]
    relations: Sequence[Relation] = ()
    bundle: str = ""
    rules: Mapping[str, str] = field(default_factory=dict)  # withheld count -> rule (site_agent.withheld)
    min_cell_size: int = 0  # the policy the release states (0: unknown, no facts from the rules)
    allow_zero: bool = True
    domains: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)  # feature -> schema entry
    models: Mapping[str, Mapping[str, Any]] = field(default_factory=dict)  # "score"/"score.compare" -> model
    zero: Mapping[str, bool] = field(default_factory=dict)  # count withheld as not small -> its value is 0

    @classmethod
    def from_dict(cls, label: str, raw: Any, bundle: str = "") -> ReleaseFacts:
        """Read the ``facts`` of a ledger entry (a dict with ``counts`` and ``relations``, or a bare list)."""
        counts = raw.get("counts", []) if isinstance(raw, dict) else raw
        relations = raw.get("relations", []) if isinstance(raw, dict) else []
        definitions = {c["name"]: CountDef.from_dict(c) for c in counts}
        values = {c["name"]: c.get("value") for c in counts}
        rules = {c["name"]: str(c["rule"]) for c in counts if c.get("value") is None and c.get("rule")}
        zero = {c["name"]: c["zero"] for c in counts if c.get("value") is None and isinstance(c.get("zero"), bool)}
        rels = tuple(Relation(r["total"], tuple(r["parts"])) for r in relations)
        policy = raw.get("policy", {}) if isinstance(raw, dict) else {}
        return cls(
            label,
            definitions,
            values,
            rels,
            raw.get("bundle", bundle) if isinstance(raw, dict) else bundle,
            rules,
            int(policy.get("min_cell_size", 0) or 0),
            bool(policy.get("allow_zero", True)),
            dict(raw.get("domains", {})) if isinstance(raw, dict) else {},
            dict(raw.get("models", {})) if isinstance(raw, dict) else {},
            zero,
        )

    def bounds(
        self, rules: Mapping[str, str] | None = None, zero: Mapping[str, bool] | None = None
    ) -> dict[str, tuple[float, float]]:
        """What the rules tell about withheld counts (:func:`withheld_bounds`); ``rules`` and ``zero`` replace
        the release's own (the release being audited has its rules only while it is protected)."""
        return withheld_bounds(
            self.rules if rules is None else rules,
            self.zero if zero is None else zero,
            self.min_cell_size,
            self.allow_zero,
        )


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
    grouped: bool = False  # answered by the grouped model (site_agent.audit.decompose), not the full refinement
    # what the audit's searches did not cover (``Audit._unsearched``; empty: every search ran in full)
    unsearched: tuple[dict[str, Any], ...] = ()

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
            "not_searched": [dict(gap) for gap in self.unsearched],
        }
