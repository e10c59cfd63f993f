"""Subgroup forest plots: the pooled estimate within each level of a subgroup variable."""

from __future__ import annotations

import math
from typing import Any

from .figures import humanise
from .html import csv_link, esc, figure, fmt_number, fmt_percent, span
from .plots import ForestRow, forest_plot
from .readers import number

__all__ = ["subgroup_forests"]

_BACK = {"logit": lambda v: 1 / (1 + math.exp(-v)), "log": math.exp, "identity": lambda v: v}


def _between_sentence(between: dict[str, Any]) -> str:
    """ "Difference between subgroups: F(1, 5) = 2.31, p = 0.19", or "" when the test is missing."""
    statistic, p_value, df = number(between.get("statistic")), number(between.get("p")), between.get("df")
    if statistic is None or p_value is None or not isinstance(df, list) or not df:
        return ""
    symbol = "F" if between.get("distribution") == "F" else "χ²"
    degrees = ", ".join(str(d) for d in df)
    return f"Difference between subgroups: {symbol}({degrees}) = {statistic:.2f}, p = {p_value:.2g}"


def subgroup_forests(subgroups: Any) -> str:
    """One forest plot per subgroup variable and measure: the pooled estimate within each subgroup.

    Reads ``{variable: {measure: {"scale", "subgroups": [{"subgroup", "pooled": {estimate, ci_low, ci_high,
    pi_low, pi_high}}], "between_subgroups": {statistic, distribution, df, p}}}}``; estimates on a logit or log
    scale are drawn back on the proportion or ratio scale. Returns "" when nothing fits that shape.
    """
    if not isinstance(subgroups, dict):
        return ""
    parts = []
    for variable, measures in subgroups.items():
        if not isinstance(measures, dict):
            continue
        for measure, result in measures.items():
            if not isinstance(result, dict) or not isinstance(result.get("subgroups"), list):
                continue
            back = _BACK.get(str(result.get("scale", "identity")), _BACK["identity"])
            percent = result.get("scale") == "logit"
            show = fmt_percent if percent else fmt_number
            rows, csv_rows = [], []
            for item in result["subgroups"]:
                if not isinstance(item, dict):
                    continue
                pooled = item.get("pooled") if isinstance(item.get("pooled"), dict) else {}
                values = [number(pooled.get(k)) for k in ("estimate", "ci_low", "ci_high")]
                label = str(item.get("subgroup", "?"))
                if None in values:
                    reason = item.get("reason") or "not pooled"
                    rows.append(ForestRow(label, None, None, None, None, str(reason)[:60]))
                    csv_rows.append([label, None, None, None, reason])
                    continue
                est, low, high = (back(v) for v in values)  # type: ignore[arg-type]
                sites = len(item.get("sites", []))
                rows.append(
                    ForestRow(
                        label,
                        est,
                        low,
                        high,
                        sites or None,
                        f"{show(est)} ({span(show(low), show(high))}), {sites} sites",
                    )
                )
                csv_rows.append([label, est, low, high, sites])
            if not rows:
                continue
            between = result.get("between_subgroups") if isinstance(result.get("between_subgroups"), dict) else {}
            test = _between_sentence(between)
            name = humanise((str(measure),))
            title = f"{name[:1].upper()}{name[1:]} by {humanise((str(variable),))}"
            svg = forest_plot(
                title,
                f"Pooled {name} within each subgroup, 95% confidence interval",
                rows,
                None,
                salt=f"subgroup-{variable}-{measure}",
                no_summary_reason=test or "Difference between subgroups: not estimable",
                xlim=(0.0, 1.0) if percent else None,
                percent=percent,
                summary_label="Difference",
            )
            slug = f"subgroup-{variable}-{measure}".replace("_", "-").lower()
            caption = (
                f"<strong>{esc(title)}.</strong> Each row pools the sites' estimates within one subgroup "
                f"({esc(str(result.get('measure', measure)))}, random effects), drawn on the "
                f"{'proportion' if percent else 'original'} scale. {esc(test)}."
            )
            parts.append(
                figure(
                    svg,
                    caption,
                    f"fig-{slug}",
                    [
                        csv_link(
                            f"{slug}.csv", ["subgroup", "estimate", "ci_low", "ci_high", "sites_or_reason"], csv_rows
                        )
                    ],
                )
            )
    return "".join(parts)
