"""The report shows every pooled result beyond the headline, in words, with the numbers `analyze --json` holds.

Uses the extended study (ROC, calibration, margin, subgroups by sex, agreement at one site) of studies.py.
"""

from __future__ import annotations

import html
import re
from pathlib import Path

from .studies import analyze_json


def _text(page: str, anchor: str) -> str:
    section = page.split(f'<section id="{anchor}">', 1)[1].split("</section>", 1)[0]
    return html.unescape(re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", section)))


def test_further_sections_state_the_pooled_numbers(extended_store: Path, extended_report) -> None:
    out, summary = extended_report
    page = out.read_text()
    analysis = analyze_json(extended_store)
    for anchor in (
        "analysis-likelihood_ratios",
        "analysis-small_site_effects",
        "analysis-influence",
        "analysis-subgroup_contrasts",
        "analysis-meta_regression",
    ):
        assert anchor in summary["sections"]
    ratios = analysis["likelihood_ratios"]["diagnostic_odds_ratio"]
    assert f"Diagnostic odds ratio {ratios['estimate']:.1f} (95% CI {ratios['ci_low']:.1f}" in _text(
        page, "analysis-likelihood_ratios"
    )
    test = analysis["small_site_effects"]["test"]
    assert f"t({test['df']}) = {test['statistic']:.2f}, p = {test['p']:.3g}" in _text(
        page, "analysis-small_site_effects"
    )
    contrast = analysis["subgroup_contrasts"]["sex"]["sensitivity"][0]
    assert contrast["sentence"] in _text(page, "analysis-subgroup_contrasts")
    roc = _text(page, "analysis-roc")
    auc = analysis["discrimination"]["summary_roc"]["area_under_curve"]
    assert "over false-positive rates 0 to 1" in roc and f"{auc:.3f}" in roc
    assert "summary ROC (multiple-threshold model)" in page  # the curve's label in the ROC figure
    # Only one site has a second reference standard: its kappa is shown per site, the pool says why not.
    assert "not estimable" in _text(page, "analysis-agreement")
