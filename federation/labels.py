"""Labels a person reads: subgroup levels and score or age bands, written as a paper's table writes them.

A numeric subgroup level arrives in a release as ``{"low": 36, "high": 48}`` (low <= value < high; ``None``
for an open end). For an integer variable that is the band "36-47"; for a continuous one "36 to under 48".
A unit is taken from the variable's name when it ends in one (``age_months`` -> "months"). Numbers are
written as the coordinator wrote them: the shortest text that reads back as the same number, with the
noise of binary floating point (0.30000000000000004, 35.99999999999) rounded away at 12 significant digits.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

__all__ = ["auc_bounds_lines", "band_label", "level_label", "number_text", "unit_of"]

_UNITS = {"months": "months", "years": "years", "weeks": "weeks", "days": "days", "month": "months", "year": "years"}


def number_text(value: float | int) -> str:
    """``value`` as a person would write it: 36, 0.45, 1.5e-05 (12 significant digits at most)."""
    if isinstance(value, bool) or not math.isfinite(float(value)):
        return str(value)
    number = float(f"{float(value):.12g}")
    return str(int(number)) if number.is_integer() and abs(number) < 1e15 else repr(number)


def unit_of(variable: str) -> str:
    """The unit a variable's name ends in (``age_months`` -> "months"), or ""."""
    last = variable.rsplit("_", 1)[-1].lower()
    return _UNITS.get(last, "") if "_" in variable else ""


def band_label(low: float | None, high: float | None, integer: bool = False, unit: str = "") -> str:
    """The band low <= value < high in words: "36-47 months", "under 36 months", "48 months and over".

    ``integer``: the variable takes whole numbers, so the band is written by its first and last values.
    """
    suffix = f" {unit}" if unit else ""
    if integer:
        first = None if low is None else math.ceil(float(f"{low:.12g}"))
        last = None if high is None else math.ceil(float(f"{high:.12g}")) - 1
        if first is None and last is None:
            return f"all{suffix}"
        if first is None:
            return f"under {number_text(last + 1)}{suffix}"  # type: ignore[operator]
        if last is None:
            return f"{number_text(first)}{suffix} and over"
        if first == last:
            return f"{number_text(first)}{suffix}"
        return f"{number_text(first)}-{number_text(last)}{suffix}"
    if low is None and high is None:
        return f"all{suffix}"
    if low is None:
        return f"under {number_text(high)}{suffix}"  # type: ignore[arg-type]
    if high is None:
        return f"{number_text(low)}{suffix} and over"
    return f"{number_text(low)} to under {number_text(high)}{suffix}"


def level_label(variable: str, level: Any, integer: bool = False) -> str:
    """The label of one subgroup level: a category's name, or a numeric band in words."""
    if isinstance(level, Mapping) and ("low" in level or "high" in level):
        low, high = level.get("low"), level.get("high")
        if all(v is None or (isinstance(v, int | float) and not isinstance(v, bool)) for v in (low, high)):
            return band_label(low, high, integer, unit_of(variable))
    if isinstance(level, str):
        return level
    return "unnamed level"


def _bounds(low: Any, high: Any) -> str | None:
    return f"{low:.3f} to {high:.3f}" if isinstance(low, float) and isinstance(high, float) else None


def auc_bounds_lines(discrimination: Any) -> list[str]:
    """Sentences on the AUCs a site withheld: the range its released ROC bands allow each, for the site's whole
    table and then within each subgroup level (``discrimination.auc_bounds``, ``.subgroup_auc_bounds``)."""
    if not isinstance(discrimination, Mapping):
        return []
    found = discrimination.get("auc_bounds")
    ranges = [
        f"{site} {text}"
        for site, bounds in sorted(found.items() if isinstance(found, Mapping) else [])
        if isinstance(bounds, Mapping) and (text := _bounds(bounds.get("low"), bounds.get("high")))
    ]
    levels = []
    by_site = discrimination.get("subgroup_auc_bounds")
    for site, variables in sorted(by_site.items() if isinstance(by_site, Mapping) else []):
        for variable, found_levels in variables.items() if isinstance(variables, Mapping) else []:
            for label, bounds in found_levels.items() if isinstance(found_levels, Mapping) else []:
                if isinstance(bounds, Mapping) and (text := _bounds(bounds.get("low"), bounds.get("high"))):
                    levels.append(f"{site}, {variable} {label}: {text}")
    lines = []
    if ranges:
        sites = "1 site" if len(ranges) == 1 else f"{len(ranges)} sites"
        lines.append(
            f"AUC withheld at {sites} (not pooled); the smallest and largest AUC each site's released ROC band "
            "counts allow: " + "; ".join(ranges) + "."
        )
    if levels:
        count = "1 subgroup level" if len(levels) == 1 else f"{len(levels)} subgroup levels"
        lines.append(
            f"AUC withheld within {count} (not pooled); the smallest and largest AUC each level's released ROC "
            "band counts allow: " + "; ".join(levels) + "."
        )
    return lines
