"""Disclosure control of one release: minimum cell size, secondary suppression, the audit across releases,
and cutting back other analyses so that the primary table survives.

1. **Primary suppression** hides every count in 1..k−1, and 0 when the policy does not allow zeros.
2. **Secondary suppression** hides more counts so that no hidden count can be recomputed from an additive
   relation whose other members are shown (a total and its parts: records read = analysed + excluded;
   analysed = positives + negatives; positives = TP + FN; ...). Each time it takes a shown member by a
   fixed rule that never looks at a value (a count not yet public, a part before the total, then the order
   of names), so that which count it took tells a recipient who knows the rule nothing.
3. **The audit** (:mod:`site_agent.audit`) then checks this release together with every earlier release of
   the site, to every study; where a hidden count (or a small region found by differencing) could be
   worked out, it suppresses more counts of this release (other analyses before the primary table, in the
   fixed order :data:`CUT_ORDER`, a count ranking as the latest part among the counts of its definition,
   then by name) and checks again. What each rule tells (a count withheld
   for the minimum cell size lies in 1..k−1; one withheld by the complementary rule or the audit was not
   small) is a fact the audit takes into account.
4. **The primary table comes first.** When cells of the primary table (the flow and the 2×2 table at the
   bundle's threshold) would be withheld beyond what the table alone needs, the analyses whose counts the
   audit found exposed at the primary table's cost are cut back (withheld in full, subgroups variable by
   variable, listed in the order of :data:`CUT_ORDER`), then, if needed, every other analysis;
   the release's ``cut_back`` list says which and why, in words. If even the primary table alone cannot be
   protected (the exposure lies in earlier releases), the release is refused with a
   :class:`PolicyViolation` that names the analysis to drop or coarsen, never a count.
5. Derived statistics are released only when every count they rest on is released.

Released counts are never changed: a count is either released exactly or replaced by ``None``.

Reference: Hundepool et al., *Statistical Disclosure Control*, Wiley 2012, ch. 4 (primary and secondary
cell suppression, linked tables).
"""

from __future__ import annotations

import re
from collections.abc import Callable, Mapping, Sequence, Set
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from federation.protocol import PolicyViolation

from .audit import SCORED, STATUS, AuditResult, Finding, ReleaseFacts, normalise
from .audit.facts import NOT_SMALL_RULES, withheld_bounds

if TYPE_CHECKING:
    from .audit.check import Audit
from .audit.tree import tree_audit
from .counts import CountSet, Relation
from .withheld import rule_of

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
    keep: frozenset[str] = frozenset(),
    twins: Mapping[str, tuple[str, ...]] | None = None,
) -> None:
    """Hide more counts until no relation has exactly one hidden member (in place).

    The choice depends on the pattern of hidden counts and the structure only, never on a value or on earlier
    releases (so that a recipient can replay it): the count that matters least to the primary table ``keep``
    (:func:`keep_rank`; a count ranks as the highest of its ``twins``, the counts of the same definition whose
    fate it shares, so a ROC band that is the 2x2 table's false positives is not taken while another band can
    be), a part before the total, a count that is no relation's total (a leaf, whose loss
    carries no further) before one that is, then the fixed order of names. A value-dependent rule (e.g. "the
    smallest shown part") would tell a recipient who knows the rule that the hidden part is smaller than the
    shown ones. Where the choice is a count an earlier release showed (``public``), it protects nothing: the
    audit then withholds more.
    """
    totals = {relation.total for relation in relations}

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
            choice = min(shown, key=lambda m: (shared_rank(m, keep, twins), m == relation.total, m in totals, m))
            suppressed.add(choice)
            reasons[choice] = f"secondary: otherwise {hidden[0]} could be recomputed from {relation.total} = " + (
                " + ".join(relation.parts)
            )
            changed = True


def keep_rank(name: str, primary: frozenset[str]) -> int:
    """How much a count matters to the primary table: 2 for its cells and the analysed totals, 1 for the
    records read and the exclusions, 0 for every other analysis (hidden first)."""
    if name not in primary:
        return 0
    return 1 if name == "flow.read" or name.startswith("flow.excluded.") else 2


def shared_rank(name: str, primary: frozenset[str], twins: Mapping[str, tuple[str, ...]] | None) -> int:
    """:func:`keep_rank` of a count that shares its fate with the counts of its definition (``twins``): the
    highest of theirs (a ROC band that is the 2x2 table's false positives ranks as that cell)."""
    return max(keep_rank(t, primary) for t in (twins or {}).get(name, (name,)))


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
    keep = frozenset(n for n in counts if n.startswith(("flow.", "confusion[0].")))  # protect's default primary
    _secondary(counts, relations, suppressed, {}, keep=keep)
    released = {name: (None if name in suppressed else value) for name, value in counts.items()}
    return released, frozenset(suppressed)


@dataclass(frozen=True)
class Protected:
    """What disclosure control lets through: counts (None = suppressed) and derived statistics.

    ``reasons`` says why each count was suppressed and ``audit`` holds the audit's result; both are for the
    site's own review and ledger and never travel. ``rules`` (the rule of each withheld count) and
    ``cut_back`` (analyses cut back for the primary table, in words) do travel.
    """

    released: dict[str, int | None]
    suppressed: frozenset[str]
    derived: dict[str, Any]
    reasons: dict[str, str] = field(default_factory=dict)
    audit: AuditResult | None = None
    bundle: str = ""
    cut_back: tuple[dict[str, str], ...] = ()
    min_cell_size: int = 0
    allow_zero: bool = True
    domains: Mapping[str, Any] = field(default_factory=dict)
    models: Mapping[str, Any] = field(default_factory=dict)  # "score"/"score.compare" -> model description
    culprits: frozenset[str] = frozenset()  # parts whose exposure cost primary cells (site side only)

    @property
    def rules(self) -> dict[str, str]:
        """The rule that withheld each count (``minimum_cell_size``, ``complementary``, ``audit``, ``coarsened``)."""
        return {name: rule_of(self.reasons.get(name, "audit")) for name in sorted(self.suppressed)}

    def facts(self, counts: CountSet) -> dict[str, Any]:
        """What the recipient learns, for later audits: every count's definition with its value where it was
        released (and the rule that withheld it where it was not), the relations between counts and the
        policy the release states. Stored in the ledger with the release."""
        rules = self.rules
        zero = _zero(counts.values, rules)
        return {
            "bundle": self.bundle,
            "policy": {"min_cell_size": self.min_cell_size, "allow_zero": self.allow_zero},
            "domains": {name: dict(raw) for name, raw in sorted(self.domains.items())},
            "models": {name: dict(raw) for name, raw in sorted(self.models.items())},
            "counts": [
                {
                    **counts.definitions[name].to_dict(),
                    "value": self.released[name],
                    **({"rule": rules[name]} if name in rules else {}),
                    **({"zero": zero[name]} if name in zero else {}),
                }
                for name in sorted(counts.values)
            ],
            "relations": [{"total": r.total, "parts": list(r.parts)} for r in counts.relations],
        }

    def review(self) -> dict[str, Any]:
        """What suppression did and why, and the audit's result (for the site's reviewer)."""
        return {
            "suppressed": {name: self.reasons.get(name, "suppressed") for name in sorted(self.suppressed)},
            "cut_back": [dict(c) for c in self.cut_back],
            "audit": self.audit.to_dict() if self.audit is not None else None,
        }


def _zero(values: Mapping[str, int], rules: Mapping[str, str]) -> dict[str, bool]:
    """Which counts withheld as not small (:data:`~.audit.facts.NOT_SMALL_RULES`) are 0: the branch of the
    fact "0, or at least k" the audit takes (site side only: the ledger keeps it, no release carries it)."""
    return {name: values[name] == 0 for name, rule in rules.items() if rule in NOT_SMALL_RULES}


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


# Which parts of a release are cut back first when something must be withheld beyond the minimum cell size
# (issue: the primary table comes first). Earlier in this list = cut back first; the order does not look at
# any value, so the choice tells a recipient nothing about the data.
CUT_ORDER = ("subgroups", "margin", "paired", "agreement", "calibration", "roc", "confusion")
CUT_RULE = (
    "otherwise the site's disclosure control would have withheld cells of the primary 2x2 table "
    "(minimum cell size and differencing across every release of the site)"
)


def unit_of(name: str, primary: frozenset[str]) -> str | None:
    """The part of a release a count belongs to for cutting back: ``subgroups.VAR``, an analysis, or None for
    the primary table (the flow and the 2x2 at the primary threshold)."""
    if name in primary or name.startswith("flow."):
        return None
    if name.startswith("subgroups."):
        variable = re.match(r"subgroups\.([A-Za-z0-9_]+)", name)
        return f"subgroups.{variable.group(1)}" if variable else "subgroups"
    return analysis_of(name)


def _cut_rank(unit: str) -> tuple[int, str]:
    base = unit.split(".", 1)[0]
    return (CUT_ORDER.index(base) if base in CUT_ORDER else -1, unit)


class _Refused(Exception):
    def __init__(self, findings: Sequence[Finding], culprits: set[str]) -> None:
        self.findings = list(findings)
        self.culprits = culprits


def protect(
    counts: CountSet,
    policy: Any,
    earlier: Sequence[ReleaseFacts] = (),
    bundle: str = "",
    label: str = "this release",
    primary: frozenset[str] | None = None,
    domains: Mapping[str, Any] | None = None,
    models: Mapping[str, Any] | None = None,
    occupied: Any = None,
) -> Protected:
    """Apply the site policy to one release's counts, auditing it against ``earlier`` releases of the site.

    ``policy`` needs ``min_cell_size`` and ``allow_zero``; ``protection_width`` (default 2) sets the audit;
    ``min_band_width`` and ``allowed_subgroups`` are enforced when present. ``primary`` names the counts of
    the primary table (default: the flow and ``confusion[0]``): when more than the minimum cell size must be
    withheld, other analyses are cut back first (:data:`CUT_ORDER`), and primary cells are withheld only
    when nothing else protects them. ``domains`` maps each schema feature to its schema entry (``type``,
    ``min``, ``max``, ``categories``): the recipient knows them, and so does the audit. ``models`` describes
    the model behind each score variable (:mod:`site_agent.audit.model`; the recipient knows it), and
    ``occupied`` gives the records' combinations of features and scores where a model cannot be followed
    exactly (an ONNX graph).
    """
    check_definitions(counts, policy)
    k, allow_zero = policy.min_cell_size, policy.allow_zero
    width = int(getattr(policy, "protection_width", 2))
    for relation in counts.relations:
        for name in relation.members:
            if name not in counts.values:
                raise KeyError(f"relation names unknown count {name!r}")
    if primary is None:
        primary = frozenset(n for n in counts.values if n.startswith(("flow.", "confusion[0].")))
    domains = dict(domains or {})
    models = dict(models or {})
    current = ReleaseFacts(label, counts.definitions, {}, counts.relations, bundle, {}, k, allow_zero, domains, models)
    built: list[Audit] = []

    def audit() -> Audit:  # built on first need: the fast path of a lone tree-shaped release needs none
        if not built:
            from .audit.check import Audit  # scipy: imported only when a linear-programming audit is needed

            built.append(Audit(earlier, current, occupied))
        return built[0]

    lone = not earlier
    public = _already_public(counts, earlier, bundle, models)
    context = (counts, k, allow_zero, width, audit, public, bundle, domains, lone, models)
    units = sorted({u for n in counts.values if (u := unit_of(n, primary)) is not None}, key=_cut_rank)

    floor = _primary_floor(counts, primary, k, allow_zero)
    core = frozenset(n for n in primary if keep_rank(n, primary) == 2)  # the 2x2 cells and the analysed totals

    def cost(suppressed: Set[str]) -> int:  # the primary table's cells withheld beyond its own rules' floor
        return len((suppressed & core) - floor)

    def excess(result: Protected | None) -> int:
        return 10**6 if result is None else cost(result.suppressed)

    def attempt(dropped: Sequence[str], best: Protected | None) -> tuple[Protected | None, list[Finding], set[str]]:
        # An attempt withholds more with each audit round, so one that already withholds as many of the primary
        # table's cells as the best so far cannot do better: it stops there (with the parts it found exposed so far)
        limit = excess(best)
        beaten = None if best is None else (lambda suppressed: cost(suppressed) >= limit)
        try:
            result = _protect_once(context, primary, frozenset(dropped), beaten)
            return result, [], set(result.culprits)
        except _Refused as refused:
            return None, refused.findings, refused.culprits

    result, findings, culprits = attempt((), None)
    if result is None and any(not f.candidates for f in findings):
        raise _refusal(findings, earlier)  # exposed by earlier releases alone: no cut of this one can help
    best, best_findings = result, findings
    dropped: list[str] = []
    # Cut back the parts whose counts the audit found exposed at the primary table's cost, in the fixed order,
    # until the primary table keeps every cell its own relations allow; at worst, every other part.
    while excess(best) > 0:
        new = sorted(culprits - set(dropped), key=_cut_rank) or [u for u in units if u not in dropped]
        if not new:
            break
        dropped += new
        result, findings, culprits = attempt(dropped, best)
        if excess(result) < excess(best):
            best, best_findings = result, findings
    if best is None:
        raise _refusal(best_findings, earlier)
    return best


def _primary_floor(counts: CountSet, primary: frozenset[str], k: int, allow_zero: bool) -> frozenset[str]:
    """The primary cells withheld by the primary table alone: its small cells and their complements."""
    values = {n: v for n, v in counts.values.items() if n in primary}
    relations = [r for r in counts.relations if all(m in primary for m in r.members)]
    suppressed = {n for n, v in values.items() if is_unsafe(v, k, allow_zero)}
    _secondary(values, relations, suppressed, {}, keep=primary)
    return frozenset(suppressed)


def _protect_once(
    context: tuple,
    primary: frozenset[str],
    dropped: frozenset[str],
    beaten: Callable[[Set[str]], bool] | None = None,
) -> Protected:
    """One pass: cut back ``dropped`` parts, primary and secondary suppression, then the audit rounds.

    ``beaten``: refuse (with the parts found exposed so far) as soon as it says yes of the counts withheld after an
    audit round (the pass cannot end better: each round withholds more)."""
    counts, k, allow_zero, width, audit, public, bundle, domains, lone, models = context
    values = counts.values
    reasons: dict[str, str] = {}
    suppressed: set[str] = set()
    twins = _same_definition(counts, bundle, models)
    for name, value in values.items():
        # a count of a cut part that another, kept part shows under the same definition stays: it is shown anyway
        if unit_of(name, primary) in dropped and all(unit_of(t, primary) in dropped for t in twins[name]):
            suppressed.add(name)
            reasons[name] = "coarsened: cut back so that the primary table survives"
        elif is_unsafe(value, k, allow_zero):
            suppressed.add(name)
            reasons[name] = (
                "primary: zero, and this policy does not show zeros"
                if value == 0
                else (f"primary: fewer than {k} records")
            )
    # counts with the same definition (e.g. a class total that two analyses report) share one fate
    relations = [*counts.relations, *(Relation(g[0], (n,)) for g in set(twins.values()) for n in g[1:])]
    _secondary(values, relations, suppressed, reasons, public, primary, twins=twins)

    result: AuditResult | None = None
    culprits: set[str] = set()
    for _ in range(MAX_AUDIT_ROUNDS):
        current = {name: (None if name in suppressed else value) for name, value in values.items()}
        rules = {name: rule_of(reasons.get(name, "audit")) for name in suppressed}
        zero = _zero(values, rules)
        fast = None
        if lone and width >= 1:
            bounds = withheld_bounds(rules, zero, k, allow_zero)
            fast = tree_audit(counts.definitions, current, bounds, k, allow_zero, width)
        if fast is not None:
            result = fast
            break
        result = audit().evaluate(current, k, allow_zero, width, current_rules=rules, current_zero=zero)
        if result.ok:
            break
        added: set[str] = set()
        stuck: list[Finding] = []
        for finding in result.findings:
            # other parts before the primary table, in the fixed cut order, then by name: never by value. A count
            # ranks as the last part of the counts with its definition (a paired comparison's model band that is a
            # ROC band goes with the ROC bands, after the paired table's own cells)
            open_candidates = sorted(
                (c for c in finding.candidates if c not in suppressed),
                key=lambda c: (
                    shared_rank(c, primary, twins),  # shares the primary's fate
                    max(_cut_rank(unit_of(t, primary) or "") for t in twins.get(c, (c,))),  # and the last part's
                    c,
                ),
            )
            if not open_candidates:
                stuck.append(finding)
                continue
            if any(c in added for c in open_candidates):
                continue  # another finding of this round already hides one of them: check again first
            choice = open_candidates[0]
            if shared_rank(choice, primary, twins) == 2:
                # the primary table pays: the parts this finding involves are the ones to cut back
                names = [t for n in finding.names for t in twins.get(n.split(" (release", 1)[0], (n,))]
                exposed = {u for n in names if (u := unit_of(n.split(" (release", 1)[0], primary))}
                if not exposed:  # a primary count itself exposed: the parts that could have covered it
                    exposed = {u for n in finding.candidates if (u := unit_of(n, primary)) is not None}
                culprits |= exposed - dropped
            for name in twins.get(choice, (choice,)):
                if name not in suppressed:
                    added.add(name)
                    reasons[name] = f"audit: otherwise {finding.describe()}"
        if stuck or not added:
            raise _Refused(stuck or result.findings, culprits | _units_of(stuck or result.findings, primary))
        suppressed |= added
        _secondary(values, relations, suppressed, reasons, public, primary, twins=twins)
        if beaten is not None and beaten(suppressed):
            raise _Refused(result.findings, culprits | _units_of(result.findings, primary))
    else:
        raise _Refused(result.findings if result else [], culprits)

    released = {name: (None if name in suppressed else value) for name, value in values.items()}
    hidden = frozenset(suppressed)
    derived = released_statistics(counts, released, hidden)
    cut = tuple(
        {"analysis": unit, "action": _action(unit), "rule": CUT_RULE} for unit in sorted(dropped, key=_cut_rank)
    )
    return Protected(
        released, hidden, derived, reasons, result, bundle, cut, k, allow_zero, domains, models, frozenset(culprits)
    )


def released_statistics(counts: CountSet, released: Mapping[str, int | None], hidden: frozenset[str]) -> dict:
    """Derived statistics that may be shown: those whose counts are all released. A statistic given as a
    function is computed from the released counts alone (it returns None when they cannot support it)."""
    out = {}
    for name, (value, rests_on) in counts.derived.items():
        if rests_on & hidden:
            continue
        if callable(value):
            value = value(released)
            if value is None:
                continue
        out[name] = value
    return out


def _units_of(findings: Sequence[Finding], primary: frozenset[str]) -> set[str]:
    names = [n.split(" (release", 1)[0] for f in findings for n in (*f.names, *f.candidates)]
    return {u for n in names if (u := unit_of(n, primary)) is not None}


def _action(unit: str) -> str:
    if unit.startswith("subgroups."):
        return f"withheld the subgroups by {unit.split('.', 1)[1]}"
    if unit == "confusion":
        return "withheld the 2x2 tables at the other thresholds"
    return "withheld in full"


def _already_public(
    counts: CountSet, earlier: Sequence[ReleaseFacts], bundle: str, models: Mapping[str, Any]
) -> frozenset[str]:
    shown = set()
    for release in earlier:
        for name, definition in release.definitions.items():
            if release.values.get(name) is not None:
                shown.add(normalise(definition.where, release.bundle, models=release.models))
    return frozenset(n for n, d in counts.definitions.items() if normalise(d.where, bundle, models=models) in shown)


def _same_definition(counts: CountSet, bundle: str, models: Mapping[str, Any]) -> dict[str, tuple[str, ...]]:
    """Counts of this release with the same definition: suppressing one means suppressing all of them."""
    groups: dict[Any, list[str]] = {}
    for name, definition in counts.definitions.items():
        groups.setdefault(normalise(definition.where, bundle, models=models), []).append(name)
    return {name: tuple(group) for group in groups.values() for name in group}


def _refusal(findings: Sequence[Finding], earlier: Sequence[ReleaseFacts]) -> PolicyViolation:
    """A refusal that says which analyses to drop or coarsen, and never a count."""
    analyses = sorted({analysis_of(n.split(" (release")[0]) for f in findings for n in f.names} - {"flow"}) or sorted(
        {analysis_of(n) for f in findings for n in f.names}
    )
    which = ", ".join(repr(a) for a in analyses) or "the requested analyses"
    scope = (
        f"combined with {len(earlier)} earlier release(s) of this site (to any study), this request"
        if earlier
        else "this request"
    )
    return PolicyViolation(
        f"release withheld by the site's disclosure audit: {scope} would let a count the site's policy hides be "
        f"worked out, and suppressing more of this release cannot prevent it; drop or coarsen {which} (fewer or "
        "wider bands, or the same bands as before) and ask again"
    )
