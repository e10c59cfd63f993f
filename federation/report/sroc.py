"""The summary ROC section: one plot per bivariate model the analysis fitted.

Reads each bivariate result's summary point (``sensitivity``/``specificity``), its SROC curve and its 95%
confidence and prediction regions as point lists (see :func:`federation.report.readers.points`).
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any

from .figures import humanise, slug_of
from .html import csv_link, esc, figure
from .plots import SrocInputs, sroc_plot
from .readers import find_keys, number, points

__all__ = ["bivariate_results", "sroc_figures"]


def _summary_point(value: dict[str, Any]) -> tuple[float, float] | None:
    for holder in (value, value.get("summary_point"), value.get("summary")):
        if not isinstance(holder, dict):
            continue
        sens, spec = holder.get("sensitivity"), holder.get("specificity")
        sens = number(sens.get("estimate")) if isinstance(sens, dict) else number(sens)
        spec = number(spec.get("estimate")) if isinstance(spec, dict) else number(spec)
        if sens is not None and spec is not None:
            return 1 - spec, sens
    return None


def _region(value: dict[str, Any], word: str) -> list[tuple[float, float]]:
    for path, found in find_keys(value, word, max_depth=3):
        if "region" in " ".join(str(p) for p in path).lower() or "ellipse" in str(path[-1]).lower():
            pts = points(found)
            if pts:
                return pts
    return []


def _curve(value: dict[str, Any]) -> list[tuple[float, float]]:
    for word in ("sroc", "curve"):
        for _, found in find_keys(value, word, max_depth=3):
            pts = points(found)
            if pts:
                return pts
    return []


def bivariate_results(analysis: dict[str, Any]) -> list[tuple[tuple, dict[str, Any]]]:
    """Bivariate model results the analysis holds (a dict with a summary point), with their JSON paths."""
    found = []
    for path, value in find_keys(analysis, "bivariate", max_depth=3):
        if not isinstance(value, dict):
            continue
        if _summary_point(value) is not None:
            found.append((path, value))
            continue
        found += [((*path, k), v) for k, v in value.items() if isinstance(v, dict) and _summary_point(v)]
    return found


def sroc_figures(analysis: dict[str, Any], details: Callable[[tuple, dict[str, Any]], str] | None = None) -> str:
    """One SROC plot per bivariate result (then ``details`` of it, e.g. a table); empty when there is none."""
    results = bivariate_results(analysis)
    if not results:
        return ""
    sites = [s for s in analysis["sites"] if all(s.get(c) is not None for c in ("tp", "fp", "fn", "tn"))]
    labels = [s["site_id"] for s in sites]
    fpr = [s["fp"] / (s["fp"] + s["tn"]) if s["fp"] + s["tn"] else 0.0 for s in sites]
    sens = [s["tp"] / (s["tp"] + s["fn"]) if s["tp"] + s["fn"] else 0.0 for s in sites]
    size = [float(s["tp"] + s["fp"] + s["fn"] + s["tn"]) for s in sites]
    parts = ['<section id="sroc"><h2>Summary ROC (bivariate model)</h2>']
    for path, value in results[:3]:
        data = SrocInputs(
            labels,
            fpr,
            sens,
            size,
            _summary_point(value),
            _region(value, "confidence"),
            _region(value, "prediction"),
            _curve(value),
        )
        slug = slug_of(path)
        svg = sroc_plot(data, f"Summary ROC: {humanise(path[-1:])}", salt=f"sroc-{slug}")
        rows = [["site", s, f, y, n] for s, f, y, n in zip(labels, fpr, sens, size, strict=True)]
        if data.summary:
            rows.append(["summary point", "", data.summary[0], data.summary[1], ""])
        rows += [["confidence region", "", x, y, ""] for x, y in data.confidence_region]
        rows += [["prediction region", "", x, y, ""] for x, y in data.prediction_region]
        rows += [["SROC curve", "", x, y, ""] for x, y in data.curve]
        caption = (
            f"<strong>Summary ROC, {esc(humanise(path[-1:]))}.</strong> {esc(str(value.get('method', '')))}. "
            "Open orange circles: sites with a fully released table (area proportional to participants); black "
            "diamond: summary point; dashed blue line: 95% confidence region of the summary point; dotted vermilion "
            "line: 95% prediction region, where a new site's pair would be expected to fall; solid black curve: "
            "summary ROC curve "
            f"(<code>{esc('.'.join(map(str, path)))}</code> in the analysis JSON)."
        )
        parts.append(
            figure(
                svg,
                caption,
                f"fig-sroc-{slug}",
                [csv_link(f"sroc-{slug}.csv", ["part", "site", "fpr", "sensitivity", "n"], rows)],
            )
        )
        if details is not None:
            parts.append(details(path, value))
    return "".join(parts) + "</section>"
