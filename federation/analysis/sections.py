"""Further analyses pooled from the release sections: discrimination, calibration, paired comparison, subgroups."""

from __future__ import annotations

import math
from typing import Any

from federation.protocol.documents import calibration_intercept
from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _number
from federation.stats import (
    SiteBands,
    multiple_threshold_roc,
    paired_difference,
    pool_auc,
    pool_auc_difference,
    pool_calibration_intercept,
    pool_calibration_slope,
    pool_observed_expected,
    subgroup_analysis,
)

from ..labels import level_label
from .accuracy import _attempt, _logit_pair, _not_estimated
from .tables import SiteTable


def _section(table: SiteTable, name: str) -> dict[str, Any] | None:
    value = table.extra.get(name)
    return value if isinstance(value, dict) else None


def _bands(site_id: str, roc: dict[str, Any]) -> SiteBands | None:
    bands = roc.get("bands")
    if not isinstance(bands, list) or not bands or not all(isinstance(b, dict) for b in bands):
        return None
    low = _number(bands[0].get("low"))
    edges = [-math.inf if low is None else low]
    for band in bands:
        high = _number(band.get("high"))
        edges.append(math.inf if high is None else high)
    return SiteBands(
        site_id,
        tuple(edges),
        tuple(_count(b.get("positive")) for b in bands),
        tuple(_count(b.get("negative")) for b in bands),
        _count(roc.get("positive")),
        _count(roc.get("negative")),
    )


def _subgroup_auc_bounds(table: SiteTable, integer_variables: frozenset[str]) -> dict[str, dict[str, Any]]:
    """``{variable: {level label: {"low", "high"}}}`` for the site's subgroup levels that withheld their AUC."""
    section = _section(table, "subgroups") or {}
    variables = {v.get("variable"): v for v in section.get("variables") or [] if isinstance(v, dict)}
    out: dict[str, dict[str, Any]] = {}
    for (name, index), (low, high) in sorted(table.subgroup_auc_bounds.items()):
        level = (variables.get(name) or {}).get("levels", [])[index]
        label = level_label(name, level.get("level"), name in integer_variables)
        out.setdefault(name, {})[label] = {"low": low, "high": high}
    return out


def _discrimination(tables: list[SiteTable], integer_variables: frozenset[str] = frozenset()) -> dict[str, Any] | None:
    sites = [(t.site_id, _section(t, "roc")) for t in tables]
    sites = [(s, r) for s, r in sites if r is not None]
    if not sites:
        return None
    ids = [s for s, _ in sites]
    out: dict[str, Any] = {
        "pooled_auc": _attempt(
            lambda: pool_auc(
                ids, [_number(r.get("auc")) for _, r in sites], [_number(r.get("auc_se")) for _, r in sites]
            )
        )
    }
    # Where a site withheld its AUC: the smallest and largest its released bands allow (not pooled: a range
    # has no standard error).
    out["auc_bounds"] = {
        t.site_id: {"low": t.auc_bounds[0], "high": t.auc_bounds[1]} for t in tables if t.auc_bounds is not None
    }
    out["subgroup_auc_bounds"] = {
        t.site_id: _subgroup_auc_bounds(t, integer_variables) for t in tables if t.subgroup_auc_bounds
    }
    bands = [b for s, r in sites if (b := _bands(s, r)) is not None]
    # Never a curve from bands summed across sites (it keeps only the edges every site shares): a model in which
    # each site keeps its own band edges and its own accuracy.
    out["summary_roc"] = (
        _attempt(lambda: multiple_threshold_roc(bands)) if bands else _not_estimated("no site released bands")
    )
    return out


def _calibration(tables: list[SiteTable]) -> dict[str, Any] | None:
    sites = [(t.site_id, _section(t, "calibration")) for t in tables]
    sites = [(s, c) for s, c in sites if c is not None]
    if not sites:
        return None
    ids = [s for s, _ in sites]
    observed = [_count(c.get("observed")) for _, c in sites]
    others = [_count(c.get("non_events")) for _, c in sites]
    n = [None if o is None or e is None else o + e for o, e in zip(observed, others, strict=True)]
    return {
        "observed_expected": _attempt(
            lambda: pool_observed_expected(ids, observed, [_number(c.get("expected")) for _, c in sites], n)
        ),
        "calibration_intercept": _attempt(
            lambda: pool_calibration_intercept(
                ids,
                [_number(calibration_intercept(c)) for _, c in sites],
                [_number(calibration_intercept(c, "_se")) for _, c in sites],
            )
        ),
        "calibration_slope": _attempt(
            lambda: pool_calibration_slope(
                ids, [_number(c.get("slope")) for _, c in sites], [_number(c.get("slope_se")) for _, c in sites]
            )
        ),
    }


def _paired(tables: list[SiteTable]) -> dict[str, Any] | None:
    sites = [(t.site_id, _section(t, "paired")) for t in tables]
    sites = [(s, p) for s, p in sites if p is not None]
    if not sites:
        return None
    ids = [s for s, _ in sites]

    def cells(label: str, keys: tuple[str, str, str, str]) -> list[list[int | None]]:
        columns: list[list[int | None]] = [[], [], [], []]
        for _, p in sites:
            table = p.get(label) if isinstance(p.get(label), dict) else {}
            for j, key in enumerate(keys):
                columns[j].append(_count(table.get(key)))
        return columns

    # Sensitivity: "correct" = called positive among the diseased; specificity: called negative among the rest.
    sens = cells("diseased", ("model1_compare1", "model1_compare0", "model0_compare1", "model0_compare0"))
    spec = cells("non_diseased", ("model0_compare0", "model0_compare1", "model1_compare0", "model1_compare1"))
    return {
        "sensitivity_difference": _attempt(
            lambda: paired_difference(ids, *sens, measure="difference in sensitivity (model minus comparison)")
        ),
        "specificity_difference": _attempt(
            lambda: paired_difference(ids, *spec, measure="difference in specificity (model minus comparison)")
        ),
        "auc_difference": _attempt(
            lambda: pool_auc_difference(
                ids,
                *([_number(p.get(key)) for _, p in sites] for key in ("auc_model", "auc_compare", "auc_model_se")),
                [_number(p.get("auc_compare_se")) for _, p in sites],
                [_number(p.get("auc_covariance")) for _, p in sites],
            )
        ),
    }


def _level_confusion(level: dict[str, Any], threshold: float) -> dict[str, Any] | None:
    tables = level.get("confusion")
    if not isinstance(tables, list):
        return None
    for entry in tables:
        if isinstance(entry, dict) and isinstance(entry.get("threshold"), int | float):
            if math.isclose(float(entry["threshold"]), threshold) and isinstance(entry.get("cells"), dict):
                return entry["cells"]
    return None


def _subgroups(tables: list[SiteTable], integer_variables: frozenset[str] = frozenset()) -> dict[str, Any] | None:
    rows: dict[str, list[tuple[str, str, dict[str, Any], float, int]]] = {}
    for table in tables:
        section = _section(table, "subgroups")
        if section is None or not isinstance(section.get("variables"), list):
            continue
        for variable in section["variables"]:
            if not isinstance(variable, dict) or not isinstance(variable.get("levels"), list):
                continue
            name = str(variable.get("variable"))
            for position, level in enumerate(variable["levels"]):
                if isinstance(level, dict):
                    label = level_label(name, level.get("level"), name in integer_variables)
                    rows.setdefault(name, []).append((table.site_id, label, level, table.threshold, position))
    if not rows:
        return None
    out: dict[str, Any] = {}
    for variable, unordered in rows.items():
        # levels in the order the request cut them (youngest band first), whichever site has an estimate first
        entries = sorted(unordered, key=lambda e: e[4])
        ids = [e[0] for e in entries]
        levels = [e[1] for e in entries]
        result: dict[str, Any] = {}
        for measure, (events, others) in (("sensitivity", ("tp", "fn")), ("specificity", ("tn", "fp"))):
            estimates, variances = [], []
            for _, _, level, threshold, _ in entries:
                cells = _level_confusion(level, threshold) or {}
                y, v = _logit_pair(_count(cells.get(events)), _count(cells.get(others)))
                estimates.append(y)
                variances.append(v)
            result[measure] = _attempt(
                subgroup_analysis, ids, estimates, variances, levels, measure=f"logit {measure}", scale="logit"
            )
        auc_y, auc_v = [], []
        for _, _, level, _, _ in entries:
            roc = level.get("roc") if isinstance(level.get("roc"), dict) else {}
            c, s = _number(roc.get("auc")), _number(roc.get("auc_se"))
            if c is None or s is None or not 0 < c < 1:
                auc_y.append(None)
                auc_v.append(None)
            else:
                auc_y.append(math.log(c / (1 - c)))
                auc_v.append((s / (c * (1 - c))) ** 2)
        if any(y is not None for y in auc_y):
            result["auc"] = _attempt(subgroup_analysis, ids, auc_y, auc_v, levels, measure="logit AUC", scale="logit")
        out[variable] = result
    return out
