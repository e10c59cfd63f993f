"""`federation` commands that turn releases into results: analyze, plan, report, export, and the demo."""

from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from federation.protocol import ValidationToolError
from federation.protocol.cli_support import print_json

from ..store import Store

if TYPE_CHECKING:  # imported late at run time: scipy makes `federation --help` slow
    from ..decisions import DecisionSettings


def cmd_analyze(args: argparse.Namespace) -> int:
    from ..analysis import analyze, enrolled_without_release, release_sections  # scipy: imported here
    from ..further_analysis import read_covariates
    from ..summary import format_summary

    covariates = read_covariates(args.covariates) if args.covariates else None  # as report: the file first
    store = _existing_store(args.store)
    result = analyze(store, args.study_id, covariates=covariates)
    missing = enrolled_without_release(store, result["study_id"])
    if args.json:
        print_json(result)
    else:
        print(format_summary(result, release_sections(store, result["study_id"])))
    return _name_sites_without_release(missing, args.json)


def _existing_store(path: Path) -> Store:
    """The study store at ``path``; a mistyped path is an error, never a new empty store."""
    if not Path(path).is_file():
        raise ValidationToolError(f"{path}: study store not found")
    return Store(path)


def _name_sites_without_release(missing: list[str], as_json: bool) -> int:
    """Name the enrolled sites that sent nothing (on stderr under --json, so that stdout stays one JSON
    document) and return the exit code: partial (3) when any is missing."""
    from federation.protocol.cli_support import EXIT_OK, EXIT_PARTIAL

    if missing:
        print(
            f"no release yet from {len(missing)} enrolled site(s): {', '.join(missing)}",
            file=sys.stderr if as_json else sys.stdout,
        )
    return EXIT_PARTIAL if missing else EXIT_OK


def cmd_plan(args: argparse.Namespace) -> int:
    from ..plan import format_plan, plot_plan, run_plan  # scipy and matplotlib: imported when planning

    result = run_plan(args)
    if args.plot:
        plot_plan(result, args.plot)
        result["plot"] = str(args.plot)
    if args.json:
        print_json(result)
    else:
        print(format_plan(result))
        if args.plot:
            print(f"wrote {args.plot}")
    return 0


def format_table(result: dict) -> str:
    """The primary table (kept here for callers of the first version; see federation.summary)."""
    from ..summary import format_table as primary_table

    return primary_table(result)


def _decision_settings(args: argparse.Namespace) -> DecisionSettings:
    from ..decisions import DecisionSettings, parse_probability_range

    low, high = parse_probability_range(args.threshold_probabilities)
    return DecisionSettings(args.target_sensitivity, low, high, args.bootstrap)


def add_decision_options(p: argparse.ArgumentParser) -> None:
    """Options of the threshold-choice and net-benefit results (report, export)."""
    p.add_argument(
        "--target-sensitivity",
        type=float,
        help="choose the highest released threshold whose pooled sensitivity reaches this (default: the "
        "threshold with the highest pooled Youden's index)",
    )
    p.add_argument(
        "--threshold-probabilities",
        default="0.01:0.99",
        metavar="LOW:HIGH",
        help="range of threshold probabilities for net benefit (decision curve), e.g. 0.05:0.3 (0.01:0.99)",
    )
    p.add_argument(
        "--bootstrap",
        type=int,
        default=10,
        help="bootstrap resamples of sites for the chosen threshold's interval (10: a quick look; 200+ for the record)",
    )


def cmd_report(args: argparse.Namespace) -> int:
    from federation.protocol.cli_support import EXIT_OK, EXIT_PARTIAL

    from ..further_analysis import read_covariates
    from ..report import write_report

    covariates = read_covariates(args.covariates) if args.covariates else None
    report = write_report(args.store, args.out, args.study_id, covariates, _decision_settings(args))
    missing = report.enrolled_without_release
    if args.json:
        print_json({"out": str(args.out), **report.to_dict()})
    else:
        print(
            f"wrote {args.out} (study {report.study_id}: {len(report.sites)} site(s) released, "
            f"{len(report.sites_pooled)} pooled)"
        )
        if missing:
            print(f"no release yet from {len(missing)} enrolled site(s): {', '.join(missing)}")
    return EXIT_PARTIAL if missing else EXIT_OK


def cmd_export(args: argparse.Namespace) -> int:
    from ..export import export_study  # scipy: imported here so `federation --help` starts fast

    result = export_study(_existing_store(args.store), args.out_dir, args.study_id, decisions=_decision_settings(args))
    missing = result.enrolled_without_release
    if args.json:
        print_json(result.to_dict())
    else:
        print(f"wrote {len(result.files)} files to {result.out_dir} (study {result.study_id}):")
        print("  " + ", ".join(result.files))
    return _name_sites_without_release(missing, args.json)


def cmd_demo(args: argparse.Namespace) -> int:
    # The demo drives both sides of the invented consortium, so it lives in `simulations`.
    from simulations.demo import run_demo

    return run_demo(args.out_dir, engine=args.engine, seed=args.seed)
