"""From stored releases to the numbers a validation paper reports.

Per site: the 2×2 at the bundle's threshold, sensitivity and specificity with Wilson 95% intervals.
Pooled: DerSimonian–Laird random effects of logit sensitivity and logit specificity (tau², I²), with 0.5
added to every cell of a site that has a zero cell, and only then. A site with a suppressed cell is listed
as not pooled, with the reason.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any

from federation.protocol import ValidationToolError
from federation.stats import random_effects, wilson

from .store import Store, StoredRelease

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


def site_tables(releases: list[StoredRelease], threshold: float | None = None) -> list[SiteTable]:
    """The latest release of each site, at ``threshold`` (default: each release's first table)."""
    latest: dict[str, StoredRelease] = {}
    for stored in releases:
        previous = latest.get(stored.release.site_id)
        if previous is None or stored.release.created_at >= previous.release.created_at:
            latest[stored.release.site_id] = stored
    tables = []
    for site_id in sorted(latest):
        release = latest[site_id].release
        candidates = [t for t in release.confusion if threshold is None or math.isclose(t.threshold, threshold)]
        if not candidates:
            continue
        table = candidates[0]
        tables.append(SiteTable(site_id, table.threshold, dict(table.cells), table.suppressed, release.flow))
    return tables


def _proportion(x: int, n: int) -> dict[str, float] | None:
    if n <= 0:
        return None
    interval = wilson(x, n)
    return {"estimate": interval.estimate, "ci_low": interval.ci_low, "ci_high": interval.ci_high}


def _logit_with_variance(x: float, n: float) -> tuple[float, float]:
    return math.log(x / (n - x)), 1.0 / x + 1.0 / (n - x)


def _expit(value: float) -> float:
    return 1.0 / (1.0 + math.exp(-value))


def pool_accuracy(tables: list[SiteTable]) -> dict[str, Any]:
    pooled_sites, not_pooled = [], []
    sens_est, sens_var, spec_est, spec_var = [], [], [], []
    corrected = []
    for table in tables:
        if table.suppressed:
            not_pooled.append({"site_id": table.site_id, "reason": "suppressed cells: " + ", ".join(table.suppressed)})
            continue
        cells = {c: float(table.cells[c]) for c in CELLS}  # type: ignore[arg-type]
        if cells["tp"] + cells["fn"] == 0 or cells["fp"] + cells["tn"] == 0:
            not_pooled.append({"site_id": table.site_id, "reason": "no participants with or without the condition"})
            continue
        if min(cells.values()) == 0:
            cells = {c: v + 0.5 for c, v in cells.items()}
            corrected.append(table.site_id)
        est, var = _logit_with_variance(cells["tp"], cells["tp"] + cells["fn"])
        sens_est.append(est)
        sens_var.append(var)
        est, var = _logit_with_variance(cells["tn"], cells["tn"] + cells["fp"])
        spec_est.append(est)
        spec_var.append(var)
        pooled_sites.append(table.site_id)
    result: dict[str, Any] = {
        "method": "DerSimonian-Laird random effects on the logit scale, Wald 95% interval",
        "sites_pooled": pooled_sites,
        "sites_not_pooled": not_pooled,
        "continuity_corrected_sites": corrected,
    }
    if len(pooled_sites) < 2:
        result.update(
            {
                "sensitivity": None,
                "specificity": None,
                "tau2_logit_sensitivity": None,
                "tau2_logit_specificity": None,
                "i2_logit_sensitivity": None,
                "i2_logit_specificity": None,
                "note": f"pooling needs at least 2 sites with releasable 2x2 tables; {len(pooled_sites)} available",
            }
        )
        return result
    for name, estimates, variances in (("sensitivity", sens_est, sens_var), ("specificity", spec_est, spec_var)):
        pooled = random_effects(estimates, variances, method="DL")
        result[name] = {
            "estimate": _expit(pooled.estimate),
            "ci_low": _expit(pooled.ci_low),
            "ci_high": _expit(pooled.ci_high),
        }
        result[f"tau2_logit_{name}"] = pooled.tau2
        result[f"i2_logit_{name}"] = pooled.i2
        result[f"q_logit_{name}"] = pooled.q
    return result


def analyze(store: Store, study_id: str | None = None) -> dict[str, Any]:
    study = choose_study(store, study_id)
    releases = store.releases(study)
    if not releases:
        raise AnalysisError(f"{store.path}: study {study!r} has no ingested releases yet")
    tables = site_tables(releases)
    sites = []
    for table in tables:
        cells = table.cells
        entry: dict[str, Any] = {"site_id": table.site_id, "threshold": table.threshold}
        entry.update({c: cells[c] for c in CELLS})
        entry["suppressed"] = list(table.suppressed)
        entry["sensitivity"] = (
            _proportion(cells["tp"], cells["tp"] + cells["fn"])
            if cells["tp"] is not None and cells["fn"] is not None
            else None
        )
        entry["specificity"] = (
            _proportion(cells["tn"], cells["tn"] + cells["fp"])
            if cells["tn"] is not None and cells["fp"] is not None
            else None
        )
        entry["flow"] = table.flow
        sites.append(entry)
    return {"study_id": study, "sites": sites, "pooled": pool_accuracy(tables)}
