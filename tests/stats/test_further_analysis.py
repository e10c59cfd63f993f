"""federation.further_analysis wires the reviewer's methods to release sections (shapes of site_agent.analyses
render()): the numbers in `analyze --json` are the ones the stats functions give directly, each of which is
checked against an independent implementation in tests/stats/test_reviewer_methods.py.

Data: scikit-learn's breast-cancer sites of tests/stats/prediction_example.py, with a second rating made by
flipping a seeded 10% of the reference verdicts (invented), score-margin bands at 0.1 and 0.2 from the 0.5
threshold, and a random "sex" within each site.
"""

from __future__ import annotations

import json
import math
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score

from federation.analysis import SiteTable, analyze_tables
from federation.further_analysis import CovariateError, read_covariates, summary_lines
from federation.stats import (
    bivariate_meta_regression,
    deeks_funnel_test,
    headline_covariate_test,
    headline_leave_one_site_out,
    pool_kappa,
    pool_proportion,
    summary_ratios,
    within_site_contrasts,
)
from tests.stats.prediction_example import sites
from tests.stats.test_analysis_pooling import _paired_section

SITES = sites()


def _kappa_se(a: np.ndarray, b: np.ndarray) -> float:
    """Fleiss, Cohen & Everitt (1969) large-sample SE of kappa for two binary ratings."""
    p = np.array([[np.mean((a == i) & (b == j)) for j in (1, 0)] for i in (1, 0)])
    rows, cols = p.sum(axis=1), p.sum(axis=0)
    po, pe = np.trace(p), float(rows @ cols)
    kappa = (po - pe) / (1 - pe)
    total = sum(p[i, i] * (1 - (rows[i] + cols[i]) * (1 - kappa)) ** 2 for i in range(2))
    total += (1 - kappa) ** 2 * (p[0, 1] * (cols[0] + rows[1]) ** 2 + p[1, 0] * (cols[1] + rows[0]) ** 2)
    total -= (kappa - pe * (1 - kappa)) ** 2
    return float(math.sqrt(total / a.size) / (1 - pe))


def _tables() -> list[SiteTable]:
    out = []
    for i, s in enumerate(SITES):
        called = (s.risk >= 0.5).astype(int)
        second = np.where(np.random.default_rng(i).random(s.outcome.size) < 0.1, 1 - s.outcome, s.outcome)
        sex = np.random.default_rng(50 + i).integers(0, 2, s.outcome.size)
        pairs = {}
        for name, (a, b) in {
            "model_reference": (called, s.outcome),
            "model_reference2": (called, second),
            "reference_reference2": (s.outcome, second),
        }.items():
            pairs[name] = {
                "cells": {f"{x}{y}": int(np.sum((a == x) & (b == y))) for x in (1, 0) for y in (1, 0)},
                "kappa": float(cohen_kappa_score(a, b)),
                "kappa_se": _kappa_se(a, b),
            }
        margin_rows = {}
        for side, keep in (("called_positive", called == 1), ("called_negative", called == 0)):
            distance = np.abs(s.risk - 0.5)
            rows = []
            for near, far in ((0.0, 0.1), (0.1, 0.2), (0.2, None)):
                band = keep & (distance >= near) & (distance < (far if far is not None else np.inf))
                wrong = int(np.sum(band & (called != s.outcome)))
                rows.append(
                    {"distance_from": near, "distance_to": far, "correct": int(band.sum()) - wrong, "wrong": wrong}
                )
            margin_rows[side] = rows
        levels = []
        for level in (0, 1):
            keep = sex == level
            o, c = s.outcome[keep], called[keep]
            cells = {
                "tp": int(np.sum((c == 1) & (o == 1))),
                "fp": int(np.sum((c == 1) & (o == 0))),
                "fn": int(np.sum((c == 0) & (o == 1))),
                "tn": int(np.sum((c == 0) & (o == 0))),
            }
            levels.append({"level": ("female", "male")[level], "confusion": [{"threshold": 0.5, "cells": cells}]})
        tp, fp = int(np.sum((called == 1) & (s.outcome == 1))), int(np.sum((called == 1) & (s.outcome == 0)))
        fn, tn = int(np.sum((called == 0) & (s.outcome == 1))), int(np.sum((called == 0) & (s.outcome == 0)))
        n = tp + fp + fn + tn
        flow = {"read": n, "analysed": n, "analysed_positive": tp + fn, "analysed_negative": fp + tn, "excluded": {}}
        extra = {
            "agreement": {"available": True, "tables": [{"threshold": 0.5, "pairs": pairs}]},
            "margin": [{"threshold": 0.5, **margin_rows}],
            "subgroups": {"variables": [{"variable": "sex", "levels": levels}]},
            "paired": _paired_section(s),
        }
        cells = {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
        out.append(SiteTable(s.site_id, 0.5, cells, (), flow, {"min_cell_size": 1, "allow_zero": True}, extra))
    return out


TABLES = _tables()
IDS = [t.site_id for t in TABLES]


@pytest.fixture(scope="module")
def result() -> dict:
    found = analyze_tables(
        "study", TABLES, covariates={s: {"setting": "clinic" if i % 2 else "community"} for i, s in enumerate(IDS)}
    )
    json.dumps(found, allow_nan=False)
    return found


def test_agreement_is_pooled_per_pair(result: dict) -> None:
    for pair in ("model_reference", "model_reference2", "reference_reference2"):
        pairs = [t.extra["agreement"]["tables"][0]["pairs"][pair] for t in TABLES]
        kappa = pool_kappa(IDS, [p["kappa"] for p in pairs], [p["kappa_se"] for p in pairs])
        assert result["agreement"][pair]["kappa"]["estimate"] == kappa.estimate
        discordant = [p["cells"]["10"] + p["cells"]["01"] for p in pairs]
        totals = [sum(p["cells"].values()) for p in pairs]
        share = pool_proportion(IDS, discordant, totals)
        assert result["agreement"][pair]["discordance"]["estimate"] == share.estimate
    # The second rating flips 10% of the reference verdicts: their pooled discordance is near 0.10.
    assert abs(result["agreement"]["reference_reference2"]["discordance"]["estimate"] - 0.10) < 0.04


def test_margin_error_rate_is_pooled_band_by_band(result: dict) -> None:
    bands = result["margin"]["bands"]
    assert len(bands) == 6
    near = next(b for b in bands if b["screen"] == "screen-negative" and b["distance_from"] == 0.0)
    rows = [t.extra["margin"][0]["called_negative"][0] for t in TABLES]
    reference = pool_proportion(IDS, [r["wrong"] for r in rows], [r["wrong"] + r["correct"] for r in rows])
    assert near["error_rate"]["estimate"] == reference.estimate
    assert near["band"] == "error rate, screen-negative, score 0 to 0.1 from the threshold"


def test_likelihood_ratios_come_from_the_headline_bivariate_model(result: dict) -> None:
    fit = result["pooled"][result["likelihood_ratios"]["from_model"]]
    s1, s2, c = fit["se_logit_sensitivity"], fit["se_logit_fpr"], fit["covariance_of_means"]
    reference = summary_ratios([fit["mean_logit_sensitivity"], fit["mean_logit_fpr"]], [[s1 * s1, c], [c, s2 * s2]])
    assert result["likelihood_ratios"]["diagnostic_odds_ratio"] == reference.diagnostic_odds_ratio.to_dict()


def test_no_pooled_ratio_where_the_headline_is_not_estimable() -> None:
    # Found by following the coordinator's guide: with three sites the headline said "not estimable" (it needs
    # four: federation/stats/headline.py) while LR+, LR- and DOR came from a bivariate fit of two complete tables.
    found = analyze_tables("study", TABLES[:3])
    assert found["pooled"]["sensitivity"] is None
    assert found["likelihood_ratios"] == {"status": "not estimated", "reason": found["pooled"]["note"]}
    assert "needs at least 4" in found["pooled"]["note"]


def test_deeks_influence_and_contrasts_are_the_stats_functions(result: dict) -> None:
    deeks = deeks_funnel_test(IDS, *([t.cells[c] for t in TABLES] for c in ("tp", "fp", "fn", "tn")))
    assert result["small_site_effects"]["test"] == deeks.test
    assert [r["site_id"] for r in result["influence"]["omitted"]] == IDS
    influence = headline_leave_one_site_out([t.released_table() for t in TABLES]).to_dict()
    assert result["influence"]["omitted"] == influence["omitted"] and "headline model" in result["influence"]["note"]
    ids, levels, events, totals = [], [], [], []
    for t in TABLES:
        for level in t.extra["subgroups"]["variables"][0]["levels"]:
            cells = level["confusion"][0]["cells"]
            ids.append(t.site_id)
            levels.append(level["level"])
            events.append(cells["tp"])
            totals.append(cells["tp"] + cells["fn"])
    (contrast,) = within_site_contrasts(ids, levels, events, totals, measure="sensitivity")
    assert result["subgroup_contrasts"]["sex"]["sensitivity"][0] == contrast.to_dict()


def test_meta_regression_on_release_and_coordinator_covariates(result: dict) -> None:
    regression = result["meta_regression"]
    assert {"prevalence", "log participants", "share sex = male", "setting"} <= set(regression)
    assert regression["setting"]["source"] == "coordinator" and regression["prevalence"]["source"] == "release"
    assert regression["setting"]["covariates"] == ["setting = community (vs clinic)"]
    y, v, x = [], [], []
    for t in TABLES:
        tp, fp, fn, tn = (t.cells[c] for c in ("tp", "fp", "fn", "tn"))
        y.append([math.log(tp / fn), math.log(fp / tn)])
        v.append([1 / tp + 1 / fn, 1 / fp + 1 / tn])
        x.append(t.flow["analysed_positive"] / t.flow["analysed"])
    reference = bivariate_meta_regression(np.array(y), np.array(v), np.array(x), ["prevalence"], IDS)
    assert regression["prevalence"]["effects"][0]["covariate_test"] == reference.effects[0].covariate_test
    # beside the Wald test, the likelihood-ratio test of the headline model (tests/stats/test_headline_regression.py)
    likelihood_ratio = headline_covariate_test([t.released_table() for t in TABLES], np.array(x), ["prevalence"])
    assert regression["prevalence"]["likelihood_ratio_test"] == likelihood_ratio.to_dict()
    assert "exploratory" in regression["prevalence"]["caution"]


def test_terminal_lines_show_each_pooled_result(result: dict) -> None:
    text = "\n".join(summary_lines(result))
    assert "Agreement, screen vs reference standard: pooled kappa" in text
    assert "Paired comparison, difference in sensitivity (model minus comparison):" in text
    assert "Small-site effects (Deeks' test): slope" in text
    assert "Leave-one-site-out refits of the headline model: largest change without" in text
    assert "difference between subgroups: t(4) =" in text
    assert "Meta-regression on setting = community (vs clinic)" in text
    assert "Likelihood-ratio test of setting in the headline model over" in text


def test_covariates_file_is_read_and_bad_ones_named(tmp_path: Path) -> None:
    good = tmp_path / "covariates.csv"
    good.write_text("site_id,setting,mean_age\nsite-1,clinic,41.5\nsite-2,community,\n")
    assert read_covariates(good) == {
        "site-1": {"setting": "clinic", "mean_age": 41.5},
        "site-2": {"setting": "community"},
    }
    for text, message in (
        ("site,setting\na,b\n", "the header needs a site_id column"),
        ("site_id\na\n", "no covariate columns besides site_id"),
        ("site_id,x\na,1\na,2\n", "row 3: site 'a' appears twice"),
        ("site_id,x\n,1\n", "row 2: site_id is empty"),
    ):
        bad = tmp_path / "bad.csv"
        bad.write_text(text)
        with pytest.raises(CovariateError, match=message):
            read_covariates(bad)


def test_a_bad_covariates_file_is_one_line_and_exit_1(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    from federation.cli import main as federation

    bad = tmp_path / "covariates.csv"
    bad.write_text("site,setting\nsite-1,clinic\n")
    for command in (["analyze"], ["report", "--out", str(tmp_path / "r.html")]):
        assert federation([*command, "--store", str(tmp_path / "study.db"), "--covariates", str(bad)]) == 1
        err = capsys.readouterr().err.strip().splitlines()
        assert err == [f"federation: error: {bad}: the header needs a site_id column"]
    assert not (tmp_path / "r.html").exists()


def test_report_shows_the_paired_comparison_as_computed(result: dict) -> None:
    from federation.report.further import further_paragraph

    html = further_paragraph(result, "paired")
    difference = result["paired"]["sensitivity_difference"]
    assert (
        f"Difference in sensitivity, model minus comparison, pooled across sites: {difference['estimate']:.3f}" in html
    )
    assert f"{difference['ci_low']:.3f} to {difference['ci_high']:.3f}" in html
    assert "not pooled" not in html
