"""Tables of the primary analyses: participant flow, the 2x2 and pooled accuracy, score bands, AUC, calibration."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from federation.protocol.documents import calibration_intercept
from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _number

from .registry import (
    _BAND_COLUMNS,
    _POOLED_COLUMNS,
    _SITE,
    HEADLINE,
    POOLED,
    ExportContext,
    _edge,
    _interval,
    _withheld,
    tidy_table,
)


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
        # named by this table's own columns (it said analysed_positive and excluded.<reason> once)
        columns = {
            "read": "read",
            "analysed": "analysed",
            "analysed_positive": "analysed_with_condition",
            "analysed_negative": "analysed_without_condition",
        }
        withheld = [column for name, column in columns.items() if flow.get(name) is None]
        withheld += [f"excluded_{reason}" for reason, n in excluded.items() if n is None]
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
    # The headline first (the model the report leads with), then the univariate sensitivity analysis, then each
    # bivariate fit by its key. The headline row was labelled univariate once (found by following the coordinator's
    # guide): its numbers were the suppression-aware GLMM's, and DerSimonian-Laird's were in no row.
    univariate = (pooled.get("sensitivity_analyses") or {}).get("univariate")
    models = [(HEADLINE, pooled), ("univariate DerSimonian-Laird (complete tables)", univariate)]
    models += [(key.replace("_", " "), value) for key, value in pooled.items() if key.startswith("bivariate")]
    for name, value in models:
        if not isinstance(value, dict) or not isinstance(value.get("sensitivity"), dict):
            continue
        yield {
            "site_id": POOLED,
            "model": f"{name}: {value.get('method', '')}".split(";")[0] if name == HEADLINE else name,
            **_interval("sensitivity", value.get("sensitivity")),
            **_interval("specificity", value.get("specificity")),
            "sites_pooled": len(value.get("sites_pooled", [])) if isinstance(value.get("sites_pooled"), list) else None,
        }


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


@tidy_table(
    "discrimination",
    "AUC per site (computed at the site, DeLong SE) and pooled (random effects on the logit scale)",
    (
        _SITE,
        ("auc", "area under the ROC curve"),
        ("auc_se", "DeLong (1988) standard error"),
        ("auc_bound_low", "where the site withheld its AUC: the smallest AUC its released ROC band counts allow"),
        ("auc_bound_high", "where the site withheld its AUC: the largest AUC its released ROC band counts allow"),
        ("auc_ci_low", "95% interval (pooled rows)"),
        ("auc_ci_high", "95% interval (pooled rows)"),
        ("pi_low", "95% prediction interval (pooled rows)"),
        ("pi_high", "95% prediction interval (pooled rows)"),
        ("sites_pooled", "pooled rows: how many sites"),
    ),
)
def _discrimination(context: ExportContext) -> Iterable[dict[str, Any]]:
    pooled = context.analysis.get("discrimination")
    bounds = pooled.get("auc_bounds") if isinstance(pooled, dict) else None
    for site_id, sections in context.sections.items():
        roc = sections.get("roc")
        if isinstance(roc, dict):
            found = bounds.get(site_id) if isinstance(bounds, dict) else None
            found = found if isinstance(found, dict) else {}
            yield {
                "site_id": site_id,
                "auc": _number(roc.get("auc")),
                "auc_se": _number(roc.get("auc_se")),
                "auc_bound_low": _number(found.get("low")),
                "auc_bound_high": _number(found.get("high")),
            }
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
