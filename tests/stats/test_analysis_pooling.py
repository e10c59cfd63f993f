"""federation.analysis wires the pooling methods to release sections (shapes of site_agent.analyses render()):
the JSON keeps the foundation keys, adds the bivariate, GLMM and suppression-aware results, and pools the
roc, calibration, paired and subgroups sections with the same numbers the stats functions give directly."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from federation.analysis import SiteTable, analyze_tables
from federation.protocol.words import withheld_cells
from federation.stats import glmm_accuracy, pool_auc, pool_calibration_slope, reitsma
from simulations.validate_stats import REASONS, release_table
from tests.stats.prediction_example import sites
from tests.stats.test_bivariate import AUDITC

FOUNDATION_SITE_KEYS = {"site_id", "threshold", "tp", "fp", "fn", "tn", "suppressed", "sensitivity", "specificity"}
FOUNDATION_POOLED_KEYS = {
    "sensitivity",
    "specificity",
    "tau2_logit_sensitivity",
    "tau2_logit_specificity",
    "i2_logit_sensitivity",
    "i2_logit_specificity",
    "sites_pooled",
    "sites_not_pooled",
}
POLICY = {"min_cell_size": 10, "allow_zero": True}


def _site_table(table, extra: dict | None = None) -> SiteTable:
    flow = {
        "read": table.read,
        "analysed": table.analysed,
        "analysed_positive": table.positives,
        "analysed_negative": table.negatives,
        "excluded": dict(zip(REASONS, table.excluded, strict=False)),
    }
    cells = dict(zip(("tp", "fp", "fn", "tn"), table.cells, strict=True))
    return SiteTable(table.site_id, 0.5, cells, table.suppressed, flow, POLICY, extra or {})


def _complete(table) -> SiteTable:
    """A site that released everything (as if its policy's minimum cell size were 1)."""
    tp, fp, fn, tn = table.cells
    flow = {
        "read": tp + fp + fn + tn,
        "analysed": tp + fp + fn + tn,
        "analysed_positive": tp + fn,
        "analysed_negative": fp + tn,
        "excluded": dict.fromkeys(REASONS, 0),
    }
    cells = {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
    return SiteTable(table.site_id, 0.5, cells, (), flow, {"min_cell_size": 1, "allow_zero": True})


def test_accuracy_pooling_keeps_foundation_keys_and_adds_bivariate_results() -> None:
    # A site small enough that suppression hides its cells (the project's own rule), and eight AuditC studies.
    small = release_table("small-site", 6, 3, 4, 17, [0, 0, 2, 0, 0], 10, True)
    assert small.suppressed
    tables = [*(_complete(t) for t in AUDITC[:8]), _site_table(small)]
    result = analyze_tables("study", tables, prevalence=0.1)
    json.dumps(result, allow_nan=False)  # no NaN or infinity anywhere
    assert FOUNDATION_SITE_KEYS <= set(result["sites"][0]) and FOUNDATION_POOLED_KEYS <= set(result["pooled"])
    pooled = result["pooled"]
    # The headline keeps every site; the univariate sensitivity analysis drops the one with withheld cells.
    assert pooled["sites_not_pooled"] == [] and "small-site" in pooled["censored_sites"]
    univariate = pooled["sensitivity_analyses"]["univariate"]
    assert univariate["sites_not_pooled"] == [
        {"site_id": "small-site", "reason": withheld_cells(("tp", "fp", "fn", "tn"))}
    ]
    direct = reitsma([t.released_table() for t in tables])
    assert pooled["bivariate"]["mean_logit_sensitivity"] == direct.mean_logit_sensitivity
    assert pooled["bivariate"]["sroc"]["area_under_curve"] == direct.sroc.area_under_curve
    assert pooled["bivariate_glmm"]["n_sites"] == 8
    aware = pooled["bivariate_glmm_suppression_aware"]
    assert aware["n_sites"] == 9 and "small-site" in aware["sites_pooled"]
    direct = glmm_accuracy([t.released_table() for t in tables])
    assert aware["mean_logit_sensitivity"] == pytest.approx(direct.mean_logit_sensitivity, abs=1e-4)
    assert pooled["sensitivity"]["estimate"] == aware["sensitivity"]["estimate"]
    assert pooled["sensitivity"]["method"].startswith("profile likelihood")
    assert pooled["sensitivity"]["pi_low"] < pooled["sensitivity"]["ci_low"]
    site = result["sites"][0]
    assert site["ppv"]["estimate"] == pytest.approx(47 / 148) and site["likelihood_ratio_positive"] is not None
    # Bayes' theorem at the stated prevalence 0.1 (Altman & Bland 1994), worked by hand for study 1.
    se, sp = 47 / 56, 738 / 839
    assert site["ppv_at_stated_prevalence"] == pytest.approx(se * 0.1 / (se * 0.1 + (1 - sp) * 0.9), rel=1e-12)
    assert result["sites"][-1]["ppv"] is None  # nothing to compute from a suppressed table


def test_a_model_that_cannot_be_estimated_says_why() -> None:
    small = release_table("small-site", 6, 3, 4, 17, [0] * 5, 10, True)
    result = analyze_tables("study", [_complete(AUDITC[0]), _site_table(small)])
    assert result["pooled"]["bivariate"] == {
        "status": "not estimated",
        "reason": "bivariate pooling needs at least 2 sites with complete tables, got 1",
        "label": "sensitivity analysis: normal approximation, complete tables only",
    }
    # Two sites cannot support the bivariate random-effects headline: it says so, and prints no number.
    pooled = result["pooled"]
    assert pooled["sensitivity"] is None and pooled["specificity"] is None
    assert pooled["note"] == "not estimable: 2 usable site(s); the bivariate random-effects model needs at least 4"
    assert pooled["bivariate_glmm_suppression_aware"]["status"] == "not estimated"


def _roc_section(s, edges: list[float]) -> dict:
    cuts = np.array(edges[1:-1])
    band = np.searchsorted(cuts, s.risk, side="right")
    bands = []
    for j in range(len(edges) - 1):
        low, high = edges[j], edges[j + 1]
        bands.append(
            {
                "low": None if math.isinf(low) else low,
                "high": None if math.isinf(high) else high,
                "positive": int(np.sum((band == j) & (s.outcome == 1))),
                "negative": int(np.sum((band == j) & (s.outcome == 0))),
                "merged_bands": [j, j],
            }
        )
    return {
        "bands": bands,
        "positive": int(s.outcome.sum()),
        "negative": int((1 - s.outcome).sum()),
        "auc": s.auc,
        "auc_se": s.auc_se,
    }


def _paired_section(s) -> dict:
    out = {}
    for label, klass in (("diseased", 1), ("non_diseased", 0)):
        keep = s.outcome == klass
        a, b = s.risk[keep] >= 0.5, s.risk_b[keep] >= 0.5
        out[label] = {
            "model1_compare1": int(np.sum(a & b)),
            "model1_compare0": int(np.sum(a & ~b)),
            "model0_compare1": int(np.sum(~a & b)),
            "model0_compare0": int(np.sum(~a & ~b)),
            "total": int(keep.sum()),
        }
    out.update(
        {
            "auc_model": s.auc,
            "auc_compare": s.auc_b,
            "auc_model_se": s.auc_se,
            "auc_compare_se": s.auc_b_se,
            "auc_covariance": s.auc_cov,
        }
    )
    return out


def test_release_sections_are_pooled() -> None:
    worked = sites()
    tables = []
    for s, audit in zip(worked, AUDITC, strict=False):
        base = _complete(audit)
        extra = {
            "roc": _roc_section(s, [-math.inf, 0.2, 0.5, 0.8, math.inf]),
            "calibration": {
                "observed": s.observed,
                "non_events": s.n - s.observed,
                "expected": s.expected,
                "calibration_intercept": s.citl,
                "calibration_intercept_se": s.citl_se,
                "slope": s.slope,
                "slope_se": s.slope_se,
            },
            "paired": _paired_section(s),
            "subgroups": {
                "variables": [
                    {
                        "variable": "sex",
                        "edges": None,
                        "levels": [
                            {
                                "level": level,
                                "confusion": [{"threshold": 0.5, "cells": cells, "suppressed": []}],
                                "roc": {"auc": auc, "auc_se": 0.04},
                            }
                            for level, cells, auc in (
                                ("female", {"tp": 30, "fp": 8, "fn": 6, "tn": 50}, 0.85),
                                ("male", {"tp": 40 + 3 * len(tables), "fp": 12, "fn": 9, "tn": 61}, 0.80),
                            )
                        ],
                    }
                ]
            },
        }
        tables.append(SiteTable(base.site_id, 0.5, base.cells, (), base.flow, POLICY, extra))
    result = analyze_tables("study", tables)
    json.dumps(result, allow_nan=False)
    ids = [t.site_id for t in tables]
    auc = pool_auc(ids, [s.auc for s in worked], [s.auc_se for s in worked])
    assert result["discrimination"]["pooled_auc"]["estimate"] == auc.estimate
    summary_roc = result["discrimination"]["summary_roc"]
    assert [p["threshold"] for p in summary_roc["operating_points"]] == [0.2, 0.5, 0.8]
    assert "pooled_roc" not in result["discrimination"]  # never a curve from bands summed across sites
    slope = pool_calibration_slope(ids, [s.slope for s in worked], [s.slope_se for s in worked])
    assert result["calibration"]["calibration_slope"]["estimate"] == slope.estimate
    assert result["calibration"]["observed_expected"]["scale"] == "log"
    paired = result["paired"]
    assert paired["auc_difference"]["estimate"] == pytest.approx(
        np.average([s.auc - s.auc_b for s in worked], weights=None), abs=0.05
    )
    assert set(paired) == {"sensitivity_difference", "specificity_difference", "auc_difference"}
    sex = result["subgroups"]["sex"]
    assert [g["subgroup"] for g in sex["sensitivity"]["subgroups"]] == ["female", "male"]
    between = sex["sensitivity"]["between_subgroups"]
    assert between["distribution"] == "F" and between["df"][0] == 1 and 0 <= between["p"] <= 1
    assert sex["auc"]["subgroups"][0]["pooled"]["estimate"] == pytest.approx(math.log(0.85 / 0.15), rel=1e-9)
