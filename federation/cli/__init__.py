"""`federation`: the coordinator's command line.

The parts: ``study_commands`` (keys, bundles, requests, enrolment, ingest), ``result_commands`` (analyze, plan,
report, export, demo) and ``parser`` (:func:`build_parser`, :func:`main`).
"""

from __future__ import annotations

from .parser import EPILOG, build_parser, main
from .result_commands import add_decision_options, format_table
from .study_commands import load_bundle_hash

__all__ = ["EPILOG", "add_decision_options", "build_parser", "format_table", "load_bundle_hash", "main"]
