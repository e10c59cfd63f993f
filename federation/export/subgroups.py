"""Tables of the subgroup analyses: per site within each level, and pooled with the test of difference."""

from __future__ import annotations

import math
from collections.abc import Iterable
from typing import Any

from federation.release_values import count_or_none as _count
from federation.release_values import number_or_none as _number

from ..labels import level_label
from .registry import _POOLED_COLUMNS, _SITE, ExportContext, _edge, _withheld, tidy_table


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
        ("auc", "AUC within the level (computed at the site from the level's released ROC band counts)"),
        ("auc_se", "its DeLong standard error"),
        ("auc_bound_low", "where the site withheld the level's AUC: the smallest AUC its released counts allow"),
        ("auc_bound_high", "where the site withheld the level's AUC: the largest AUC its released counts allow"),
        ("withheld", "names of this row's counts the site withheld"),
    ),
)
def _subgroups(context: ExportContext) -> Iterable[dict[str, Any]]:
    discrimination = context.analysis.get("discrimination")
    found = discrimination.get("subgroup_auc_bounds") if isinstance(discrimination, dict) else None
    bounds = found if isinstance(found, dict) else {}
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
                label = level_label(name, raw, name in context.integer_variables)
                bound = ((bounds.get(site_id) or {}).get(name) or {}).get(label) or {}
                yield {
                    "site_id": site_id,
                    "variable": name,
                    "level": label,
                    "band_low": _edge(band.get("low")),
                    "band_high": _edge(band.get("high")),
                    "threshold": _number(first.get("threshold")),
                    **counts,
                    "auc": _number(roc.get("auc")),
                    "auc_se": _number(roc.get("auc_se")),
                    "auc_bound_low": _number(bound.get("low")),
                    "auc_bound_high": _number(bound.get("high")),
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
