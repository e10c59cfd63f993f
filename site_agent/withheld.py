"""Which rule withheld each count: the ``suppressed_by`` map every part of a release carries.

Disclosure control names each withheld count's rule (never its value):

``minimum_cell_size``  primary suppression: the count is in 1..k−1 (0..k−1 when the policy hides zeros);
``complementary``      secondary suppression: hidden so that a primary-suppressed count cannot be recomputed
                       from a total and its parts; chosen by a fixed rule that does not look at values; the
                       count was not small (primary suppression ran first): 0 or at least k (at least k
                       when zeros are hidden);
``audit``              hidden after the disclosure audit (otherwise a count, or a small region found by
                       differencing, could be worked out from every release the site made); not small, as
                       for ``complementary``;
``coarsened``          an analysis cut back so that the primary table survives (the release's ``cut_back``
                       list says which and why).

The recipient is told the rule because a recipient who knows the algorithm can work it out anyway; the
audit therefore treats it as a fact (:func:`site_agent.audit.facts.withheld_bounds`). Each part of a release
that has a ``suppressed`` list gets a ``suppressed_by`` object with the same names as keys.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

RULES = ("minimum_cell_size", "complementary", "audit", "coarsened")
_PREFIXES = {"primary": "minimum_cell_size", "secondary": "complementary", "audit": "audit", "coarsened": "coarsened"}
INDEXED = ("confusion", "margin")  # analyses rendered as a list of tables, count names ``NAME[i].…``


def rule_of(reason: str) -> str:
    """The rule of a site-side reason text (``"primary: fewer than 10 records"`` → ``minimum_cell_size``)."""
    return _PREFIXES.get(reason.split(":", 1)[0].strip(), "audit")


def _mark(part: dict[str, Any], prefix: str, rules: Mapping[str, str]) -> None:
    hidden = part.get("suppressed")
    if isinstance(hidden, list):
        # protect names the rule of every count it withheld; a name the map lacks is marked "audit"
        part["suppressed_by"] = {str(n): rules.get(prefix + str(n), "audit") for n in hidden}


def _analysis(name: str, rendered: Any, prefix: str, rules: Mapping[str, str]) -> None:
    if name in INDEXED and isinstance(rendered, list):
        for i, table in enumerate(rendered):
            if isinstance(table, dict):
                _mark(table, f"{prefix}{name}[{i}].", rules)
    elif name == "agreement" and isinstance(rendered, dict):
        for i, table in enumerate(rendered.get("tables", []) or []):
            if isinstance(table, dict):
                _mark(table, f"{prefix}agreement[{i}].", rules)
    elif isinstance(rendered, dict):
        _mark(rendered, f"{prefix}{name}.", rules)


def annotate(flow: dict[str, Any], results: dict[str, Any], rules: Mapping[str, str]) -> None:
    """Add ``suppressed_by`` next to every ``suppressed`` list of a rendered release (in place)."""
    _mark(flow, "flow.", rules)
    for name, rendered in results.items():
        if name != "subgroups":
            _analysis(name, rendered, "", rules)
            continue
        for variable in rendered.get("variables", []) if isinstance(rendered, dict) else []:
            for index, level in enumerate(variable.get("levels", [])):
                prefix = f"subgroups.{variable['variable']}[{index}]."
                own = {k: rules.get(prefix + k, "audit") for k in ("analysed_positive", "analysed_negative")}
                level["suppressed_by"] = {k: v for k, v in own.items() if level.get(k) is None}
                for inner, part in level.items():
                    if inner not in ("level", "analysed_positive", "analysed_negative", "suppressed_by"):
                        _analysis(inner, part, prefix, rules)
