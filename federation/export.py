"""Tidy tables a coordinator can take away: CSV for a statistics package or a paper's tables, plus the JSON.

``federation export --store study.db --out-dir DIR`` writes, for one study:

- one CSV per table in :data:`TABLES` (one row per site and analysis level; pooled results in rows whose
  ``site_id`` is ``pooled``), each with a header row, UTF-8, comma-separated;
- ``codebook.csv``: every file's columns and what they mean;
- ``analysis.json``: the full analysis, as ``federation analyze --json`` prints it;
- ``decisions.json`` and, when the sites released the 2×2 at two or more thresholds, ``threshold_accuracy``,
  ``threshold_choice``, ``net_benefit_sites`` and ``net_benefit_pooled`` (:mod:`federation.decisions`);
- ``releases.json``: every stored release the analysis rests on (signed, as the sites sent them).

Conventions: a count a site withheld is ``NA`` (never a word in a number column); a quantity that is not
defined is ``NA`` too, and the ``withheld`` column of a row names which of its counts the site withheld.
Numbers are written in full precision; band edges as the coordinator wrote them. pandas reads every file
with ``pd.read_csv(path)`` (``NA`` is read as missing), R with ``read.csv(path)``.

Adding a table: write a function ``(context) -> iterable of row dicts`` and register it with
:func:`tidy_table` (name, one-line title, and each column's meaning). Every registered table is written,
and listed in the codebook; a table with no rows for a study is not written.
"""

from __future__ import annotations

import csv
import io
import json
import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from federation.protocol.cli_support import write_atomic
from federation.protocol.documents import calibration_intercept

from .analysis import analyze, enrolled_without_release, release_sections
from .decisions import DECISION_TABLES, DecisionSettings, decision_analysis, decision_rows
from .labels import level_label
from .store import Store

__all__ = ["ExportContext", "ExportResult", "TABLES", "TidyTable", "export_study", "tidy_table"]

NA = "NA"
POOLED = "pooled"


@dataclass(frozen=True)
class ExportContext:
    """What a table writer reads: the analysis (``federation analyze --json``) and each site's release
    sections (``roc``, ``calibration``, ``margin``, ``agreement``, ``paired``, ``subgroups``, ...)."""

    study_id: str
    analysis: dict[str, Any]
    sections: Mapping[str, Mapping[str, Any]]
    integer_variables: frozenset[str] = frozenset()


@dataclass(frozen=True)
class TidyTable:
    name: str  # file name without ".csv"
    title: str
    columns: tuple[tuple[str, str], ...]  # (column, meaning), in file order
    rows: Callable[[ExportContext], Iterable[Mapping[str, Any]]]


TABLES: dict[str, TidyTable] = {}


def tidy_table(
    name: str, title: str, columns: Iterable[tuple[str, str]]
) -> Callable[[Callable[[ExportContext], Iterable[Mapping[str, Any]]]], Callable[..., Any]]:
    """Register a table writer under ``name`` (see the module docstring)."""

    def register(function: Callable[[ExportContext], Iterable[Mapping[str, Any]]]) -> Callable[..., Any]:
        if name in TABLES:
            raise ValueError(f"export table {name!r} is registered twice")
        TABLES[name] = TidyTable(name, title, tuple(columns), function)
        return function

    return register


@dataclass(frozen=True)
class ExportResult:
    study_id: str
    out_dir: Path
    files: tuple[str, ...]
    enrolled_without_release: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "study_id": self.study_id,
            "out_dir": str(self.out_dir),
            "files": list(self.files),
            "enrolled_without_release": list(self.enrolled_without_release),
        }


# --- helpers ------------------------------------------------------------------------------------------


def _cell(value: Any) -> str:
    """A CSV cell: NA for a missing or withheld value, numbers in full precision, text as it is."""
    if value is None:
        return NA
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return NA
        return str(int(value)) if value.is_integer() and abs(value) < 1e15 else repr(value)
    return str(value)


def _count(value: Any) -> int | None:
    return value if isinstance(value, int) and not isinstance(value, bool) and value >= 0 else None


def _number(value: Any) -> float | None:
    if isinstance(value, bool) or not isinstance(value, int | float) or not math.isfinite(value):
        return None
    return float(value)


def _interval(prefix: str, value: Any) -> dict[str, float | None]:
    value = value if isinstance(value, dict) else {}
    return {
        prefix: _number(value.get("estimate")),
        f"{prefix}_ci_low": _number(value.get("ci_low")),
        f"{prefix}_ci_high": _number(value.get("ci_high")),
    }


def _withheld(names: Iterable[str]) -> str:
    return ";".join(names)


def _edge(value: Any) -> float | None:
    number = _number(value)
    return None if number is None else float(f"{number:.12g}")


def _csv_text(table: TidyTable, rows: list[Mapping[str, Any]]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    names = [name for name, _ in table.columns]
    writer.writerow(names)
    for row in rows:
        writer.writerow([_cell(row.get(name)) for name in names])
    return buffer.getvalue()


# --- the tables -------------------------------------------------------------------------------------------

_SITE = ("site_id", "the site, or 'pooled' for a result pooled across sites")


@tidy_table(
    "flow",
    "Participant flow at each site",
    (
        _SITE,
        ("read", "records read"),
        ("excluded_total", "records excluded, all reasons (NA when a reason's count was withheld)"),
        ("excluded_duplicate_id", "excluded: a repeated participant id"),
        ("excluded_missing_outcome", "excluded: no reference-standard result"),
        ("excluded_missing_feature", "excluded: a required model input missing"),
        ("excluded_out_of_range", "excluded: a model input outside its allowed range"),
        ("excluded_unknown_category", "excluded: a category the mapping does not know"),
        ("analysed", "records analysed"),
        ("analysed_with_condition", "analysed, with the condition (reference standard positive)"),
        ("analysed_without_condition", "analysed, without the condition"),
        ("withheld", "names of this row's counts the site withheld, ';'-separated"),
    ),
)
def _flow(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site in context.analysis["sites"]:
        flow = site.get("flow") if isinstance(site.get("flow"), dict) else {}
        excluded = flow.get("excluded") if isinstance(flow.get("excluded"), dict) else {}
        values = {f"excluded_{reason}": _count(n) for reason, n in excluded.items()}
        total = None if any(v is None for v in values.values()) else sum(v for v in values.values() if v is not None)
        withheld = [
            name for name in ("read", "analysed", "analysed_positive", "analysed_negative") if flow.get(name) is None
        ]
        withheld += [f"excluded.{reason}" for reason, n in excluded.items() if n is None]
        yield {
            "site_id": site["site_id"],
            "read": _count(flow.get("read")),
            "excluded_total": total,
            **values,
            "analysed": _count(flow.get("analysed")),
            "analysed_with_condition": _count(flow.get("analysed_positive")),
            "analysed_without_condition": _count(flow.get("analysed_negative")),
            "withheld": _withheld(withheld),
        }


@tidy_table(
    "accuracy",
    "The 2x2 table at the model's threshold, per site, and the pooled sensitivity and specificity",
    (
        _SITE,
        ("model", "for pooled rows: the pooling model; empty for a site"),
        ("threshold", "screen-positive when score >= threshold"),
        ("tp", "true positives: screen-positive, with the condition"),
        ("fp", "false positives: screen-positive, without the condition"),
        ("fn", "false negatives: screen-negative, with the condition"),
        ("tn", "true negatives: screen-negative, without the condition"),
        ("sensitivity", "TP / (TP + FN)"),
        ("sensitivity_ci_low", "95% interval (Wilson for a site; the model's for pooled rows)"),
        ("sensitivity_ci_high", "95% interval, upper end"),
        ("specificity", "TN / (TN + FP)"),
        ("specificity_ci_low", "95% interval, lower end"),
        ("specificity_ci_high", "95% interval, upper end"),
        ("ppv", "positive predictive value at the site's prevalence"),
        ("npv", "negative predictive value at the site's prevalence"),
        ("likelihood_ratio_positive", "sensitivity / (1 - specificity)"),
        ("likelihood_ratio_negative", "(1 - sensitivity) / specificity"),
        ("diagnostic_odds_ratio", "(TP x TN) / (FP x FN)"),
        ("sites_pooled", "for pooled rows: how many sites the model pooled"),
        ("withheld", "names of this row's cells the site withheld, ';'-separated"),
    ),
)
def _accuracy(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site in context.analysis["sites"]:

        def estimate(key: str, site: dict[str, Any] = site) -> float | None:
            value = site.get(key)
            return _number(value.get("estimate")) if isinstance(value, dict) else _number(value)

        yield {
            "site_id": site["site_id"],
            "model": "",
            "threshold": _number(site.get("threshold")),
            **{c: _count(site.get(c)) for c in ("tp", "fp", "fn", "tn")},
            **_interval("sensitivity", site.get("sensitivity")),
            **_interval("specificity", site.get("specificity")),
            **{
                key: estimate(key)
                for key in (
                    "ppv",
                    "npv",
                    "likelihood_ratio_positive",
                    "likelihood_ratio_negative",
                    "diagnostic_odds_ratio",
                )
            },
            "withheld": _withheld(c for c in ("tp", "fp", "fn", "tn") if site.get(c) is None),
        }
    pooled = context.analysis.get("pooled", {})
    models = [("univariate DerSimonian-Laird", pooled)]
    models += [(key.replace("_", " "), value) for key, value in pooled.items() if key.startswith("bivariate")]
    for name, value in models:
        if not isinstance(value, dict) or not isinstance(value.get("sensitivity"), dict):
            continue
        yield {
            "site_id": POOLED,
            "model": name,
            **_interval("sensitivity", value.get("sensitivity")),
            **_interval("specificity", value.get("specificity")),
            "sites_pooled": len(value.get("sites_pooled", [])) if isinstance(value.get("sites_pooled"), list) else None,
        }


_BAND_COLUMNS = (
    ("score_low", "band's lower score edge (inclusive); NA = open"),
    ("score_high", "band's upper score edge (exclusive); NA = open"),
)


@tidy_table(
    "roc_bands",
    "Participants with and without the condition per score band, per site (the ROC's data)",
    (
        _SITE,
        *_BAND_COLUMNS,
        ("with_condition", "participants with the condition whose score lies in the band"),
        ("without_condition", "participants without the condition whose score lies in the band"),
        ("withheld", "names of this row's counts the site withheld"),
    ),
)
def _roc_bands(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        roc = sections.get("roc")
        bands = roc.get("bands") if isinstance(roc, dict) else None
        for band in bands if isinstance(bands, list) else []:
            if not isinstance(band, dict):
                continue
            positive, negative = _count(band.get("positive")), _count(band.get("negative"))
            yield {
                "site_id": site_id,
                "score_low": _edge(band.get("low")),
                "score_high": _edge(band.get("high")),
                "with_condition": positive,
                "without_condition": negative,
                "withheld": _withheld(
                    n for n, v in (("with_condition", positive), ("without_condition", negative)) if v is None
                ),
            }


_POOLED_COLUMNS = (
    ("estimate", "the estimate"),
    ("ci_low", "95% confidence interval, lower end"),
    ("ci_high", "95% confidence interval, upper end"),
    ("se", "standard error (on the scale of the site's estimate)"),
)


@tidy_table(
    "discrimination",
    "AUC per site (computed at the site, DeLong SE) and pooled (random effects on the logit scale)",
    (
        _SITE,
        ("auc", "area under the ROC curve"),
        ("auc_se", "DeLong (1988) standard error"),
        ("auc_ci_low", "95% interval (pooled rows)"),
        ("auc_ci_high", "95% interval (pooled rows)"),
        ("pi_low", "95% prediction interval (pooled rows)"),
        ("pi_high", "95% prediction interval (pooled rows)"),
        ("sites_pooled", "pooled rows: how many sites"),
    ),
)
def _discrimination(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        roc = sections.get("roc")
        if isinstance(roc, dict):
            yield {"site_id": site_id, "auc": _number(roc.get("auc")), "auc_se": _number(roc.get("auc_se"))}
    pooled = context.analysis.get("discrimination")
    if isinstance(pooled, dict) and isinstance(pooled.get("pooled_auc"), dict):
        value = pooled["pooled_auc"]
        yield {
            "site_id": POOLED,
            "auc": _number(value.get("estimate")),
            "auc_ci_low": _number(value.get("ci_low")),
            "auc_ci_high": _number(value.get("ci_high")),
            "pi_low": _number(value.get("pi_low")),
            "pi_high": _number(value.get("pi_high")),
            "sites_pooled": len(value.get("sites_pooled", [])) if isinstance(value.get("sites_pooled"), list) else None,
        }


@tidy_table(
    "calibration",
    "Calibration per site and pooled: observed and expected events, O:E, calibration intercept and slope",
    (
        _SITE,
        ("observed", "events observed (participants with the condition)"),
        ("expected", "events expected: the sum of predicted risks"),
        ("observed_expected_ratio", "O:E"),
        ("calibration_intercept", "calibration intercept (logistic intercept with logit risk as offset)"),
        ("calibration_intercept_se", "its standard error"),
        ("slope", "calibration slope (logistic coefficient of logit risk)"),
        ("slope_se", "its standard error"),
        ("quantity", "pooled rows: which quantity the estimate is"),
        *_POOLED_COLUMNS[:3],
        ("sites_pooled", "pooled rows: how many sites"),
    ),
)
def _calibration(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        c = sections.get("calibration")
        if isinstance(c, dict):
            yield {
                "site_id": site_id,
                "observed": _count(c.get("observed")),
                **{k: _number(c.get(k)) for k in ("expected", "observed_expected_ratio")},
                "calibration_intercept": _number(calibration_intercept(c)),
                "calibration_intercept_se": _number(calibration_intercept(c, "_se")),
                **{k: _number(c.get(k)) for k in ("slope", "slope_se")},
            }
    pooled = context.analysis.get("calibration")
    if isinstance(pooled, dict):
        for key, value in pooled.items():
            if isinstance(value, dict):
                yield {
                    "site_id": POOLED,
                    "quantity": key,
                    **{k: _number(value.get(k)) for k in ("estimate", "ci_low", "ci_high")},
                    "sites_pooled": len(value["sites_pooled"]) if isinstance(value.get("sites_pooled"), list) else None,
                }


@tidy_table(
    "subgroups",
    "The 2x2 table and AUC within each level of each subgroup variable, per site",
    (
        _SITE,
        ("variable", "the subgroup variable (a model input)"),
        ("level", "the level: a category, or a band such as '36-47 months'"),
        ("band_low", "numeric level: lower edge (inclusive) as the coordinator wrote it; NA = open or a category"),
        ("band_high", "numeric level: upper edge (exclusive); NA = open or a category"),
        ("analysed_with_condition", "participants with the condition in the level"),
        ("analysed_without_condition", "participants without the condition in the level"),
        ("threshold", "screen-positive when score >= threshold"),
        ("tp", "true positives"),
        ("fp", "false positives"),
        ("fn", "false negatives"),
        ("tn", "true negatives"),
        ("auc", "AUC within the level (computed at the site)"),
        ("auc_se", "its DeLong standard error"),
        ("withheld", "names of this row's counts the site withheld"),
    ),
)
def _subgroups(context: ExportContext) -> Iterable[dict[str, Any]]:
    for site_id, sections in context.sections.items():
        section = sections.get("subgroups")
        variables = section.get("variables") if isinstance(section, dict) else None
        for variable in variables if isinstance(variables, list) else []:
            if not isinstance(variable, dict) or not isinstance(variable.get("levels"), list):
                continue
            name = str(variable.get("variable"))
            for level in variable["levels"]:
                if not isinstance(level, dict):
                    continue
                raw = level.get("level")
                band = raw if isinstance(raw, dict) else {}
                tables = level.get("confusion") if isinstance(level.get("confusion"), list) else []
                first = tables[0] if tables and isinstance(tables[0], dict) else {}
                cells = first.get("cells") if isinstance(first.get("cells"), dict) else {}
                roc = level.get("roc") if isinstance(level.get("roc"), dict) else {}
                counts = {
                    "analysed_with_condition": _count(level.get("analysed_positive")),
                    "analysed_without_condition": _count(level.get("analysed_negative")),
                    **{c: _count(cells.get(c)) for c in ("tp", "fp", "fn", "tn")},
                }
                yield {
                    "site_id": site_id,
                    "variable": name,
                    "level": level_label(name, raw, name in context.integer_variables),
                    "band_low": _edge(band.get("low")),
                    "band_high": _edge(band.get("high")),
                    "threshold": _number(first.get("threshold")),
                    **counts,
                    "auc": _number(roc.get("auc")),
                    "auc_se": _number(roc.get("auc_se")),
                    "withheld": _withheld(k for k, v in counts.items() if v is None),
                }


@tidy_table(
    "subgroups_pooled",
    "Pooled estimates within each subgroup level (random effects) and the test of subgroup difference",
    (
        ("variable", "the subgroup variable"),
        ("measure", "sensitivity, specificity or auc"),
        ("level", "the level"),
        *_POOLED_COLUMNS[:3],
        ("sites_pooled", "how many sites the level pooled"),
        ("difference_p", "p value of the test of subgroup difference (same for every level of the measure)"),
        ("note", "why a level was not pooled"),
    ),
)
def _subgroups_pooled(context: ExportContext) -> Iterable[dict[str, Any]]:
    subgroups = context.analysis.get("subgroups")
    if not isinstance(subgroups, dict):
        return
    back = {"logit": lambda v: 1 / (1 + math.exp(-v)), "log": math.exp}
    for variable, measures in subgroups.items():
        for measure, entry in measures.items() if isinstance(measures, dict) else []:
            if not isinstance(entry, dict):
                continue
            transform = back.get(str(entry.get("scale")), lambda v: v)
            between = entry.get("between_subgroups")
            difference = between if isinstance(between, dict) else {}
            for level in entry.get("subgroups") or []:
                if not isinstance(level, dict):
                    continue
                pooled = level.get("pooled") if isinstance(level.get("pooled"), dict) else {}
                values = {k: _number(pooled.get(k)) for k in ("estimate", "ci_low", "ci_high")}
                yield {
                    "variable": variable,
                    "measure": measure,
                    "level": level.get("subgroup"),
                    **{k: None if v is None else transform(v) for k, v in values.items()},
                    "sites_pooled": len(level.get("sites", [])) if isinstance(level.get("sites"), list) else None,
                    "difference_p": _number(difference.get("p")),
                    "note": level.get("reason") or "",
                }


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


def _pooled_results(
    value: Any, path: tuple[str, ...], parent: dict[str, Any] | None = None
) -> Iterable[tuple[tuple[str, ...], dict[str, Any], dict[str, Any]]]:
    """Every pooled result under ``value`` (a dict with an estimate, or one that says it was not estimated),
    with the dict holding it (where a model keeps its heterogeneity and sites beside the estimates)."""
    if not isinstance(value, dict) or len(path) > 4:
        return
    if "estimate" in value and _number(value.get("estimate")) is not None and "ci_low" in value:
        yield path, value, parent or {}
        return
    if value.get("status") == "not estimated":
        yield path, value, parent or {}
        return
    for key, inner in value.items():
        if key in ("pooled", "sites_pooled", "sites_not_pooled", "sites"):
            continue
        yield from _pooled_results(inner, (*path, str(key)), value)


@tidy_table(
    "pooled",
    "Every pooled estimate of the analysis, one row each (the results of any analysis the coordinator pooled)",
    (
        ("analysis", "the analysis the result belongs to"),
        ("quantity", "dotted path of the result in analysis.json"),
        ("scale", "the scale the estimate is on (as the analysis reports it)"),
        *_POOLED_COLUMNS[:3],
        ("pi_low", "95% prediction interval, lower end"),
        ("pi_high", "95% prediction interval, upper end"),
        ("tau2", "between-site variance (on the pooling scale)"),
        ("i2", "I-squared, share of variation due to heterogeneity (0-1)"),
        ("sites_pooled", "how many sites were pooled"),
        ("note", "why a result was not estimated"),
    ),
)
def _pooled(context: ExportContext) -> Iterable[dict[str, Any]]:
    analysis = context.analysis
    holders = [("primary", analysis.get("pooled", {}))]
    holders += [(key, value) for key, value in analysis.items() if key not in ("study_id", "sites", "pooled")]
    for name, holder in holders:
        for path, value, parent in _pooled_results(holder, ()):
            inner = value.get("pooled") if isinstance(value.get("pooled"), dict) else value
            tau2, i2 = _number(inner.get("tau2")), _number(inner.get("i2"))
            measure = path[-1] if path else ""
            if tau2 is None and measure in ("sensitivity", "specificity"):  # the model keeps them beside
                tau2 = _number(parent.get(f"tau2_logit_{measure}"))
                i2 = _number(parent.get(f"i2_logit_{measure}"))
            if name == "primary" and len(path) == 1:
                path = ("univariate", *path)
            sites = value.get("sites_pooled", parent.get("sites_pooled"))
            yield {
                "analysis": name,
                "quantity": ".".join(path),
                "scale": value.get("scale", ""),
                **{k: _number(value.get(k)) for k in ("estimate", "ci_low", "ci_high", "pi_low", "pi_high")},
                "tau2": tau2,
                "i2": i2,
                "sites_pooled": len(sites) if isinstance(sites, list) else None,
                "note": value.get("reason", "") if value.get("status") == "not estimated" else "",
            }


# --- writing -----------------------------------------------------------------------------------------------


def _codebook(written: list[TidyTable]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["file", "column", "meaning"])
    for table in written:
        writer.writerow([f"{table.name}.csv", "", table.title])
        for column, meaning in table.columns:
            writer.writerow([f"{table.name}.csv", column, meaning])
    return buffer.getvalue()


def _decision_tables(store: Store, study: str, settings: DecisionSettings | None) -> tuple[dict[str, Any], list]:
    """Threshold choice and net benefit (:mod:`federation.decisions`): the result and its tidy tables."""
    settings = settings or DecisionSettings()
    result = decision_analysis(
        store.releases(study),
        store.score_kind(study),
        target_sensitivity=settings.target_sensitivity,
        bootstrap=settings.bootstrap,
        range_low=settings.range_low,
        range_high=settings.range_high,
    )
    tables = []
    if result["thresholds"]:
        for name, rows in decision_rows(result).items():
            title, columns = DECISION_TABLES[name]
            if rows:
                tables.append((TidyTable(name, title, columns, lambda _context, rows=rows: rows), rows))
    return result, tables


def export_study(
    store: Store,
    out_dir: Path,
    study_id: str | None = None,
    analysis: dict[str, Any] | None = None,
    decisions: DecisionSettings | None = None,
) -> ExportResult:
    """Write the study's tidy tables, codebook and JSON into ``out_dir`` (see the module docstring).

    ``analysis``: the study's analysis when the caller already has it (``analyze(store, study_id)``);
    ``decisions``: the coordinator's settings for threshold choice and net benefit (``decisions.json`` and
    the ``threshold_*`` and ``net_benefit_*`` tables, when the sites released the 2×2 at several thresholds).
    """
    analysis = analysis if analysis is not None else analyze(store, study_id)
    study = analysis["study_id"]
    context = ExportContext(study, analysis, release_sections(store, study), store.integer_features(study))
    out_dir = Path(out_dir)
    written: list[TidyTable] = []
    files: list[str] = []
    tables = [(table, list(table.rows(context))) for table in TABLES.values()]
    choice, decision_tables = _decision_tables(store, study, decisions)
    for table, rows in [*tables, *decision_tables]:
        if not rows:
            continue
        write_atomic(out_dir / f"{table.name}.csv", _csv_text(table, rows).encode("utf-8"))
        written.append(table)
        files.append(f"{table.name}.csv")
    write_atomic(out_dir / "codebook.csv", _codebook(written).encode("utf-8"))
    write_atomic(out_dir / "decisions.json", (json.dumps(choice, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    write_atomic(out_dir / "analysis.json", (json.dumps(analysis, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    releases = [stored.release.body() | {"signature": stored.release.signature} for stored in store.releases(study)]
    write_atomic(out_dir / "releases.json", (json.dumps(releases, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    files += ["codebook.csv", "analysis.json", "decisions.json", "releases.json"]
    return ExportResult(study, out_dir, tuple(files), tuple(enrolled_without_release(store, study)))
