"""HTML building blocks for the report: escaping, traced numbers, tables, embedded downloads, the page.

Every number the summary states is written by :func:`traced`, which records where in the analysis JSON it
came from (``data-key``) and its exact value (``data-value``), so a reader — or a test — can check the text
against ``federation analyze --json``. Downloads are ``data:`` URIs: the file stays self-contained.
"""

from __future__ import annotations

import base64
import csv
import io
import json
import math
from collections.abc import Iterable, Sequence
from html import escape
from typing import Any

from federation.labels import number_text
from federation.protocol.words import WITHHELD_LEGEND, WITHHELD_MARK

__all__ = [
    "csv_link",
    "esc",
    "fmt_number",
    "fmt_percent",
    "interval_text",
    "is_interval",
    "json_link",
    "page",
    "table",
    "traced",
]

SUPPRESSED = WITHHELD_MARK  # a withheld count in a table (legend: WITHHELD_LEGEND)


def esc(value: object) -> str:
    """Text safe for HTML element content and attribute values."""
    return escape(str(value), quote=True)


def fmt_percent(value: float, digits: int = 1) -> str:
    """A proportion as a percentage, e.g. ``0.7123 -> '71.2%'``."""
    return f"{100 * value:.{digits}f}%"


def fmt_number(value: object, digits: int = 3) -> str:
    """A JSON scalar as a reader sees it: integers whole, floats to ``digits`` places, null as a dash."""
    if value is None:
        return "—"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, int):
        # A narrow no-break space groups digits without locale ambiguity and never splits a number across lines.
        return f"{value:,}".replace(",", "\u202f")
    if isinstance(value, float):
        if not math.isfinite(value):
            return "—"
        if value != 0 and (abs(value) >= 1e5 or abs(value) < 10 ** (-digits)):
            return f"{value:.{digits}g}"
        return f"{value:.{digits}f}"
    return str(value)


def traced(value: float | int, key: str, text: str) -> str:
    """A number in running text, tagged with the analysis-JSON path it came from and its exact value.

    ``key`` is a dotted path into ``federation analyze --json`` (list items by index); a trailing ``#len``
    means the length of the list at that path.
    """
    exact = repr(int(value)) if isinstance(value, int) else repr(float(value))  # NumPy scalars print as Python
    return f'<span class="num" data-key="{esc(key)}" data-value="{esc(exact)}">{esc(text)}</span>'


def is_interval(value: object) -> bool:
    """Whether a JSON value is an estimate with a confidence interval (``estimate``, ``ci_low``, ``ci_high``)."""
    return isinstance(value, dict) and {"estimate", "ci_low", "ci_high"} <= set(value)


def span(low_text: str, high_text: str) -> str:
    """``low–high``, or ``low to high`` when a limit is negative (an en dash beside a minus sign misleads)."""
    if low_text.startswith("-") or high_text.startswith("-"):
        return f"{low_text} to {high_text}"
    return f"{low_text}–{high_text}"


def interval_text(value: dict[str, Any], percent: bool = False) -> str:
    """``'0.712 (0.646–0.770)'`` or, with ``percent``, ``'71.2% (64.6–77.0%)'``."""
    parts = [value.get("estimate"), value.get("ci_low"), value.get("ci_high")]
    if any(not isinstance(p, (int, float)) for p in parts):
        return fmt_number(value.get("estimate"))
    est, low, high = (float(p) for p in parts)  # type: ignore[arg-type]
    if percent:
        return f"{fmt_percent(est)} ({100 * low:.1f}–{fmt_percent(high)})"
    return f"{fmt_number(est)} ({span(fmt_number(low), fmt_number(high))})"


def _data_uri(mime: str, data: bytes) -> str:
    return f"data:{mime};base64,{base64.b64encode(data).decode('ascii')}"


def csv_bytes(header: Sequence[str], rows: Iterable[Sequence[object]]) -> bytes:
    """CSV text (UTF-8, comma, header row); None becomes an empty field, as spreadsheets expect."""
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(header)
    for row in rows:
        writer.writerow(["" if v is None else v for v in row])
    return buffer.getvalue().encode("utf-8")


def csv_link(filename: str, header: Sequence[str], rows: Iterable[Sequence[object]], label: str = "") -> str:
    """A download link carrying a CSV file inside the page."""
    uri = _data_uri("text/csv;charset=utf-8", csv_bytes(header, rows))
    text = label or f"Data (CSV): {filename}"
    return f'<a class="download" download="{esc(filename)}" href="{uri}">{esc(text)}</a>'


def json_link(filename: str, value: Any, label: str) -> str:
    """A download link carrying a JSON document inside the page."""
    data = json.dumps(value, indent=2, sort_keys=False).encode("utf-8") + b"\n"
    return (
        f'<a class="download" download="{esc(filename)}" href="{_data_uri("application/json", data)}">{esc(label)}</a>'
    )


NULL_NOTE = "— not defined from what the sites released."
WITHHELD_NOTE = WITHHELD_LEGEND + "."


def withheld_cell() -> str:
    """A count the site withheld (see ``WITHHELD_NOTE``)."""
    return f'<span class="suppressed" title="withheld by the site\'s disclosure control">{WITHHELD_MARK}</span>'


def cell_text(value: object) -> str:
    """A table cell of analysis JSON: null is a dash (see ``NULL_NOTE``); intervals read estimate (low–high)."""
    if value is None:
        return '<span class="suppressed" title="not defined from what the sites released">—</span>'
    if is_interval(value):
        return esc(interval_text(value))  # type: ignore[arg-type]
    if isinstance(value, list) and all(not isinstance(v, (dict, list)) for v in value):
        if len(value) > 6 and not all(isinstance(v, str) for v in value):
            return esc(f"{len(value)} values")
        # a list of numbers is a request's edges or thresholds: shown as the coordinator wrote them
        return esc(", ".join(number_text(v) if isinstance(v, float) else fmt_number(v) for v in value))
    if isinstance(value, (dict, list)):
        return f"<code>{esc(json.dumps(value, sort_keys=True)[:300])}</code>"
    return esc(fmt_number(value))


def table(header: Sequence[str], rows: Iterable[Sequence[str]], caption: str = "", numeric_from: int = 1) -> str:
    """An HTML table; cells are given as ready HTML. Columns from ``numeric_from`` on are right-aligned."""
    head = "".join(
        f'<th scope="col"{" class=n" if i >= numeric_from else ""}>{esc(h)}</th>' for i, h in enumerate(header)
    )
    body = []
    for row in rows:
        cells = "".join(
            (f'<th scope="row">{c}</th>' if i == 0 else f"<td{' class=n' if i >= numeric_from else ''}>{c}</td>")
            for i, c in enumerate(row)
        )
        body.append(f"<tr>{cells}</tr>")
    cap = f"<caption>{esc(caption)}</caption>" if caption else ""
    inner = f"{cap}<thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody>"
    return f'<div class="table-wrap"><table>{inner}</table></div>'


def figure(svg: str, caption_html: str, figure_id: str, downloads: Sequence[str] = ()) -> str:
    """A plot with its caption and the download links for the data behind it."""
    links = f'<p class="downloads">{" ".join(downloads)}</p>' if downloads else ""
    return (
        f'<figure class="plot" id="{esc(figure_id)}"><div class="svg-wrap">{svg}</div>'
        f"<figcaption>{caption_html}{links}</figcaption></figure>"
    )


CSS = """
:root { --ink: #1a1a1a; --muted: #555; --rule: #c8c8c8; --band: #f3f3f3; --accent: #0072B2; --warn: #D55E00; }
* { box-sizing: border-box; }
html { font-family: "DejaVu Sans", "Liberation Sans", Arial, Helvetica, sans-serif; color: var(--ink);
       background: #fff; font-size: 15px; line-height: 1.5; }
body { margin: 0 auto; max-width: 1080px; padding: 1.5rem 1.5rem 4rem; }
h1 { font-size: 1.7rem; margin: 0 0 .3rem; }
h2 { font-size: 1.3rem; margin: 2.2rem 0 .6rem; padding-bottom: .2rem; border-bottom: 2px solid var(--accent); }
h3 { font-size: 1.05rem; margin: 1.4rem 0 .4rem; }
p, li { max-width: 75ch; }
.subtitle { color: var(--muted); margin: 0 0 1rem; }
nav.toc { background: var(--band); padding: .6rem 1rem; border-radius: 4px; }
nav.toc ol { margin: .2rem 0; padding-left: 1.4rem; columns: 2; }
.headline { display: grid; grid-template-columns: repeat(auto-fit, minmax(300px, 1fr)); gap: 1rem; margin: 1rem 0; }
.headline .card { border: 1px solid var(--rule); border-left: 6px solid var(--accent); padding: .7rem 1rem; }
.headline .card.spec { border-left-color: #E69F00; }
.headline .big { font-size: 1.9rem; font-weight: bold; display: block; }
.headline .small { color: var(--muted); }
.note { border-left: 4px solid var(--warn); background: #fff6ef; padding: .6rem 1rem; margin: 1rem 0; }
.caution { border: 2px solid var(--ink); padding: .6rem 1rem; margin: 1rem 0; }
.table-wrap { overflow-x: auto; margin: .6rem 0 1rem; }
table { border-collapse: collapse; font-size: .9rem; }
caption { text-align: left; font-weight: bold; padding: .3rem 0; }
th, td { padding: .25rem .6rem; border-bottom: 1px solid var(--rule); vertical-align: top; text-align: left; }
thead th { border-bottom: 2px solid var(--ink); }
td.n, th.n { text-align: right; font-variant-numeric: tabular-nums; }
tbody tr:nth-child(even) { background: var(--band); }
.suppressed { font-style: italic; color: var(--muted); }
code, .hash { font-family: "DejaVu Sans Mono", "Liberation Mono", monospace; font-size: .85em; word-break: break-all; }
figure.plot { margin: 1rem 0 1.6rem; }
.svg-wrap svg { max-width: 100%; height: auto; display: block; }
figcaption { font-size: .9rem; color: var(--muted); max-width: 90ch; }
a.download { display: inline-block; margin: .2rem .6rem .2rem 0; color: var(--accent); }
.flow-grid { display: grid; grid-template-columns: repeat(auto-fill, minmax(330px, 1fr)); gap: 1rem; }
.flow { border: 1px solid var(--rule); padding: .5rem .7rem; font-size: .85rem; break-inside: avoid; }
.flow h3 { margin: 0 0 .4rem; font-size: .95rem; }
.flow .box { border: 1.5px solid var(--ink); padding: .2rem .4rem; margin: 0 auto; text-align: center;
             background: #fff; }
.flow .arrow { text-align: center; line-height: 1; color: var(--muted); }
.flow .side { border-style: dashed; margin: .2rem 0 .2rem 18%; text-align: left; font-size: .8rem; }
.flow .split { display: grid; grid-template-columns: minmax(0, 1fr) minmax(0, 1fr); gap: .4rem; }
.flow .leaf { display: grid; grid-template-columns: minmax(0, 1fr) minmax(0, 1fr); gap: .2rem; margin-top: .2rem; }
.flow .leaf .box { font-size: .75rem; padding: .15rem .1rem; overflow-wrap: anywhere; }
tbody th { white-space: nowrap; }
details { margin: .4rem 0; }
summary { cursor: pointer; }
footer { margin-top: 3rem; color: var(--muted); font-size: .85rem; border-top: 1px solid var(--rule); }
@media print {
  html { font-size: 11pt; }
  body { max-width: none; padding: 0; }
  nav.toc, a.download { display: none; }
  h2 { break-after: avoid; }
  figure.plot, .flow, table, .card { break-inside: avoid; }
  tbody tr:nth-child(even) { background: none; }
  details > *:not(summary) { display: block; }
}
"""


def page(title: str, subtitle: str, toc: Sequence[tuple[str, str]], body: str) -> str:
    """The whole document: no external stylesheet, font, script or image."""
    toc_items = "".join(f'<li><a href="#{esc(anchor)}">{esc(text)}</a></li>' for anchor, text in toc)
    return (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        '<meta name="referrer" content="no-referrer">'
        "<meta http-equiv=\"Content-Security-Policy\" content=\"default-src 'none'; style-src 'unsafe-inline'; "
        'img-src data:">'
        f"<title>{esc(title)}</title><style>{CSS}</style></head><body>"
        f'<header><h1>{esc(title)}</h1><p class="subtitle">{subtitle}</p>'
        f'<nav class="toc" aria-label="Contents"><strong>Contents</strong><ol>{toc_items}</ol></nav></header>'
        f"<main>{body}</main>"
        "<footer><p>Built by <code>federation report</code> from the study store alone; rebuilding it from the same "
        "store gives the same file. All figures are drawn inline; the page fetches nothing.</p></footer>"
        "</body></html>\n"
    )
