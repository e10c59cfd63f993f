"""The table of every pooled estimate of the analysis, one row each."""

from __future__ import annotations

from collections.abc import Iterable
from typing import Any

from federation.release_values import number_or_none as _number

from .registry import _POOLED_COLUMNS, HEADLINE, ExportContext, tidy_table


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
            if name == "primary" and len(path) == 1:  # the headline's own estimates (not the univariate model)
                path = (HEADLINE, *path)
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
