"""Figure sections: forest plots, the SROC plot, ROC and calibration, each with the data behind it as CSV."""

from __future__ import annotations

from statistics import NormalDist
from typing import Any

from federation.protocol.words import (
    CALIBRATION_INTERCEPT,
    CALIBRATION_SLOPE,
    POOLED_MODELS,
    WITH_CONDITION,
    WITHOUT_CONDITION,
)

from .html import csv_link, esc, figure, fmt_number, fmt_percent, span
from .inputs import ReportInputs
from .plots import (
    CalibrationSeries,
    ForestRow,
    ForestSummary,
    RocSeries,
    calibration_plot,
    forest_plot,
    roc_plot,
)
from .readers import calibration_bins, get_path, number, points, roc_from_bands

__all__ = [
    "accuracy_forests",
    "calibration_figure",
    "interval_forest",
    "roc_figure",
    "reference_value",
]

_COUNTS = {"sensitivity": ("tp", "fn"), "specificity": ("tn", "fp")}
_RATIO_WORDS = ("ratio", "o_e", "oe", "lr", "dor", "odds")
Z95 = NormalDist().inv_cdf(0.975)


def slug_of(path: tuple) -> str:
    return "-".join(str(p) for p in path).replace("_", "-").lower()


def humanise(path: tuple) -> str:
    """A path such as ``("calibration", "o_e")`` as a label a reader understands."""
    words = {
        "o_e": "O:E ratio",
        "oe": "O:E ratio",
        "ppv": "positive predictive value",
        "npv": "negative predictive value",
        "dor": "diagnostic odds ratio",
        "lr_positive": "LR+",
        "lr_negative": "LR−",
        "likelihood_ratio_positive": "positive likelihood ratio",
        "likelihood_ratio_negative": "negative likelihood ratio",
        "auc": "AUC",
        "area_under_curve": "AUC of the summary ROC curve, over false-positive rates from 0 to 1",
        "calibration_intercept": CALIBRATION_INTERCEPT,
        "calibration_slope": CALIBRATION_SLOPE,
        "roc": "ROC",
        "auc_model": "AUC (this model)",
        "auc_compare": "AUC (comparison model)",
        "auc_difference": "AUC difference",
        "observed_expected_ratio": "O:E ratio",
        **{key: name for key, name in POOLED_MODELS.items() if key != "pooled"},
        "analysed_positive": WITH_CONDITION,
        "analysed_negative": WITHOUT_CONDITION,
        "diseased": WITH_CONDITION,
        "non_diseased": WITHOUT_CONDITION,
        "events": WITH_CONDITION,
        "non_events": WITHOUT_CONDITION,
        "positive": WITH_CONDITION,
        "negative": WITHOUT_CONDITION,
        "called_positive": "screen +",
        "called_negative": "screen −",
        "reference2": "second reference",
        "model_reference": "screen vs reference",
        "model_reference2": "screen vs second reference",
        "reference_reference2": "reference vs second reference",
    }
    return " · ".join(f"#{p + 1}" if isinstance(p, int) else words.get(str(p), str(p).replace("_", " ")) for p in path)


def reference_value(name: str) -> float | None:
    """The value meaning "no effect" or "perfect" for a quantity, drawn as a grey line in its forest plot."""
    name = name.lower()
    if "slope" in name and "intercept" not in name:
        return 1.0  # calibration slope: 1 is perfect
    if any(word in name for word in _RATIO_WORDS):
        return 1.0
    if any(word in name for word in ("intercept", "difference", "kappa")):
        return 0.0
    if "auc" in name:
        return 0.5  # no discrimination
    return None


# Where the analysis keeps the pooled counterpart of a quantity the sites release under another name.
POOLED_ALIASES: dict[tuple, tuple] = {
    ("roc", "auc"): ("discrimination", "pooled_auc"),
    ("calibration", "calibration_intercept"): ("calibration", "calibration_intercept"),
    ("calibration", "slope"): ("calibration", "calibration_slope"),
    ("calibration", "observed_expected_ratio"): ("calibration", "observed_expected"),
    ("paired", "auc_difference"): ("paired", "auc_difference"),
    **{
        ("agreement", "tables", 0, "pairs", pair, "kappa"): ("agreement", pair, "kappa")
        for pair in ("model_reference", "model_reference2", "reference_reference2")
    },
}


def _pooled_entry(analysis: dict[str, Any], path: tuple) -> dict[str, Any] | None:
    candidates = [("pooled", *path), (path[0], "pooled", *path[1:])]
    if path in POOLED_ALIASES:
        candidates.insert(0, POOLED_ALIASES[path])
    for candidate in candidates:
        value = get_path(analysis, candidate)
        if isinstance(value, dict) and all(number(value.get(k)) is not None for k in ("estimate", "ci_low", "ci_high")):
            return value
    return None


def _summary(entry: dict[str, Any] | None, percent: bool) -> ForestSummary | None:
    if entry is None:
        return None
    show = fmt_percent if percent else fmt_number
    return ForestSummary(
        f"Pooled ({POOLED_MODELS['pooled']})",
        float(entry["estimate"]),
        float(entry["ci_low"]),
        float(entry["ci_high"]),
        number(entry.get("pi_low")),
        number(entry.get("pi_high")),
        f"{show(entry['estimate'])} ({span(show(entry['ci_low']), show(entry['ci_high']))})",
    )


def _site_interval(root: Any, path: tuple, from_se: bool) -> tuple[float | None, float | None, float | None]:
    if not from_se:
        value = get_path(root, path)
        if not isinstance(value, dict):
            return None, None, None
        return number(value.get("estimate")), number(value.get("ci_low")), number(value.get("ci_high"))
    est = number(get_path(root, path))
    se = number(get_path(root, (*path[:-1], f"{path[-1]}_se")))
    if est is None or se is None:
        return est, None, None
    return est, est - Z95 * se, est + Z95 * se


def interval_forest(
    analysis: dict[str, Any],
    path: tuple,
    title: str,
    percent: bool,
    roots: dict[str, Any] | None = None,
    from_se: bool = False,
    no_pool_reason: str = "the analysis gives no pooled estimate for this yet",
    axis_label: str = "",
) -> str:
    """A forest plot of the per-site value at ``path`` with its pooled counterpart, plus a CSV link.

    ``roots`` maps a site id to the JSON that ``path`` starts from (default: the site's analysis entry).
    With ``from_se`` the value at ``path`` is a number whose standard error sits beside it as ``NAME_se``,
    and the interval drawn is the Wald interval estimate ± 1.96 SE on the scale the site reported.
    """
    pooled = analysis["pooled"]
    accuracy = path in (("sensitivity",), ("specificity",))
    pooled_sites = set(pooled.get("sites_pooled", []))
    reasons = {e["site_id"]: e["reason"] for e in pooled.get("sites_not_pooled", [])}
    show = fmt_percent if percent else fmt_number
    rows, csv_rows = [], []
    ratio = any(word in str(path[-1]).lower() for word in _RATIO_WORDS)
    for site in analysis["sites"]:
        site_id = site["site_id"]
        root = site if roots is None else roots.get(site_id)
        if root is None or (not accuracy and len(path) > 1 and get_path(root, path[:-1]) is None):
            continue  # this site has no such result at all (e.g. no second reference standard)
        counts = _COUNTS.get(path[0]) if accuracy else None
        x = n = None
        if counts and all(site.get(c) is not None for c in counts):
            x, n = site[counts[0]], site[counts[0]] + site[counts[1]]
        est, low, high = _site_interval(root, path, from_se)
        if est is None:
            text = "withheld" if site.get("suppressed") else "not defined"
        elif low is None or high is None:
            text = f"{show(est)} (no interval)"
        else:
            text = (f"{x}/{n}  " if n else "") + f"{show(est)} ({span(show(low), show(high))})"
        in_pool = site_id in pooled_sites if accuracy else True
        if accuracy and not in_pool and site_id in reasons and est is not None:
            text += "  (not pooled)"
        rows.append(ForestRow(site_id, est, low, high, n, text, in_pool))
        csv_rows.append([site_id, x, n, est, low, high, None, None, in_pool])
    entry = _pooled_entry(analysis, path)
    summary = _summary(entry, percent)
    if entry is not None:
        csv_rows.append(
            [
                "pooled",
                None,
                None,
                entry["estimate"],
                entry["ci_low"],
                entry["ci_high"],
                entry.get("pi_low"),
                entry.get("pi_high"),
                None,
            ]
        )
    if accuracy and isinstance(pooled.get("note"), str):
        reason = pooled["note"]
    else:
        reason = no_pool_reason
    axis = axis_label or humanise(path)
    svg = forest_plot(
        title,
        axis[:1].upper()
        + axis[1:]
        + " with 95% confidence interval"
        + (" (log scale)" if ratio and not percent else ""),
        rows,
        summary,
        salt=f"forest-{slug_of(path)}",
        no_summary_reason=("not pooled: " + reason)[:90],
        xlim=(0.0, 1.0) if percent else None,
        log_scale=ratio and not percent and all((r.low or 1) > 0 for r in rows),
        reference=None if percent else reference_value(str(path[-1])),
        percent=percent,
    )
    header = ["site", "events", "total", "estimate", "ci_low", "ci_high", "pi_low", "pi_high", "pooled"]
    interval = "Wald interval (estimate ± 1.96 SE, as the site reported them)" if from_se else "confidence interval"
    caption = (
        f"<strong>{esc(title)}.</strong> Squares: each site's estimate with its 95% {interval}"
        + ("; area proportional to the participants behind it; grey: not in the pool. " if accuracy else ". ")
        + (
            "Black diamond: pooled estimate, its width the 95% confidence interval; the vermilion bar with end "
            "ticks beneath it, labelled \u201c95% prediction interval\u201d: where a new site's value would be "
            "expected to fall, where the analysis gives one."
            if summary
            else "No diamond: "
            + ("the analysis gives no pooled estimate (see the Summary for why)." if accuracy else f"{reason}.")
        )
    )
    return figure(
        svg, caption, f"fig-forest-{slug_of(path)}", [csv_link(f"forest-{slug_of(path)}.csv", header, csv_rows)]
    )


def accuracy_forests(analysis: dict[str, Any]) -> str:
    """Forest plots of sensitivity and specificity (the section every report has)."""
    return (
        '<section id="forest"><h2>Sensitivity and specificity by site</h2>'
        + interval_forest(analysis, ("sensitivity",), "Sensitivity by site", percent=True)
        + interval_forest(analysis, ("specificity",), "Specificity by site", percent=True)
        + "</section>"
    )


def _site_result(inputs: ReportInputs, site: dict[str, Any], name: str) -> Any:
    if name in site:
        return site[name]
    release = inputs.latest_release(site["site_id"])
    return release.extra.get(name) if release is not None else None


# Exact places a pooled ROC curve may sit in `federation analyze --json`. Looked up by exact key, never by a
# substring search: "roc" is inside "sroc", and an SROC curve (bivariate model) must not be drawn as a pooled ROC.
# Only a model-based summary curve is drawn (each site keeps its own band edges); never bands summed over sites.
POOLED_ROC_PATHS: tuple[tuple[str, ...], ...] = (("discrimination", "summary_roc"),)


def roc_figure(inputs: ReportInputs) -> str:
    """ROC curves per site (from released score bands) and pooled, when any exist; else empty."""
    series, rows = [], []
    for site in inputs.analysis["sites"]:
        value = _site_result(inputs, site, "roc")
        curve = (points(value) or roc_from_bands(value)) if value is not None else None
        if curve:
            series.append(RocSeries(site["site_id"], [p[0] for p in curve], [p[1] for p in curve]))
            rows += [[site["site_id"], x, y] for x, y in curve]
    for path in POOLED_ROC_PATHS:
        value = get_path(inputs.analysis, path)
        if value is None:
            continue
        curve = points(value) or roc_from_bands(value)
        if curve:
            curve = sorted({(0.0, 0.0), *curve, (1.0, 1.0)})  # a pooled curve may list only interior points
            label = "summary ROC (multiple-threshold model)"
            series.append(RocSeries(label, [p[0] for p in curve], [p[1] for p in curve], pooled=True))
            rows += [[label, x, y] for x, y in curve]
            break
    if not series:
        return ""
    svg = roc_plot(series, "ROC curves by site and pooled", salt="roc")
    caption = (
        "<strong>ROC curves.</strong> Each site's curve joins the operating points at the edges of its "
        "released score bands; the thick black curve is the summary ROC of the multiple-threshold random-effects "
        "model, fitted to every site's points at its own band edges (Steinhauser et al. 2016), where it could be "
        "fitted. It is not a curve of counts summed across sites."
    )
    return figure(svg, caption, "fig-roc", [csv_link("roc.csv", ["series", "fpr", "sensitivity"], rows)])


def calibration_figure(inputs: ReportInputs) -> str:
    """Observed against predicted risk by bin, per site and for all sites' bins summed; else empty.

    A bin whose count a site withheld is left out for that site; the summed curve uses only bins every
    drawn site released, so it never mixes sites bin by bin.
    """
    series, rows, per_site = [], [], []
    for site in inputs.analysis["sites"]:
        value = _site_result(inputs, site, "calibration")
        bins = calibration_bins(value) if value is not None else None
        if not bins:
            continue
        rows += [[site["site_id"], b[3], b[0], b[1], b[2]] for b in bins]
        used = [b for b in bins if None not in b and b[0] > 0]  # type: ignore[operator]
        if used:
            per_site.append(bins)
            series.append(
                CalibrationSeries(
                    site["site_id"],
                    [b[2] / b[0] for b in used],  # type: ignore[operator]
                    [b[1] / b[0] for b in used],
                    [b[0] for b in used],
                )
            )  # type: ignore[operator]
    if not series:
        return ""
    if len(per_site) > 1 and len({tuple(b[3] for b in bins) for bins in per_site}) == 1:
        totals = []
        for column in zip(*per_site, strict=True):
            if all(None not in b for b in column):
                totals.append((*(sum(b[j] for b in column) for j in range(3)), column[0][3]))  # type: ignore[misc]
        used = [t for t in totals if t[0] > 0]
        if used:
            label = "sites drawn, bins summed"
            series.append(
                CalibrationSeries(
                    label, [t[2] / t[0] for t in used], [t[1] / t[0] for t in used], [t[0] for t in used], pooled=True
                )
            )
            rows += [[label, t[3], t[0], t[1], t[2]] for t in totals]
    svg = calibration_plot(series, "Calibration: observed against predicted risk", salt="calibration")
    caption = (
        "<strong>Calibration.</strong> Each point is one predicted-risk bin: mean predicted risk against "
        "the observed share with the condition. Points on the dashed line mean the predicted risks were "
        "right; below it, the model over-predicts. A bin whose count a site withheld is not drawn for "
        "that site (blank rows in the CSV)."
    )
    header = ["series", "bin_lower_edge", "count", "events", "sum_predicted"]
    return figure(svg, caption, "fig-calibration", [csv_link("calibration-bins.csv", header, rows)])
