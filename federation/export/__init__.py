"""Tidy tables a coordinator can take away: CSV for a statistics package or a paper's tables, plus the JSON.

``federation export --store study.db --out-dir DIR`` writes, for one study:

- one CSV per table in :data:`TABLES` (one row per site and analysis level; pooled results in rows whose
  ``site_id`` is ``pooled``), each with a header row, UTF-8, comma-separated;
- ``codebook.csv``: every file's columns and what they mean;
- ``analysis.json``: the full analysis, as ``federation analyze --json`` prints it;
- ``decisions.json`` and, when the sites released the 2×2 at two or more thresholds, ``threshold_accuracy``,
  ``threshold_choice``, ``net_benefit_sites`` and ``net_benefit_pooled`` (:mod:`federation.decisions`);
- ``releases.json``: every stored release the analysis rests on (signed, as the sites sent them).

Conventions: a count a site withheld is ``NA`` (never a word in a number column); a quantity that is not
defined is ``NA`` too, and the ``withheld`` column of a row names which of its counts the site withheld.
Numbers are written in full precision; band edges as the coordinator wrote them. pandas reads every file
with ``pd.read_csv(path)`` (``NA`` is read as missing), R with ``read.csv(path)``.

Adding a table: write a function ``(context) -> iterable of row dicts`` and register it with
:func:`tidy_table` (name, one-line title, and each column's meaning). Every registered table is written,
and listed in the codebook; a table with no rows for a study is not written.

The parts: ``registry`` (the table registry and the cell conventions), one module of table writers per
family (``accuracy``, ``subgroups``, ``comparisons``, ``pooled``; imported here in the order the tables are
written), and ``writer`` (:func:`export_study`).
"""

from __future__ import annotations

# isort: off
# Importing a module registers its tables; this order is the order they are written and listed in the codebook.
from . import accuracy, subgroups, comparisons, pooled  # noqa: F401

# isort: on
from .registry import TABLES, ExportContext, TidyTable, tidy_table
from .writer import ExportResult, export_study

__all__ = ["ExportContext", "ExportResult", "TABLES", "TidyTable", "export_study", "tidy_table"]
