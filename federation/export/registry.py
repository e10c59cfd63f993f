"""The export's registry of table writers (:func:`tidy_table`) and the conventions every table keeps:
``NA`` for a withheld or undefined value, numbers in full precision, band edges as written, shared columns.
"""

from __future__ import annotations

import csv
import io
import math
from collections.abc import Callable, Iterable, Mapping
from dataclasses import dataclass
from typing import Any

from federation.release_values import number_or_none as _number

NA = "NA"
POOLED = "pooled"
HEADLINE = "headline"  # the pooled model the report leads with (analysis.json: pooled, model "headline")


@dataclass(frozen=True)
class ExportContext:
    """What a table writer reads: the analysis (``federation analyze --json``) and each site's release
    sections (``roc``, ``calibration``, ``margin``, ``agreement``, ``paired``, ``subgroups``, ...)."""

    study_id: str
    analysis: dict[str, Any]
    sections: Mapping[str, Mapping[str, Any]]
    integer_variables: frozenset[str] = frozenset()


@dataclass(frozen=True)
class TidyTable:
    name: str  # file name without ".csv"
    title: str
    columns: tuple[tuple[str, str], ...]  # (column, meaning), in file order
    rows: Callable[[ExportContext], Iterable[Mapping[str, Any]]]


TABLES: dict[str, TidyTable] = {}


def tidy_table(
    name: str, title: str, columns: Iterable[tuple[str, str]]
) -> Callable[[Callable[[ExportContext], Iterable[Mapping[str, Any]]]], Callable[..., Any]]:
    """Register a table writer under ``name`` (see the module docstring)."""

    def register(function: Callable[[ExportContext], Iterable[Mapping[str, Any]]]) -> Callable[..., Any]:
        if name in TABLES:
            raise ValueError(f"export table {name!r} is registered twice")
        TABLES[name] = TidyTable(name, title, tuple(columns), function)
        return function

    return register


# --- helpers ------------------------------------------------------------------------------------------


def _cell(value: Any) -> str:
    """A CSV cell: NA for a missing or withheld value, numbers in full precision, text as it is."""
    if value is None:
        return NA
    if isinstance(value, bool):
        return "1" if value else "0"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            return NA
        return str(int(value)) if value.is_integer() and abs(value) < 1e15 else repr(value)
    return str(value)


def _interval(prefix: str, value: Any) -> dict[str, float | None]:
    value = value if isinstance(value, dict) else {}
    return {
        prefix: _number(value.get("estimate")),
        f"{prefix}_ci_low": _number(value.get("ci_low")),
        f"{prefix}_ci_high": _number(value.get("ci_high")),
    }


def _withheld(names: Iterable[str]) -> str:
    return ";".join(names)


def _edge(value: Any) -> float | None:
    number = _number(value)
    return None if number is None else float(f"{number:.12g}")


def _csv_text(table: TidyTable, rows: list[Mapping[str, Any]]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    names = [name for name, _ in table.columns]
    writer.writerow(names)
    for row in rows:
        writer.writerow([_cell(row.get(name)) for name in names])
    return buffer.getvalue()


_SITE = ("site_id", "the site, or 'pooled' for a result pooled across sites")


_BAND_COLUMNS = (
    ("score_low", "band's lower score edge (inclusive); NA = open"),
    ("score_high", "band's upper score edge (exclusive); NA = open"),
)


_POOLED_COLUMNS = (
    ("estimate", "the estimate"),
    ("ci_low", "95% confidence interval, lower end"),
    ("ci_high", "95% confidence interval, upper end"),
    ("se", "standard error (on the scale of the site's estimate)"),
)
