"""`federation`'s argument parser (every subcommand, its help and examples) and :func:`main`."""

from __future__ import annotations

import argparse
from collections.abc import Sequence
from pathlib import Path

from federation.protocol.cli_support import ArgumentParser, option, run_cli
from federation.protocol.cli_support import examples as _examples

from .result_commands import add_decision_options, cmd_analyze, cmd_demo, cmd_export, cmd_plan, cmd_report
from .study_commands import cmd_bundle_pack, cmd_bundle_show, cmd_enrol, cmd_ingest, cmd_keys_new, cmd_request_new

EPILOG = """\
a study, offline (files carried by hand):
  federation keys new --out-dir coordinator/
  federation bundle pack --model model.onnx --schema schema.toml --sign coordinator/coordinator.key --out model.bundle
  federation request new --store study.db --study-id study-1 --bundle model.bundle \\
      --sign coordinator/coordinator.key --out request.json
  (each site: site-agent init / check / run, then hands back release.json and site.pub)
  federation enrol --store study.db --site-id SITE --key SITE/site.pub
  federation ingest --store study.db releases/*.json
  federation analyze --store study.db
  federation report --store study.db --out report.html
  federation export --store study.db --out-dir results/

online (Flower deployment engine): certs new, serve, enrol --node-key, run; see docs/deployment.md.
guides: docs/coordinator.md, docs/site-it.md, docs/ethics-board.md

exit codes:
  0  done
  1  a usage or input error (bad flag, missing or malformed file)
  2  refused: a signature or hash does not verify, a site's policy or the coordinator's checks refused
  3  partial: done, but some sites have not released (analyze, report, export, run)
  4  online round not completed: the SuperLink is unreachable, the quorum was not reached, or the round was
     cut short (continue with `federation run --resume`)
every error is one line naming the file, field and rule broken; none carries a value from a record.
"""


def build_parser() -> argparse.ArgumentParser:
    parser = ArgumentParser(
        prog="federation",
        description="Coordinator tools: sign a frozen model, issue study requests, enrol sites, "
        "ingest their signed releases and pool the results. It validates a model across sites; it never produces "
        "a screening result or risk report for one person. `federation COMMAND --help` explains each command.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    sub = parser.add_subparsers(title="commands", metavar="COMMAND")

    keys = sub.add_parser("keys", help="coordinator signing keys").add_subparsers(metavar="ACTION")
    p = keys.add_parser(
        "new",
        help="make coordinator.key (private, mode 0600) and coordinator.pub",
        description="Make the coordinator's signing key pair. coordinator.key signs bundles and requests: keep it "
        "secret. coordinator.pub goes to every site (`site-agent init --trust`).",
        epilog=_examples("federation keys new --out-dir coordinator/"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(p, "--out-dir", "--out", dest="out_dir", type=Path, required=True, help="folder to write the key pair into")
    p.add_argument("--json", action="store_true", help="print the file paths and key id as JSON")
    p.set_defaults(handler=cmd_keys_new)

    bundle = sub.add_parser("bundle", help="pack, sign and inspect model bundles").add_subparsers(metavar="ACTION")
    p = bundle.add_parser(
        "pack",
        help="pack a frozen model and its input schema into one signed file",
        description="Pack a frozen model (ONNX, or a JSON scorecard) with its input schema into one signed "
        "bundle file. Sites verify the signature against the coordinator key they pinned before reading it.",
        epilog=_examples(
            "federation bundle pack --model model.onnx --schema schema.toml --sign coordinator/coordinator.key \\\n"
            "    --name my-screen --out model.bundle"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--model", type=Path, required=True, help="model file: .onnx, or .json scorecard")
    p.add_argument("--schema", type=Path, required=True, help="input schema (TOML, see docs/formats.md)")
    p.add_argument("--threshold", type=float, help="screen-positive when score >= this (default 0.5 for probabilities)")
    p.add_argument("--sign", type=Path, required=True, help="coordinator private key (coordinator.key)")
    p.add_argument("--name", default="model", help="a short name for the model shown to sites")
    p.add_argument("--out", type=Path, required=True, help="bundle file to write")
    p.add_argument("--json", action="store_true", help="print the file written and its SHA-256 as JSON")
    p.set_defaults(handler=cmd_bundle_pack)
    p = bundle.add_parser(
        "show",
        help="show what a bundle holds",
        description="Show a bundle's hash, signer, model kind, thresholds and the inputs the model expects. "
        "With --trust the signature is verified (exit code 2 if it does not verify).",
        epilog=_examples("federation bundle show model.bundle --trust coordinator.pub"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("bundle", type=Path)
    p.add_argument("--trust", type=Path, action="append", help="coordinator public key to verify the signature with")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.set_defaults(handler=cmd_bundle_show)

    request = sub.add_parser("request", help="issue study requests").add_subparsers(metavar="ACTION")
    p = request.add_parser(
        "new",
        help="record and sign a request for the sites of a study",
        description="Record a study request in the store and write it, signed, to a file. Send the file and the "
        "bundle to every site (offline), or put both in the study folder for `federation serve` (online). "
        "Warns on stderr, one line each, when an analysis is known to be costly for the sites' disclosure "
        "control (agreement, paired, fine or many bands, many thresholds, many subgroup levels); the request "
        "is written anyway.",
        epilog=_examples(
            "federation request new --store study.db --study-id study-1 --bundle model.bundle \\\n"
            "    --sign coordinator/coordinator.key --out request.json",
            "federation request new ... --analyses confusion,roc,subgroups --subgroup sex --subgroup age_months=24,36",
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", type=Path, required=True, help="study store (SQLite file; created if missing)")
    p.add_argument("--study-id", required=True, help="study identifier (letters, digits, . _ -)")
    p.add_argument("--bundle", type=Path, required=True, help="the signed model bundle the sites will run")
    p.add_argument("--sign", type=Path, required=True, help="coordinator private key")
    p.add_argument("--thresholds", help="comma-separated thresholds (default: the bundle's)")
    p.add_argument(
        "--primary-threshold",
        metavar="T",
        help="the threshold of the primary result, the 2x2 table sites withhold last (default: the bundle's "
        "threshold if asked for, else the first of --thresholds); added to the thresholds if missing",
    )
    p.add_argument(
        "--analyses",
        default="confusion",
        help="comma-separated analyses: confusion, roc, calibration, margin, agreement, subgroups, paired "
        "(default: confusion)",
    )
    p.add_argument(
        "--subgroup",
        action="append",
        metavar="VAR[=EDGE,...]",
        help="split results by a model input: a category (sex), or a number cut at edges (age_months=24,36); "
        "repeatable; sites refuse variables their policy does not allow",
    )
    option(
        p,
        "--roc-bands",
        "--bands",
        dest="roc_bands",
        help="comma-separated score band edges for the ROC analysis (default: 0.05 steps for probabilities)",
    )
    p.add_argument("--margin-bands", help="comma-separated distances from the threshold for the margin analysis")
    option(
        p,
        "--calibration-bands",
        "--calibration-bins",
        dest="calibration_bands",
        help="comma-separated predicted-risk band edges for the calibration analysis (default: deciles)",
    )
    p.add_argument("--compare", type=Path, metavar="OTHER.bundle", help="a second bundle for a paired comparison")
    p.add_argument("--request-id", help="request identifier (default: a random one)")
    p.add_argument("--out", type=Path, required=True, help="request file to write (send it to the sites)")
    p.add_argument("--json", action="store_true", help="print the request's identifiers as JSON")
    p.set_defaults(handler=cmd_request_new)

    p = sub.add_parser(
        "enrol",
        help="enrol a site's release-signing public key",
        description="Enrol a site: store its release-signing public key (site.pub, handed over out of band), so "
        "that its releases verify at ingest. Online, --node-key also binds the site's SuperNode key.",
        epilog=_examples("federation enrol --store study.db --site-id clinic-a --key clinic-a/site.pub"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", type=Path, required=True, help="study store (SQLite file)")
    p.add_argument("--site-id", required=True, help="the site's identifier (as in its site.toml)")
    p.add_argument("--key", type=Path, required=True, help="the site's site.pub")
    p.add_argument("--node-key", type=Path, help="the site's node.pub: binds the site to its SuperNode (online)")
    p.add_argument("--json", action="store_true", help="print the site and key id as JSON")
    p.set_defaults(handler=cmd_enrol)

    p = sub.add_parser(
        "ingest",
        help="verify and store signed releases (all or none)",
        description="Verify each release file (site signature against the enrolled key, request and bundle "
        "hashes, counts consistent) and store them all in one transaction; if one fails, none is stored and "
        "the exit code is 2.",
        epilog=_examples("federation ingest --store study.db releases/*.json"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", type=Path, required=True, help="study store (SQLite file)")
    p.add_argument("releases", type=Path, nargs="+", help="release files from sites")
    p.add_argument("--json", action="store_true", help="print what was stored as JSON")
    p.set_defaults(handler=cmd_ingest)

    p = sub.add_parser(
        "analyze",
        help="per-site and pooled results from the stored releases",
        description="Every result of the study, in the order a validation paper reports them: per-site 2x2 "
        "tables with the participant flow, sensitivity and specificity with 95% intervals and random-effects "
        "pooled estimates; then, where the study asked for them, discrimination (ROC), calibration, subgroups, "
        "accuracy by score margin, agreement with a second reference standard and the paired comparison. "
        "A count a site withheld is shown as '·'. Exit codes: 0 done; 1 bad input; 3 done, but some enrolled "
        "sites have sent no release for this study (they are named).",
        epilog=_examples("federation analyze --store study.db", "federation analyze --store study.db --json > a.json"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", type=Path, required=True, help="study store (SQLite file)")
    p.add_argument("--study-id", help="which study (needed when the store holds several)")
    p.add_argument(
        "--covariates",
        type=Path,
        metavar="FILE",
        help="CSV of site covariates for the meta-regression: a site_id column and one column per covariate "
        "(numbers, or categories such as the setting)",
    )
    p.add_argument("--json", action="store_true", help="JSON on stdout")
    p.set_defaults(handler=cmd_analyze)

    p = sub.add_parser(
        "report",
        help="write the validation report: one self-contained HTML file from the study store",
        description="Write the validation report (summary, participant flow, forest plots, methods, cautions, "
        "and the data behind every figure as CSV) to one HTML file that opens offline in any browser. It is "
        "built from the store alone and every stored release's signature is checked again. Exit codes: 0 "
        "written; 1 bad input (no store, no such study, no releases); 2 a stored release no longer verifies; "
        "3 written, but some enrolled sites have sent no release for this study.",
        epilog=_examples("federation report --store study.db --out report.html --bootstrap 200"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", type=Path, required=True, help="study store (SQLite file made by the other commands)")
    p.add_argument("--study-id", help="which study (needed when the store holds several)")
    p.add_argument("--out", type=Path, required=True, help="HTML file to write, e.g. report.html")
    p.add_argument(
        "--covariates",
        type=Path,
        metavar="FILE",
        help="CSV of site covariates for the meta-regression: a site_id column and one column per covariate "
        "(numbers, or categories such as the setting)",
    )
    add_decision_options(p)
    p.add_argument("--json", action="store_true", help="print what was written as JSON (sites, sections)")
    p.set_defaults(handler=cmd_report)

    p = sub.add_parser(
        "plan",
        help="before the study: expected interval widths and how many sites it takes, by simulation",
        description="Simulate consortia from what you expect (sensitivity, specificity, prevalence range, "
        "between-site SD on the logit scale, site sizes, minimum cell size), withhold each simulated table as a "
        "site's minimum-cell-size rule would, pool it with the headline model (exact binomial GLMM, withheld "
        "cells censored) and report the median width of the pooled and prediction intervals and the share of "
        "sites whose tables come back partly withheld. With --target-width, search for the fewest sites of "
        "--participants each whose pooled interval is no wider than that. Each simulated consortium takes "
        "about 0.1-1 s; the search runs several plans.",
        epilog=_examples(
            "federation plan --sensitivity 0.85 --specificity 0.8 --prevalence 0.05:0.3 --tau-sensitivity 0.5 "
            "--tau-specificity 0.5 --sites 8 --participants 300",
            "federation plan ... --target-width 0.1 --plot plan.svg --json > plan.json",
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--sensitivity", type=float, metavar="P", required=True, help="expected sensitivity (0-1)")
    p.add_argument("--specificity", type=float, metavar="P", required=True, help="expected specificity (0-1)")
    p.add_argument(
        "--prevalence",
        required=True,
        metavar="P|LOW:HIGH",
        help="expected prevalence, or a range LOW:HIGH across sites (e.g. 0.05:0.3)",
    )
    p.add_argument(
        "--tau-sensitivity", type=float, metavar="SD", default=0.5, help="between-site SD of logit sensitivity (0.5)"
    )
    p.add_argument(
        "--tau-specificity", type=float, metavar="SD", default=0.5, help="between-site SD of logit specificity (0.5)"
    )
    p.add_argument(
        "--correlation",
        type=float,
        metavar="R",
        default=0.0,
        help="between-site correlation of logit sensitivity and specificity",
    )
    p.add_argument("--site-sizes", metavar="N,N,...", help="participants expected at each site, e.g. 150,300,800")
    p.add_argument("--sites", type=int, metavar="K", help="number of sites (with --participants)")
    p.add_argument("--participants", type=int, metavar="N", help="participants per site")
    p.add_argument("--min-cell-size", type=int, metavar="K", default=10, help="the sites' minimum cell size (10)")
    p.add_argument("--zeros-withheld", action="store_true", help="the sites withhold counts of 0 as well")
    p.add_argument("--level", type=float, metavar="L", default=0.95, help="confidence level (0.95)")
    p.add_argument(
        "--target-width", type=float, metavar="W", help="widest acceptable pooled interval (full width, e.g. 0.1)"
    )
    p.add_argument(
        "--measure",
        choices=("sensitivity", "specificity", "both"),
        default="both",
        help="which interval must meet --target-width (both)",
    )
    p.add_argument(
        "--max-sites", type=int, metavar="K", default=100, help="largest number of sites the search tries (100)"
    )
    p.add_argument("--simulations", type=int, metavar="N", default=20, help="simulated consortia per plan (20)")
    p.add_argument("--seed", type=int, metavar="N", default=2026, help="random seed; the same seed gives the same plan")
    p.add_argument("--plot", type=Path, metavar="FILE", help="write the plan's figure to this file (.svg or .png)")
    p.add_argument("--json", action="store_true", help="JSON on stdout")
    p.set_defaults(handler=cmd_plan)

    p = sub.add_parser(
        "export",
        help="write the study's results as tidy CSV tables plus the JSON, for a statistics package or a paper",
        description="Write one CSV per result (participant flow, 2x2 tables and accuracy, ROC bands, "
        "discrimination, calibration, subgroups, margin bands, agreement, paired comparison, every pooled "
        "estimate; when the sites released several thresholds, pooled accuracy by threshold, the threshold "
        "chosen and net benefit), one row per site and analysis level, pooled results in rows whose site_id is "
        "'pooled'; "
        "codebook.csv says what every column means; analysis.json and releases.json hold the full analysis and "
        "the signed releases. A count a site withheld is NA. Exit codes: 0 written; 1 bad input; 3 written, "
        "but some enrolled sites have sent no release for this study.",
        epilog=_examples(
            "federation export --store study.db --out-dir results/",
            "python -c \"import pandas as pd; print(pd.read_csv('results/accuracy.csv'))\"",
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--store", type=Path, required=True, help="study store (SQLite file)")
    p.add_argument("--study-id", help="which study (needed when the store holds several)")
    p.add_argument("--out-dir", type=Path, required=True, help="folder to write the tables into (created if missing)")
    add_decision_options(p)
    p.add_argument("--json", action="store_true", help="print the files written as JSON")
    p.set_defaults(handler=cmd_export)

    from ..deploy.commands import add_deploy_commands

    add_deploy_commands(sub)

    p = sub.add_parser(
        "demo",
        help="run the invented demo consortium end to end",
        description="Generate an invented consortium of eight sites, run one study over it and write the table, "
        "the store, every site folder and the report into --out-dir. All data is invented.",
        epilog=_examples("federation demo --out-dir demo-output --engine offline"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(
        p,
        "--out-dir",
        "--out",
        dest="out_dir",
        type=Path,
        required=True,
        help="folder for the demo's data, sites, store and releases",
    )
    p.add_argument(
        "--engine",
        choices=("simulation", "inprocess", "offline"),
        default="simulation",
        help="simulation: Flower simulation engine (default); inprocess: Flower apps without Ray; "
        "offline: the command-line path with release files",
    )
    p.add_argument("--seed", type=int, default=2026)
    p.set_defaults(handler=cmd_demo)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    return run_cli(build_parser(), argv, "federation")
