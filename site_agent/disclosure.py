"""Disclosure control of one release: minimum cell size, secondary suppression, and the audit across releases.

1. **Primary suppression** hides every count in 1..k−1, and 0 when the policy does not allow zeros.
2. **Secondary suppression** hides more counts so that no hidden count can be recomputed from an additive
   relation whose other members are shown (a total and its parts: records read = analysed + excluded;
   analysed = positives + negatives; positives = TP + FN; ...). Each time it takes the smallest shown
   member of the relation — a part before the total, a non-zero count before a zero — so that the fewest
   and smallest counts are lost. Flow counts are counts like any other and follow the same rule.
3. **The audit** (:mod:`site_agent.audit`) then checks this release together with every earlier release to
   the same study; where a hidden count (or a small region found by differencing) could be worked out, it
   suppresses more counts of this release, smallest first, and checks again. If that cannot help (the
   exposure lies in earlier releases alone, or the rounds run out), the release is refused with a
   :class:`PolicyViolation` that names the analysis to drop or coarsen, never a count.
4. Derived statistics are released only when every count they rest on is released.

Released counts are never changed: a count is either released exactly or replaced by ``None``.

Reference: Hundepool et al., *Statistical Disclosure Control*, Wiley 2012, ch. 4 (primary and secondary
cell suppression, linked tables).
"""

from __future__ import annotations

import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

from federation.protocol import PolicyViolation

from .audit import SCORED, STATUS, Audit, AuditResult, Finding, ReleaseFacts, normalise
from .counts import CountSet, Relation

MAX_AUDIT_ROUNDS = 40
# Variables every analysis may condition on; any other variable is a subgroup (schema feature).
CORE_VARIABLES = frozenset({STATUS, "outcome", "reference2", *SCORED})


def is_unsafe(count: int, min_cell_size: int, allow_zero: bool) -> bool:
    return (0 < count < min_cell_size) or (count == 0 and not allow_zero)


def analysis_of(name: str) -> str:
    """The analysis a count belongs to, from its name (``confusion[0].tp`` -> ``confusion``)."""
    match = re.match(r"[A-Za-z_]+", name)
    return match.group(0) if match else name


def _secondary(
    counts: Mapping[str, int],
    relations: Sequence[Relation],
    suppressed: set[str],
    reasons: dict[str, str],
    public: frozenset[str] = frozenset(),
) -> None:
    """Hide more counts until no relation has exactly one hidden member (in place).

    ``public`` are counts whose value an earlier release already showed: hiding them protects nothing, so
    they are chosen only when nothing else is left.
    """
    changed = True
    while changed:
        changed = False
        for relation in relations:
            hidden = [m for m in relation.members if m in suppressed]
            if len(hidden) != 1:
                continue
            shown = [m for m in relation.members if m not in suppressed]
            if not shown:
                continue
            # Prefer a count not yet public, a part over the total, a non-zero count over a zero, then the smallest.
            choice = min(shown, key=lambda m: (m in public, m == relation.total, counts[m] == 0, counts[m], m))
            suppressed.add(choice)
            reasons[choice] = f"secondary: otherwise {hidden[0]} could be recomputed from {relation.total} = " + (
                " + ".join(relation.parts)
            )
            changed = True


def suppress(
    counts: Mapping[str, int],
    relations: Sequence[Relation],
    min_cell_size: int,
    allow_zero: bool = True,
) -> tuple[dict[str, int | None], frozenset[str]]:
    """Primary and relation-based secondary suppression of one release.

    Returns the released counts (``None`` for a suppressed one) and the set of suppressed names.
    """
    for relation in relations:
        for name in relation.members:
            if name not in counts:
                raise KeyError(f"relation names unknown count {name!r}")
    suppressed = {name for name, value in counts.items() if is_unsafe(value, min_cell_size, allow_zero)}
    _secondary(counts, relations, suppressed, {})
    released = {name: (None if name in suppressed else value) for name, value in counts.items()}
    return released, frozenset(suppressed)


@dataclass(frozen=True)
class Protected:
    """What disclosure control lets through: counts (None = suppressed) and derived statistics.

    ``reasons`` says why each count was suppressed and ``audit`` holds the audit's result; both are for the
    site's own review and ledger and never travel (they tell which hidden counts are the small ones).
    """

    released: dict[str, int | None]
    suppressed: frozenset[str]
    derived: dict[str, Any]
    reasons: dict[str, str] = field(default_factory=dict)
    audit: AuditResult | None = None
    bundle: str = ""

    def facts(self, counts: CountSet) -> dict[str, Any]:
        """What the recipient learns, for later audits: every count's definition with its value where it was
        released, and the relations between counts. Stored in the ledger with the release."""
        return {
            "bundle": self.bundle,
            "counts": [
                {**counts.definitions[name].to_dict(), "value": self.released[name]} for name in sorted(counts.values)
            ],
            "relations": [{"total": r.total, "parts": list(r.parts)} for r in counts.relations],
        }

    def review(self) -> dict[str, Any]:
        """What suppression did and why, and the audit's result (for the site's reviewer)."""
        return {
            "suppressed": {name: self.reasons.get(name, "suppressed") for name in sorted(self.suppressed)},
            "audit": self.audit.to_dict() if self.audit is not None else None,
        }


def check_definitions(counts: CountSet, policy: Any) -> None:
    """Refuse bands narrower than the policy's ``min_band_width`` and subgroups on variables it does not allow."""
    widths = dict(getattr(policy, "min_band_width", ()))
    allowed_subgroups = getattr(policy, "allowed_subgroups", None)
    for name, definition in counts.definitions.items():
        for condition in definition.where:
            variable = condition.variable
            if allowed_subgroups is not None and variable not in CORE_VARIABLES and variable not in allowed_subgroups:
                raise PolicyViolation(
                    f"request: analysis {analysis_of(name)!r} groups records by {variable!r}, which this site's "
                    "policy does not allow as a subgroup variable"
                )
            narrowest = widths.get(variable)
            if (
                narrowest is not None
                and condition.low is not None
                and condition.high is not None
                and condition.high - condition.low < narrowest - 1e-12
            ):
                raise PolicyViolation(
                    f"request: analysis {analysis_of(name)!r} asks for a band of {variable!r} narrower than this "
                    f"site's min_band_width ({narrowest:g}); ask for wider bands"
                )


def protect(
    counts: CountSet,
    policy: Any,
    earlier: Sequence[ReleaseFacts] = (),
    bundle: str = "",
    label: str = "this release",
) -> Protected:
    """Apply the site policy to one release's counts, auditing it against ``earlier`` releases to the study.

    ``policy`` needs ``min_cell_size`` and ``allow_zero``; ``protection_width`` (default 2) sets the audit;
    ``min_band_width`` and ``allowed_subgroups`` are enforced when present.
    """
    check_definitions(counts, policy)
    k, allow_zero = policy.min_cell_size, policy.allow_zero
    width = int(getattr(policy, "protection_width", 2))
    values = counts.values
    for relation in counts.relations:
        for name in relation.members:
            if name not in values:
                raise KeyError(f"relation names unknown count {name!r}")
    reasons: dict[str, str] = {}
    suppressed: set[str] = set()
    for name, value in values.items():
        if is_unsafe(value, k, allow_zero):
            suppressed.add(name)
            reasons[name] = (
                "primary: zero, and this policy does not show zeros"
                if value == 0
                else (f"primary: fewer than {k} records")
            )
    public = _already_public(counts, earlier, bundle)
    twins = _same_definition(counts, bundle)
    # counts with the same definition (e.g. a class total that two analyses report) share one fate
    relations = [*counts.relations, *(Relation(g[0], (n,)) for g in set(twins.values()) for n in g[1:])]
    _secondary(values, relations, suppressed, reasons, public)

    audit = Audit(earlier, ReleaseFacts(label, counts.definitions, {}, counts.relations, bundle))
    result: AuditResult | None = None
    for _ in range(MAX_AUDIT_ROUNDS):
        current = {name: (None if name in suppressed else value) for name, value in values.items()}
        result = audit.evaluate(current, k, allow_zero, width)
        if result.ok:
            break
        added: set[str] = set()
        stuck: list[Finding] = []
        for finding in result.findings:
            open_candidates = [c for c in finding.candidates if c not in suppressed]
            if not open_candidates:
                stuck.append(finding)
                continue
            if any(c in added for c in open_candidates):
                continue  # another finding of this round already hides one of them: check again first
            choice = open_candidates[0]
            for name in twins.get(choice, (choice,)):
                if name not in suppressed:
                    added.add(name)
                    reasons[name] = f"audit: otherwise {finding.describe()}"
        if stuck or not added:
            raise _refusal(stuck or result.findings, earlier)
        suppressed |= added
        _secondary(values, relations, suppressed, reasons, public)
    else:
        raise _refusal(result.findings if result else [], earlier)

    released = {name: (None if name in suppressed else value) for name, value in values.items()}
    hidden = frozenset(suppressed)
    derived = {name: value for name, (value, rests_on) in counts.derived.items() if not (rests_on & hidden)}
    return Protected(released, hidden, derived, reasons, result, bundle)


def _already_public(counts: CountSet, earlier: Sequence[ReleaseFacts], bundle: str) -> frozenset[str]:
    shown = set()
    for release in earlier:
        for name, definition in release.definitions.items():
            if release.values.get(name) is not None:
                shown.add(normalise(definition.where, release.bundle))
    return frozenset(n for n, d in counts.definitions.items() if normalise(d.where, bundle) in shown)


def _same_definition(counts: CountSet, bundle: str) -> dict[str, tuple[str, ...]]:
    """Counts of this release with the same definition: suppressing one means suppressing all of them."""
    groups: dict[Any, list[str]] = {}
    for name, definition in counts.definitions.items():
        groups.setdefault(normalise(definition.where, bundle), []).append(name)
    return {name: tuple(group) for group in groups.values() for name in group}


def _refusal(findings: Sequence[Finding], earlier: Sequence[ReleaseFacts]) -> PolicyViolation:
    """A refusal that says which analyses to drop or coarsen, and never a count."""
    analyses = sorted({analysis_of(n.split(" (release")[0]) for f in findings for n in f.names} - {"flow"}) or sorted(
        {analysis_of(n) for f in findings for n in f.names}
    )
    which = ", ".join(repr(a) for a in analyses) or "the requested analyses"
    scope = (
        f"combined with {len(earlier)} earlier release(s) to this study, this request" if earlier else "this request"
    )
    return PolicyViolation(
        f"release withheld by the site's disclosure audit: {scope} would let a count the site's policy hides be "
        f"worked out, and suppressing more of this release cannot prevent it; drop or coarsen {which} (fewer or "
        "wider bands, or the same bands as before) and ask again"
    )
