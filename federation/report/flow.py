"""Participant flow per site, in the shape diagnostic-accuracy studies report it.

Records read → excluded (by reason) → analysed → by reference-standard result → by screen result, as in the
flow diagram of the STARD 2015 reporting guideline (Bossuyt PM et al. (2015). STARD 2015: an updated list
of essential items for reporting diagnostic accuracy studies. BMJ 351:h5527). A count the site's disclosure
control withheld is shown as "suppressed", never as a number or a guess.
"""

from __future__ import annotations

from typing import Any

from .html import SUPPRESSED, csv_link, esc, fmt_number, table

__all__ = ["EXCLUSION_LABELS", "flow_section"]

EXCLUSION_LABELS = {
    "missing_outcome": "no reference-standard result",
    "missing_feature": "a required answer missing",
    "out_of_range": "a value outside the allowed range",
    "unknown_category": "a code the model does not know",
    "duplicate_id": "duplicate record",
}


# Column headings of the flow table: short, so eleven columns fit on a page.
SHORT_LABELS = {
    "missing_outcome": "no reference result",
    "missing_feature": "missing answer",
    "out_of_range": "out of range",
    "unknown_category": "unknown code",
    "duplicate_id": "duplicate",
}


def _reason_label(reason: str, short: bool = False) -> str:
    labels = SHORT_LABELS if short else EXCLUSION_LABELS
    return labels.get(reason, reason.replace("_", " "))


def _count(value: Any) -> str:
    if value is None:
        return f'<span class="suppressed" title="withheld by the site\'s disclosure control">{SUPPRESSED}</span>'
    return esc(fmt_number(value))


def _reasons(sites: list[dict[str, Any]]) -> list[str]:
    seen: dict[str, None] = {}
    for site in sites:
        excluded = (site.get("flow") or {}).get("excluded") or {}
        for reason in excluded:
            seen.setdefault(str(reason), None)
    return list(seen)


def _card(site: dict[str, Any]) -> str:
    flow = site.get("flow") or {}
    excluded = flow.get("excluded") or {}
    lines = "".join(f"<br>{esc(_reason_label(r))}: {_count(v)}" for r, v in excluded.items())
    if excluded and all(v is not None for v in excluded.values()):
        total = f"<b>{esc(fmt_number(sum(excluded.values())))}</b>"
    else:
        total = "" if not excluded else "<b>some counts withheld</b>"
    leaf = '<div class="leaf"><div class="box">Screen +<br>{a}</div><div class="box">Screen −<br>{b}</div></div>'
    return (
        f'<div class="flow" data-site="{esc(site["site_id"])}"><h3>{esc(site["site_id"])}</h3>'
        f'<div class="box">Records read<br><b>{_count(flow.get("read"))}</b></div><div class="arrow">↓</div>'
        f'<div class="box side">Excluded {total}{lines}</div><div class="arrow">↓</div>'
        f'<div class="box">Analysed (screen and reference standard)<br><b>{_count(flow.get("analysed"))}</b></div>'
        '<div class="split">'
        f'<div><div class="arrow">↓</div><div class="box">With the condition<br><b>'
        f"{_count(flow.get('analysed_positive'))}</b></div>"
        + leaf.format(a=_count(site.get("tp")), b=_count(site.get("fn")))
        + f'</div><div><div class="arrow">↓</div><div class="box">Without the condition<br><b>'
        f"{_count(flow.get('analysed_negative'))}</b></div>"
        + leaf.format(a=_count(site.get("fp")), b=_count(site.get("tn")))
        + "</div></div></div>"
    )


def flow_rows(sites: list[dict[str, Any]]) -> tuple[list[str], list[list[Any]]]:
    """Header and raw rows (None = withheld) of the flow table, one row per site."""
    reasons = _reasons(sites)
    header = ["site", "read", *(f"excluded: {_reason_label(r, short=True)}" for r in reasons), "analysed"]
    header += [
        "with the condition",
        "with the condition: screen +",
        "with the condition: screen −",
        "without the condition",
        "without the condition: screen +",
        "without the condition: screen −",
        "threshold",
    ]
    rows = []
    for site in sites:
        flow = site.get("flow") or {}
        excluded = flow.get("excluded") or {}
        row = [site["site_id"], flow.get("read"), *(excluded.get(r) for r in reasons), flow.get("analysed")]
        row += [flow.get("analysed_positive"), site.get("tp"), site.get("fn")]
        row += [flow.get("analysed_negative"), site.get("fp"), site.get("tn"), site.get("threshold")]
        rows.append(row)
    return header, rows


def _cut_back(sites: list[dict[str, Any]]) -> str:
    """What sites cut back so that their primary table could be released, one item per analysis, in words."""
    items = [
        f"<li><b>{esc(site['site_id'])}</b>: {esc(cut.get('analysis', ''))} {esc(cut.get('action', ''))} "
        f"({esc(cut.get('rule', ''))})</li>"
        for site in sites
        for cut in site.get("cut_back") or []
    ]
    if not items:
        return ""
    return (
        '<div class="cut-back"><p>Cut back by the sites so that their primary 2×2 table could be released '
        "(the analysis and the rule; the counts stay at the site):</p><ul>" + "".join(items) + "</ul></div>"
    )


def flow_section(analysis: dict[str, Any]) -> str:
    """The participant-flow section: one flow diagram per site, then one table for all, with its CSV."""
    sites = analysis["sites"]
    header, rows = flow_rows(sites)
    html_rows = [[esc(row[0]), *(_count(v) for v in row[1:])] for row in rows]
    csv_rows = [[("withheld" if v is None else v) for v in row] for row in rows]
    return (
        '<section id="flow"><h2>Participant flow</h2>'
        "<p>For each site: how many records were read, how many were excluded and why, and how the analysed "
        "participants divide by the reference standard and by the screen result. Counts the site's disclosure "
        "policy withheld are marked · (withheld by the site's disclosure control): such a count is small (below "
        "the site's minimum cell "
        "size) or would let a small count be worked out from the others.</p>"
        f'<div class="flow-grid">{"".join(_card(site) for site in sites)}</div>'
        + _cut_back(sites)
        + table(header, html_rows, "Participant flow by site")
        + f'<p class="downloads">{csv_link("participant-flow.csv", header, csv_rows)}</p></section>'
    )
