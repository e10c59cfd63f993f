"""Sections for the further analyses (ROC, calibration, subgroups, margin, agreement, paired, …).

Each section appears when the study asked for the analysis or when the analysis JSON holds results for it.
Its content is whatever the JSON has: forest plots for every per-site estimate with a confidence interval,
the ROC and calibration figures when curves or bins can be read, and tables for the rest. Where the analysis
does not pool an analysis yet, the sites' released values are shown as they are, labelled as such.
"""

from __future__ import annotations

import json
from typing import Any

from .figures import POOLED_ALIASES, calibration_figure, humanise, interval_forest, roc_figure
from .further import FURTHER_SECTIONS, further_paragraph
from .html import NULL_NOTE, WITHHELD_NOTE, cell_text, csv_link, esc, is_interval, table, withheld_cell
from .inputs import ReportInputs
from .readers import get_path, interval_paths, se_paths
from .subgroups import subgroup_forests

__all__ = ["KNOWN", "analysis_sections", "render_json"]

# Section title and what a reader learns from it, for the analyses a request can name.
KNOWN = {
    "roc": (
        "Discrimination (ROC)",
        "How well the score separates participants with and without the condition across all thresholds.",
    ),
    "calibration": (
        "Calibration",
        "Whether predicted risks match observed risks (probability models only): "
        "O:E ratio (observed over expected), calibration intercept and calibration slope.",
    ),
    "subgroups": ("Subgroups", "Accuracy within subgroups the study named (for example age bands or sex)."),
    "margin": (
        "Accuracy by score margin",
        "How often the screen is wrong when the score lies close to the threshold, compared with scores far from it.",
    ),
    "agreement": (
        "Agreement with a second reference standard",
        "At sites with two reference standards: how "
        "often they agree (Cohen's kappa) and where the screen stands when they disagree.",
    ),
    "paired": (
        "Paired comparison of two models",
        "Two frozen models on the same participants: differences in sensitivity, specificity and AUC.",
    ),
}
KNOWN.update(FURTHER_SECTIONS)
# Results the analysis files under another name than the analysis a request names.
SECTION_ALIASES = {"roc": ("discrimination",)}
# Keys the summary, the flow and the methods show already: no section of their own (found by following the
# coordinator's guide: the headline model's keys and the sites' cut-backs each got a section headed by the key).
SITE_CORE = {
    "site_id",
    "threshold",
    "tp",
    "fp",
    "fn",
    "tn",
    "suppressed",
    "sensitivity",
    "specificity",
    "flow",
    "cut_back",
}
POOLED_CORE = {
    "method",
    "model",
    "sites_pooled",
    "sites_not_pooled",
    "continuity_corrected_sites",
    "censored_sites",
    "sensitivity",
    "specificity",
    "tau_logit_sensitivity",
    "tau_logit_specificity",
    "correlation",
    "not_estimable",
    "sensitivity_analyses",
    "note",
}
TOP_CORE = {"study_id", "sites", "pooled"}
MAX_FORESTS = 12
MAX_DEPTH = 4


def _flatten(value: Any, prefix: str = "", depth: int = 0) -> tuple[dict[str, Any], dict[str, Any]]:
    """Scalar (and interval) columns by dotted name, and the nested lists kept aside for sub-tables."""
    columns: dict[str, Any] = {}
    nested: dict[str, Any] = {}
    if isinstance(value, list) and any(isinstance(i, (dict, list)) for i in value):
        nested[prefix or "tables"] = value
    elif isinstance(value, dict) and not is_interval(value) and depth < 2:
        for key, inner in value.items():
            name = f"{prefix}.{key}" if prefix else str(key)
            if isinstance(inner, list) and any(isinstance(i, (dict, list)) for i in inner):
                nested[name] = inner
            else:
                sub_columns, sub_nested = _flatten(inner, name, depth + 1)
                columns.update(sub_columns)
                nested.update(sub_nested)
    else:
        columns[prefix or "value"] = value
    return columns, nested


def _csv_value(value: Any) -> Any:
    if is_interval(value):
        return f"{value['estimate']} ({value['ci_low']} to {value['ci_high']})"
    if isinstance(value, list) and all(not isinstance(v, (dict, list)) for v in value):
        return ";".join("" if v is None else str(v) for v in value)
    if isinstance(value, (dict, list)):
        return json.dumps(value, sort_keys=True)
    return value


LONG_LIST = 6


def _withheld_names(record: Any) -> set[str]:
    """The names a release object lists as withheld (its ``suppressed`` list), flattened names included."""
    if not isinstance(record, dict):
        return set()
    names: set[str] = set()
    for key, value in record.items():
        if key == "suppressed" and isinstance(value, list):
            names |= {str(v) for v in value}
        elif isinstance(value, dict) and isinstance(value.get("suppressed"), list):
            names |= {f"{key}.{v}" for v in value["suppressed"]} | {str(v) for v in value["suppressed"]}
    return names


def _list_summary(name: str, value: list[Any]) -> str:
    if name.split(".")[-1] == "suppressed":
        return f'<span class="suppressed">{len(value)} withheld</span>' if value else "none"
    return f"{len(value)} values (in the CSV)"


def _records_table(records: list[dict[str, Any]], caption: str, filename: str) -> str:
    """Rows of flattened records; a column equal in every row is stated once above the table instead."""
    columns: dict[str, None] = {}
    flat = []
    for record in records:
        cols, _ = _flatten(record)
        flat.append(cols)
        for name in cols:
            columns.setdefault(name, None)
    header = list(columns)
    common = []
    if len(flat) > 1:
        for name in header[1:]:
            values = [cols.get(name) for cols in flat]
            if all(v == values[0] for v in values) and values[0] is not None:
                common.append(name)
    shown = [h for h in header if h not in common]

    withheld_in = [_withheld_names(record) for record in records]

    def cell(name: str, value: Any, withheld: set[str] = frozenset()) -> str:  # type: ignore[assignment]
        if isinstance(value, list) and (len(value) > LONG_LIST or name.split(".")[-1] == "suppressed"):
            return _list_summary(name, value)
        if value is None and (name in withheld or name.split(".")[-1] in withheld):
            return withheld_cell()
        return cell_text(value)

    rows = [[cell(c, cols.get(c), withheld_in[i]) for c in shown] for i, cols in enumerate(flat)]
    raw = [[_csv_value(cols.get(c)) for c in header] for cols in flat]
    note = ""
    if common:
        items = "; ".join(f"{esc(humanise((c,)))}: {cell(c, flat[0][c])}" for c in common)
        note = f'<p class="common"><em>Same in every row</em> — {items}</p>'
    nulls = [(i, c) for i, cols in enumerate(flat) for c in shown if cols.get(c) is None]
    marked = any(c in withheld_in[i] or c.split(".")[-1] in withheld_in[i] for i, c in nulls)
    undefined = any(not (c in withheld_in[i] or c.split(".")[-1] in withheld_in[i]) for i, c in nulls)
    legend = (f'<p class="legend">{esc(WITHHELD_NOTE)}</p>' if marked else "") + (
        f'<p class="legend">{esc(NULL_NOTE)}</p>' if undefined else ""
    )
    return (
        note
        + table([humanise((h,)) if "." not in h else h.replace("_", " ") for h in shown], rows, caption)
        + legend
        + f'<p class="downloads">{csv_link(filename, header, raw)}</p>'
    )


def render_json(value: Any, caption: str, slug: str, depth: int = 0) -> str:
    """Any analysis JSON as tables: lists of objects as tables, objects as name/value pairs, recursively."""
    if depth > MAX_DEPTH:
        return f"<p>{cell_text(value)}</p>"
    if isinstance(value, list) and value and all(isinstance(v, dict) for v in value):
        return _records_table(value, caption, f"{slug}.csv")
    if isinstance(value, dict) and not is_interval(value):
        scalars = {k: v for k, v in value.items() if not isinstance(v, (dict, list)) or is_interval(v)}
        scalars.update(
            {k: v for k, v in value.items() if isinstance(v, list) and not any(isinstance(i, (dict, list)) for i in v)}
        )
        out = []
        if scalars:
            withheld = _withheld_names(value)
            rows = [
                [esc(humanise((k,))), withheld_cell() if v is None and k in withheld else cell_text(v)]
                for k, v in scalars.items()
            ]
            out.append(table(["quantity", "value"], rows, caption))
            if any(v is None and k in withheld for k, v in scalars.items()):
                out.append(f'<p class="legend">{esc(WITHHELD_NOTE)}</p>')
            if any(v is None and k not in withheld for k, v in scalars.items()):
                out.append(f'<p class="legend">{esc(NULL_NOTE)}</p>')
        for key, inner in value.items():
            if key in scalars:
                continue
            inner_caption = f"{caption} · {humanise((key,))}"
            out.append(
                f"<details open><summary>{esc(inner_caption)}</summary>"
                f"{render_json(inner, inner_caption, f'{slug}-{key}', depth + 1)}</details>"
            )
        return "".join(out)
    return f"<p>{esc(caption)}: {cell_text(value)}</p>"


def _per_site(name: str, pairs: list[tuple[str, Any]], source: str) -> str:
    records, nested_parts = [], []
    for site_id, value in pairs:
        columns, nested = _flatten(value)
        records.append({"site": site_id, **columns})
        for key, inner in nested.items():
            nested_parts.append(
                render_json(inner, f"{site_id} · {humanise((name, key))}", f"{name}-{site_id}-{key}", 2)
            )
    caption = f"{KNOWN.get(name, (humanise((name,)),))[0]} by site ({source})"
    # A table of site names alone says nothing; the detailed tables below then carry everything.
    out = _records_table(records, caption, f"{name}-by-site.csv") if any(len(r) > 1 for r in records) else ""
    if nested_parts:
        out += f"<details><summary>Detailed tables by site</summary>{''.join(nested_parts)}</details>"
    return out


# Container keys that only group things; a label skips them and names the item instead.
_GROUPING = {"variables", "levels", "tables", "pairs", "results"}
_ITEM_NAMES = ("level", "variable", "name", "threshold")


def label_path(root: Any, path: tuple, name: str) -> str:
    """A reader's label for ``path``: list items by their level/variable/threshold, grouping keys skipped."""
    words: list[str] = []
    value = root.get(name) if isinstance(root, dict) else None
    for step in path:
        if isinstance(step, int):
            item = value[step] if isinstance(value, list) and step < len(value) else None
            tag = next((k for k in _ITEM_NAMES if isinstance(item, dict) and k in item), None)
            if tag is None:
                words.append(f"#{step + 1}")
            else:
                words.append(f"threshold {item[tag]}" if tag == "threshold" else str(item[tag]))  # type: ignore[index]
            value = item
            continue
        if step not in _GROUPING:
            words.append(humanise((step,)))
        value = value.get(step) if isinstance(value, dict) else None
    return " · ".join(words) or humanise((name,))


def title_of(name: str) -> str:
    return KNOWN.get(name, (humanise((name,)),))[0]


def margin_table(pairs: list[tuple[str, Any]]) -> str:
    """Score-margin results of all sites in one table: how often the screen is wrong, band by band.

    Reads each site's list of ``{"threshold", "called_positive": [...], "called_negative": [...]}`` whose rows
    hold ``distance_from``, ``distance_to``, ``correct`` and ``wrong``; returns "" for any other shape.
    """
    records = []
    for site_id, value in pairs:
        if not isinstance(value, list):
            continue
        for entry in value:
            if not isinstance(entry, dict):
                continue
            for side, called in (("called_positive", "positive"), ("called_negative", "negative")):
                for row in entry.get(side) or []:
                    if not isinstance(row, dict):
                        continue
                    correct, wrong = row.get("correct"), row.get("wrong")
                    share = None
                    if isinstance(correct, int) and isinstance(wrong, int) and correct + wrong > 0:
                        share = wrong / (correct + wrong)
                    records.append(
                        {
                            "site": site_id,
                            "threshold": entry.get("threshold"),
                            "screen": called,
                            "distance from threshold, from": row.get("distance_from"),
                            "to": row.get("distance_to"),
                            "correct": correct,
                            "wrong": wrong,
                            "share wrong": share,
                        }
                    )
    if not records:
        return ""
    return _records_table(records, "Accuracy by distance of the score from the threshold", "margin-bands.csv")


def _released(inputs: ReportInputs, name: str) -> list[tuple[str, Any]]:
    """``(site id, value)`` of ``name`` in each site's latest release, for analyses not pooled yet."""
    out = []
    for site in inputs.analysis["sites"]:
        release = inputs.latest_release(site["site_id"])
        if release is not None and name in release.extra:
            out.append((site["site_id"], release.extra[name]))
    return out


def _section(inputs: ReportInputs, name: str, requested: bool) -> str:
    analysis = inputs.analysis
    title, purpose = KNOWN.get(name, (humanise((name,)), "Results the analysis holds under this name."))
    parts = [f'<section id="analysis-{esc(name)}"><h2>{esc(title)}</h2><p>{esc(purpose)}</p>']
    parts.append(further_paragraph(analysis, name))
    found = pooled_found = False
    if name == "roc":
        fig = roc_figure(inputs)
        parts.append(
            fig
            or '<p class="note">No ROC curve can be drawn: no site released every score-band count '
            "(a curve needs all of a site's bands). Each site's AUC, computed at the site, is below.</p>"
        )
        found |= bool(fig)
    if name == "calibration":
        fig = calibration_figure(inputs)
        parts.append(fig)
        found |= bool(fig)
    site_pairs = [(s["site_id"], s[name]) for s in analysis["sites"] if name in s]
    released = _released(inputs, name) if not site_pairs else []
    roots = {site_id: {name: value} for site_id, value in (site_pairs or released)}
    forests = [(path, False) for path in interval_paths(list(roots.values()), skip=())]
    forests += [(path, True) for path in se_paths(list(roots.values()))]
    known = {path for path, _ in forests}
    forests += [
        (path, True)
        for path in POOLED_ALIASES
        if path[0] == name and path not in known and any(get_path(r, path) is not None for r in roots.values())
    ]
    if name == "subgroups":
        pooled_subgroups = subgroup_forests(analysis.get("subgroups"))
        if pooled_subgroups:
            parts.append(pooled_subgroups)
            found = True
            forests = []  # the pooled subgroup plots say it; per-site plots per level would bury them
    for path, from_se in forests[:MAX_FORESTS]:
        example = next((r for r in roots.values() if get_path(r, path) is not None), {})
        label = label_path(example, path[1:], name)
        title = f"{label} by site" + (f" ({title_of(name)})" if len(path) > 2 else "")
        parts.append(
            interval_forest(analysis, path, title[:1].upper() + title[1:], False, roots, from_se, axis_label=label)
        )
        found = True
    if len(forests) > MAX_FORESTS:
        parts.append(f"<p>{len(forests) - MAX_FORESTS} further per-site estimates are in the tables below.</p>")
    for holder, where in ((analysis.get("pooled", {}), "pooled"), (analysis, "analysis")):
        for key in (name, *SECTION_ALIASES.get(name, ())):
            if key in holder:
                body = render_json(holder[key], f"{title}: pooled results", f"{key}-{where}")
                parts.append(
                    f"<details><summary>Every pooled number ({esc(key)} in the analysis JSON)</summary>{body}</details>"
                )
                found = pooled_found = True
    if name == "margin":
        table_html = margin_table(site_pairs or released)
        parts.append(table_html)
        found |= bool(table_html)
    if site_pairs:
        parts.append(_per_site(name, site_pairs, "from the analysis"))
        found = True
    elif released:
        parts.append(
            "<p>Each site's values as it released them"
            + (" (the pooled results are above).</p>" if pooled_found else "; the analysis does not pool them yet.</p>")
        )
        parts.append(_per_site(name, released, "as released"))
        found = True
    if not found:
        state = "The study asked for this analysis, but" if requested else "No"
        parts.append(
            f'<p class="note">{state} results are in the store yet: no site has released it, or this '
            "version of the analysis does not read it.</p>"
        )
    return "".join(parts) + "</section>"


_PERCENT_MEASURES = {"ppv", "npv", "prevalence"}


def site_measures(analysis: dict[str, Any]) -> list[str]:
    """Per-site accuracy measures beyond sensitivity and specificity (PPV, NPV, likelihood ratios, DOR, …):
    site-entry keys holding an estimate with an interval, or a plain number."""
    found: dict[str, None] = {}
    for site in analysis["sites"]:
        for key, value in site.items():
            if key in SITE_CORE or key in KNOWN:
                continue
            if is_interval(value) or (isinstance(value, (int, float)) and not isinstance(value, bool)):
                found.setdefault(key, None)
    return list(found)


def measures_section(analysis: dict[str, Any], measures: list[str]) -> str:
    """Forest plots of each per-site measure with an interval, then one table of all of them."""
    parts = [
        '<section id="analysis-measures"><h2>Further accuracy measures by site</h2>'
        "<p>Predictive values depend on how common the condition is at each site, so they are shown per site "
        "and not pooled unless the analysis says otherwise; likelihood ratios and the diagnostic odds ratio are "
        "drawn on a log scale.</p>"
    ]
    for key in measures:
        if any(is_interval(site.get(key)) for site in analysis["sites"]):
            title = f"{humanise((key,))} by site"
            reason = "predictive values depend on each site's prevalence" if key in ("ppv", "npv") else None
            parts.append(
                interval_forest(
                    analysis,
                    (key,),
                    title[:1].upper() + title[1:],
                    key in _PERCENT_MEASURES,
                    **({"no_pool_reason": reason} if reason else {}),
                )
            )
    records = [{"site": s["site_id"], **{k: s.get(k) for k in measures}} for s in analysis["sites"]]
    parts.append(_records_table(records, "Further accuracy measures by site", "accuracy-measures-by-site.csv"))
    return "".join(parts) + "</section>"


def section_names(inputs: ReportInputs) -> list[str]:
    """Further analyses to show: asked for by the study, or present in the analysis JSON or the releases."""
    analysis = inputs.analysis
    names: dict[str, None] = {}
    for name in inputs.requested_analyses:
        if name not in ("confusion", "flow"):
            names.setdefault(name, None)
    for name in KNOWN:
        in_sites = any(name in s for s in analysis["sites"])
        in_releases = any(name in r.release.extra for r in inputs.releases)
        if name in analysis or name in analysis.get("pooled", {}) or in_sites or in_releases:
            names.setdefault(name, None)
    measures = set(site_measures(analysis))
    for site in analysis["sites"]:
        for key in site:
            if key not in SITE_CORE and key not in measures:
                names.setdefault(key, None)
    for key in analysis.get("pooled", {}):
        if key not in POOLED_CORE and not key.startswith(("tau2_", "i2_", "q_")) and "bivariate" not in key:
            names.setdefault(key, None)
    aliases = {alias for group in SECTION_ALIASES.values() for alias in group}
    for key in analysis:
        if key not in TOP_CORE and "bivariate" not in key and key not in aliases:
            names.setdefault(key, None)
    # The order a validation paper reports them in (as `federation analyze` prints them), then the rest.
    return [name for name in KNOWN if name in names] + [name for name in names if name not in KNOWN]


def analysis_sections(inputs: ReportInputs) -> list[tuple[str, str, str]]:
    """``(anchor, title, html)`` for each further analysis, in a stable order."""
    requested = set(inputs.requested_analyses)
    out = []
    measures = site_measures(inputs.analysis)
    if measures:
        out.append(("analysis-measures", "Further accuracy measures", measures_section(inputs.analysis, measures)))
    for name in section_names(inputs):
        title = KNOWN.get(name, (humanise((name,)),))[0]
        out.append((f"analysis-{name}", title, _section(inputs, name, name in requested)))
    return out
