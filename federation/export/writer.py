"""Writing one study's export: every registered table with rows, the decision tables, codebook and JSON."""

from __future__ import annotations

import csv
import io
import json
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from federation.protocol.cli_support import write_atomic

from ..analysis import analyze, enrolled_without_release, release_sections
from ..decisions import DECISION_TABLES, DecisionSettings, decision_analysis, decision_rows
from ..store import Store
from .registry import TABLES, ExportContext, TidyTable, _csv_text


@dataclass(frozen=True)
class ExportResult:
    study_id: str
    out_dir: Path
    files: tuple[str, ...]
    enrolled_without_release: tuple[str, ...]

    def to_dict(self) -> dict[str, Any]:
        return {
            "study_id": self.study_id,
            "out_dir": str(self.out_dir),
            "files": list(self.files),
            "enrolled_without_release": list(self.enrolled_without_release),
        }


def _codebook(written: list[TidyTable]) -> str:
    buffer = io.StringIO()
    writer = csv.writer(buffer, lineterminator="\n")
    writer.writerow(["file", "column", "meaning"])
    for table in written:
        writer.writerow([f"{table.name}.csv", "", table.title])
        for column, meaning in table.columns:
            writer.writerow([f"{table.name}.csv", column, meaning])
    return buffer.getvalue()


def _decision_tables(store: Store, study: str, settings: DecisionSettings | None) -> tuple[dict[str, Any], list]:
    """Threshold choice and net benefit (:mod:`federation.decisions`): the result and its tidy tables."""
    settings = settings or DecisionSettings()
    result = decision_analysis(
        store.releases(study),
        store.score_kind(study),
        target_sensitivity=settings.target_sensitivity,
        bootstrap=settings.bootstrap,
        range_low=settings.range_low,
        range_high=settings.range_high,
    )
    tables = []
    if result["thresholds"]:
        for name, rows in decision_rows(result).items():
            title, columns = DECISION_TABLES[name]
            if rows:
                tables.append((TidyTable(name, title, columns, lambda _context, rows=rows: rows), rows))
    return result, tables


def export_study(
    store: Store,
    out_dir: Path,
    study_id: str | None = None,
    analysis: dict[str, Any] | None = None,
    decisions: DecisionSettings | None = None,
) -> ExportResult:
    """Write the study's tidy tables, codebook and JSON into ``out_dir`` (see the module docstring).

    ``analysis``: the study's analysis when the caller already has it (``analyze(store, study_id)``);
    ``decisions``: the coordinator's settings for threshold choice and net benefit (``decisions.json`` and
    the ``threshold_*`` and ``net_benefit_*`` tables, when the sites released the 2×2 at several thresholds).
    """
    analysis = analysis if analysis is not None else analyze(store, study_id)
    study = analysis["study_id"]
    context = ExportContext(study, analysis, release_sections(store, study), store.integer_features(study))
    out_dir = Path(out_dir)
    written: list[TidyTable] = []
    files: list[str] = []
    tables = [(table, list(table.rows(context))) for table in TABLES.values()]
    choice, decision_tables = _decision_tables(store, study, decisions)
    for table, rows in [*tables, *decision_tables]:
        if not rows:
            continue
        write_atomic(out_dir / f"{table.name}.csv", _csv_text(table, rows).encode("utf-8"))
        written.append(table)
        files.append(f"{table.name}.csv")
    write_atomic(out_dir / "codebook.csv", _codebook(written).encode("utf-8"))
    write_atomic(out_dir / "decisions.json", (json.dumps(choice, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    write_atomic(out_dir / "analysis.json", (json.dumps(analysis, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    releases = [stored.release.body() | {"signature": stored.release.signature} for stored in store.releases(study)]
    write_atomic(out_dir / "releases.json", (json.dumps(releases, indent=2, sort_keys=True) + "\n").encode("utf-8"))
    files += ["codebook.csv", "analysis.json", "decisions.json", "releases.json"]
    return ExportResult(study, out_dir, tuple(files), tuple(enrolled_without_release(store, study)))
