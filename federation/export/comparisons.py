"""Tables that set the model's calls against something else: the distance from the threshold (margin),
a second reference standard or rater (agreement), a second model (paired).
"""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _number

from .registry import _BAND_COLUMNS, _SITE, ExportContext, _edge, _withheld, tidy_table


@tidy_table(
    "margin",
    "Correct and wrong calls by distance of the score from the threshold, per site",
    (
        _SITE,
        ("threshold", "the threshold"),
        ("side", "called_positive (score >= threshold) or called_negative"),
        ("distance_from", "band's distance from the threshold, nearer end"),
        ("distance_to", "band's distance from the threshold, farther end; NA = open"),
        *_BAND_COLUMNS,
        ("correct", "correct calls in the band"),
        ("wrong", "wrong calls in the band (false positives above, false negatives below)"),
        ("withheld", "names of this row's counts the site withheld"),
    ),
)
def _margin(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        tables = sections.get("margin")
        for table in tables if isinstance(tables, list) else []:
            if not isinstance(table, dict):
                continue
            for side in ("called_positive", "called_negative"):
                for band in table.get(side) or []:
                    if not isinstance(band, dict):
                        continue
                    correct, wrong = _count(band.get("correct")), _count(band.get("wrong"))
                    yield {
                        "site_id": site_id,
                        "threshold": _number(table.get("threshold")),
                        "side": side,
                        "distance_from": _edge(band.get("distance_from")),
                        "distance_to": _edge(band.get("distance_to")),
                        "score_low": _edge(band.get("score_low")),
                        "score_high": _edge(band.get("score_high")),
                        "correct": correct,
                        "wrong": wrong,
                        "withheld": _withheld(n for n, v in (("correct", correct), ("wrong", wrong)) if v is None),
                    }


_PAIR_NAMES = {
    "model_reference": ("model", "reference standard"),
    "model_reference2": ("model", "second reference standard"),
    "reference_reference2": ("reference standard", "second reference standard"),
}


@tidy_table(
    "agreement",
    "Agreement per site: each pair's 2x2 among participants with both verdicts, and Cohen's kappa",
    (
        _SITE,
        ("threshold", "the model's threshold"),
        ("pair", "model_reference, model_reference2 or reference_reference2"),
        ("first", "the pair's first rater"),
        ("second", "the pair's second rater"),
        ("both_positive", "both positive"),
        ("first_only", "first positive, second negative"),
        ("second_only", "first negative, second positive"),
        ("both_negative", "both negative"),
        ("kappa", "Cohen's kappa"),
        ("kappa_se", "large-sample SE (Fleiss, Cohen & Everitt 1969)"),
        ("observed_agreement", "share of participants on whom the two agree"),
        ("withheld", "names of this row's counts the site withheld"),
    ),
)
def _agreement(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        section = sections.get("agreement")
        if not isinstance(section, dict) or not section.get("available"):
            continue
        for table in section.get("tables") or []:
            pairs = table.get("pairs") if isinstance(table, dict) and isinstance(table.get("pairs"), dict) else {}
            for pair, value in pairs.items():
                if not isinstance(value, dict):
                    continue
                cells = value.get("cells") if isinstance(value.get("cells"), dict) else {}
                counts = {
                    "both_positive": _count(cells.get("11")),
                    "first_only": _count(cells.get("10")),
                    "second_only": _count(cells.get("01")),
                    "both_negative": _count(cells.get("00")),
                }
                first, second = _PAIR_NAMES.get(pair, ("", ""))
                yield {
                    "site_id": site_id,
                    "threshold": _number(table.get("threshold")),
                    "pair": pair,
                    "first": first,
                    "second": second,
                    **counts,
                    "kappa": _number(value.get("kappa")),
                    "kappa_se": _number(value.get("kappa_se")),
                    "observed_agreement": _number(value.get("observed_agreement")),
                    "withheld": _withheld(k for k, v in counts.items() if v is None),
                }


@tidy_table(
    "paired",
    "Paired comparison per site: both models' calls among participants with and without the condition, AUCs",
    (
        _SITE,
        ("group", "with_condition or without_condition"),
        ("both_positive", "both models call screen-positive"),
        ("model_only", "only the requested model calls positive"),
        ("comparison_only", "only the comparison model calls positive"),
        ("both_negative", "both call screen-negative"),
        ("auc_model", "AUC of the requested model"),
        ("auc_comparison", "AUC of the comparison model"),
        ("auc_difference", "model minus comparison"),
        ("auc_difference_se", "paired DeLong standard error"),
        ("withheld", "names of this row's counts the site withheld"),
    ),
)
def _paired(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        p = sections.get("paired")
        if not isinstance(p, dict):
            continue
        for key, group in (("diseased", "with_condition"), ("non_diseased", "without_condition")):
            cells = p.get(key) if isinstance(p.get(key), dict) else {}
            counts = {
                "both_positive": _count(cells.get("model1_compare1")),
                "model_only": _count(cells.get("model1_compare0")),
                "comparison_only": _count(cells.get("model0_compare1")),
                "both_negative": _count(cells.get("model0_compare0")),
            }
            yield {
                "site_id": site_id,
                "group": group,
                **counts,
                "auc_model": _number(p.get("auc_model")),
                "auc_comparison": _number(p.get("auc_compare")),
                "auc_difference": _number(p.get("auc_difference")),
                "auc_difference_se": _number(p.get("auc_difference_se")),
                "withheld": _withheld(k for k, v in counts.items() if v is None),
            }
