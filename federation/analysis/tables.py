"""From stored releases to one table per site: the 2×2 at a threshold, the flow, the withheld cells' rules
and the further release sections.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

from federation.protocol import Release, ValidationToolError
from federation.ranges import auc_ranges, primary_ranges
from federation.stats import RULES, ReleasedTable

from ..store import Store, StoredRelease

CELLS = ("tp", "fp", "fn", "tn")


class AnalysisError(ValidationToolError):
    pass


@dataclass(frozen=True)
class SiteTable:
    site_id: str
    threshold: float
    cells: dict[str, int | None]
    suppressed: tuple[str, ...]
    flow: dict[str, Any]
    policy: dict[str, Any] = field(default_factory=dict)
    extra: dict[str, Any] = field(default_factory=dict)
    # What the recipient can work out about each withheld cell or margin (federation.ranges), the rule that
    # withheld it where the release says so, and whether the site's rule can be replayed exactly.
    ranges: dict[str, tuple[int, int]] = field(default_factory=dict)
    suppressed_by: dict[str, str] = field(default_factory=dict)
    replayable: bool = False
    # What the site cut back so that its primary table could be released (the release's ``cut_back``, in words).
    cut_back: tuple[dict[str, str], ...] = ()
    # Where the site withheld its AUC: the smallest and largest its released ROC bands allow (federation.ranges).
    auc_bounds: tuple[float, float] | None = None
    # The same within each subgroup level that withheld its AUC: (variable, level's place) -> (low, high).
    subgroup_auc_bounds: dict[tuple[str, int], tuple[float, float]] = field(default_factory=dict)

    def released_table(self) -> ReleasedTable:
        """The table with what the release says about its hidden cells (policy, flow margins, ranges, rules)."""
        excluded = self.flow.get("excluded") if isinstance(self.flow.get("excluded"), dict) else {}
        k = self.policy.get("min_cell_size")
        return ReleasedTable(
            self.site_id,
            *(self.cells.get(c) for c in CELLS),
            positives=self.flow.get("analysed_positive"),
            negatives=self.flow.get("analysed_negative"),
            analysed=self.flow.get("analysed"),
            read=self.flow.get("read"),
            excluded=tuple(excluded.values()),
            excluded_names=tuple(str(name) for name in excluded),
            min_cell_size=k if isinstance(k, int) and not isinstance(k, bool) else None,
            allow_zero=bool(self.policy.get("allow_zero", True)),
            ranges=self.ranges,
            suppressed_by=self.suppressed_by,
            replayable=self.replayable,
        )


def choose_study(store: Store, study_id: str | None) -> str:
    studies = store.studies()
    if study_id:
        if study_id not in studies:
            raise AnalysisError(f"{store.path}: no study {study_id!r} (studies: {', '.join(studies) or 'none'})")
        return study_id
    if len(studies) != 1:
        raise AnalysisError(
            f"{store.path}: holds {len(studies)} studies; name one with --study-id ({', '.join(studies)})"
        )
    return studies[0]


# Where a release names the rule that withheld a count (``suppressed_by``), the names the pooling uses.
_FLOW_NAMES = {"analysed_positive": "positives", "analysed_negative": "negatives", "analysed": "analysed"}
# Release sections whose counts relate to the 2x2 (any of them makes the site's rule too rich to replay).
_COUNT_SECTIONS = ("roc", "calibration", "margin", "agreement", "paired", "subgroups")


def _rules_named(release: Release, table: Any) -> dict[str, str]:
    """The ``suppressed_by`` entries of the 2x2 and the flow, by the pooling's names (empty when not given)."""
    named: dict[str, str] = {}
    cells = getattr(table, "suppressed_by", None)
    if isinstance(cells, dict):
        named.update({c: str(rule) for c, rule in cells.items() if c in CELLS})
    flow = release.flow.get("suppressed_by")
    if isinstance(flow, dict):
        named.update({_FLOW_NAMES[n]: str(rule) for n, rule in flow.items() if n in _FLOW_NAMES})
    return {name: rule for name, rule in named.items() if rule in RULES}


def _all_rules(release: Release, table: Any) -> list[str]:
    """Every rule the release names for the 2x2 and the flow (exclusions and records read included)."""
    found = list((getattr(table, "suppressed_by", None) or {}).values())
    flow = release.flow.get("suppressed_by")
    return found + (list(flow.values()) if isinstance(flow, dict) else [])


def site_tables(
    releases: list[StoredRelease], threshold: float | None = None, auc_bounds: bool = False
) -> list[SiteTable]:
    """The latest release of each site, at ``threshold`` (default: each release's first table).

    Each table carries the feasible ranges of its withheld cells and margins, computed from every release
    the site sent to the study (:func:`federation.ranges.primary_ranges`); with ``auc_bounds``, also the
    range of a withheld AUC, overall and within each subgroup level (:func:`federation.ranges.auc_ranges`; a few
    tenths of a second a site).
    """
    latest: dict[str, StoredRelease] = {}
    by_site: dict[str, list[Release]] = {}
    for stored in releases:
        by_site.setdefault(stored.release.site_id, []).append(stored.release)
        previous = latest.get(stored.release.site_id)
        if previous is None or stored.release.created_at >= previous.release.created_at:
            latest[stored.release.site_id] = stored
    tables = []
    for site_id in sorted(latest):
        release = latest[site_id].release
        candidates = [
            (i, t) for i, t in enumerate(release.confusion) if threshold is None or math.isclose(t.threshold, threshold)
        ]
        if not candidates:
            continue
        index, table = candidates[0]
        others = [r for r in by_site[site_id] if r is not release]
        withheld_aucs = auc_ranges(release, others) if auc_bounds else {}
        ranges = primary_ranges(release, index, others) if table.suppressed or None in release.flow.values() else {}
        rules = _rules_named(release, table)
        replayable = (
            not others
            and len(release.confusion) == 1
            and not any(name in release.extra for name in _COUNT_SECTIONS)
            and not any(rule in ("audit", "coarsened") for rule in _all_rules(release, table))
        )
        tables.append(
            SiteTable(
                site_id,
                table.threshold,
                dict(table.cells),
                table.suppressed,
                release.flow,
                dict(release.policy),
                dict(release.extra),
                ranges=ranges,
                suppressed_by=rules,
                replayable=replayable,
                cut_back=tuple(release.cut_back) if index == 0 else (),
                auc_bounds=withheld_aucs.get(None),
                subgroup_auc_bounds={key: found for key, found in withheld_aucs.items() if key is not None},
            )
        )
    return tables
