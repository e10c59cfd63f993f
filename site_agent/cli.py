"""`site-agent`: the site's command line (run by site IT inside the site's network)."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Callable, Sequence
from pathlib import Path
from typing import Any, TypeVar

from federation.protocol import ValidationToolError
from federation.protocol.cli_support import ArgumentParser, option, print_json, run_cli, write_atomic
from federation.protocol.cli_support import examples as _examples
from federation.protocol.crashpoints import crash_point
from federation.protocol.progress import records_progress
from federation.protocol.words import CELLS, WITHHELD

from . import models, review
from .config import init_site, load_site

T = TypeVar("T")


def _read(path: Path, what: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise ValidationToolError(f"{path}: {what} not found") from None


def cmd_init(args: argparse.Namespace) -> int:
    root = init_site(args.site_dir, args.site_id, args.trust)
    site = load_site(root)
    if args.json:
        print_json(
            {
                "site_id": site.site_id,
                "site_dir": str(root),
                "policy": str(root / "site.toml"),
                "private_key": str(root / "site.key"),
                "public_key": str(root / "site.pub"),
                "ledger": str(root / "ledger.jsonl"),
                "node_private_key": str(root / "node.key"),
                "node_public_key": str(root / "node.pub"),
                "hand_over": [str(root / "site.pub"), str(root / "node.pub")],
            }
        )
        return 0
    print(f"created site folder {root} for site {site.site_id}")
    print(f"  policy and settings: {root / 'site.toml'} (review it with your ethics board)")
    print(f"  release-signing key: {root / 'site.key'} (private) and {root / 'site.pub'} (public)")
    print(f"  node key (online):   {root / 'node.key'} (private) and {root / 'node.pub'} (public)")
    print(f"  ledger:              {root / 'ledger.jsonl'}")
    print(f"hand over to the coordinator: {root / 'site.pub'} (every study) and {root / 'node.pub'} (online rounds)")
    print("  the private keys site.key and node.key never leave this folder")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    from .approval import AwaitingApproval, record_sent
    from .preview import source_from_args
    from .runner import run_request  # pandas and scipy: imported here so `site-agent --help` starts fast

    site = load_site(args.site_dir)
    try:
        outcome = _answer(run_request, site, args, source_from_args(site, args.data, args.table, args.query))
    except AwaitingApproval as held:
        return review.print_held(held, args.site_dir)
    release = outcome.release
    if outcome.resent_at:
        print(
            f"site-agent: this request was answered before: the release recorded in the ledger at {outcome.resent_at} "
            "is written again, unchanged; the data and mapping given now were not used",
            file=sys.stderr,
        )
    write_atomic(args.out, outcome.release_bytes)
    crash_point("site:after-send")  # inert unless MSV_CRASH_AT says so (crash-safety tests)
    record_sent(site, outcome.release_bytes, "file", args.out)
    if args.json:
        print_json(json.loads(outcome.release_bytes))
        return 0
    print(f"release for study {release.study_id}, request {release.request_id} written to {args.out}")
    print(f"  recorded in the ledger {site.ledger_path}")
    for table in release.confusion:
        shown = "; ".join(f"{CELLS.get(c, c)} {WITHHELD if v is None else v}" for c, v in table.cells.items())
        print(f"  threshold {table.threshold}: {shown}")
    return 0


def _answer(answer: Callable[..., T], site: Any, args: argparse.Namespace, source: Any) -> T:
    """``answer`` (``run_request`` or ``preview_request``) on the files the command line names, with a progress
    bar on a terminal only (nothing when piped); a refusal raised as this terminal shows it
    (:func:`_for_this_terminal`), a release held for approval as it is."""
    from .approval import AwaitingApproval

    try:
        with records_progress() as progress:
            return answer(
                site,
                _read(args.request, "request file"),
                _read(args.bundle, "bundle file"),
                source,
                args.mapping,
                compare_bundle_bytes=_read(args.compare, "comparison bundle") if args.compare else None,
                progress=progress,
            )
    except AwaitingApproval:
        raise
    except ValidationToolError as exc:
        raise _for_this_terminal(exc, args) from None


def _for_this_terminal(exc: ValidationToolError, args: argparse.Namespace) -> ValidationToolError:
    """The refusal as the site's own terminal shows it: the --request path before a refusal of the request file
    itself, and after the detail the line that may travel to the coordinator.

    The path is added here, after the runner chose the travelling line and wrote the ledger: a folder layout can
    name people, projects or hosts, so it stays on this terminal.
    """
    text = str(exc)
    if getattr(exc, "input_file", None) == "request":
        text = f"{args.request}: {text}"
    sent = getattr(exc, "refusal", None)
    if sent and sent != str(exc):  # the detail stays here; only the travelling line may be passed on
        text = f"{text} (tell the coordinator only: {sent})"
    if text == str(exc):
        return exc
    error = ValidationToolError(text)
    error.exit_code = exc.exit_code
    return error


def _add_request_arguments(p: argparse.ArgumentParser) -> None:
    """What `run` and `check` both take: the site folder, the coordinator's request and bundle, the data."""
    option(
        p,
        "--site-dir",
        "--site",
        dest="site_dir",
        type=Path,
        required=True,
        help="site folder (made by `site-agent init`)",
    )
    p.add_argument("--request", type=Path, required=True, help="request file from the coordinator")
    p.add_argument("--bundle", type=Path, required=True, help="model bundle from the coordinator")
    _add_data_arguments(p)


def _add_data_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument(
        "--data",
        help="local records: a CSV or Parquet file, or a database URL (sqlite:///..., postgresql+psycopg://...); "
        "default: [data] in site.toml",
    )
    p.add_argument("--table", help="database table to read (with a database URL)")
    p.add_argument("--query", help="one read-only SELECT to read (with a database URL)")
    p.add_argument("--mapping", type=Path, help="mapping file (TOML); default: [data].mapping, else by name")
    option(
        p,
        "--compare",
        "--compare-bundle",
        dest="compare",
        type=Path,
        metavar="OTHER.bundle",
        help="the second bundle of a paired request (the coordinator's `request new --compare`)",
    )


def cmd_check(args: argparse.Namespace) -> int:
    from .preview import check_report, format_check, source_from_args
    from .runner import preview_request

    site = load_site(args.site_dir)
    preview = _answer(preview_request, site, args, source_from_args(site, args.data, args.table, args.query))
    if args.json:
        print_json(check_report(preview))
    else:
        print(format_check(preview))
    return 0


def cmd_map_suggest(args: argparse.Namespace) -> int:
    from .preview import schema_for_suggest, source_from_args, write_suggestion

    site = load_site(args.site_dir) if args.site_dir else None
    schema = schema_for_suggest(site, args.bundle, args.schema)
    source = source_from_args(None, args.data, args.table, args.query)
    if args.rows < 1:
        raise ValidationToolError("--rows: must be at least 1")
    notes = write_suggestion(source, schema, args.out, args.rows)
    if args.json:
        print_json({"out": str(args.out), "to_do": list(notes)})
        return 0
    print(f"wrote {args.out}: a proposed mapping. Check every line marked CONFIRM before using it.")
    for note in notes:
        print(f"  to do: {note}")
    return 0


cmd_ledger_verify = review.cmd_ledger_verify
cmd_ledger_show = review.cmd_ledger_show


def cmd_join(args: argparse.Namespace) -> int:
    from .supernode import JoinSettings, run_join

    settings = JoinSettings(
        site_dir=args.site_dir,
        superlink=args.superlink,
        root_certificates=args.root_certificates,
        runtime_port=args.runtime_port,
        max_restarts=args.max_restarts,
        task_poll_s=args.task_poll,
        warm_start=not args.cold_start,
    )
    return run_join(settings, lambda line: print(line, flush=True))


def cmd_app_hash(args: argparse.Namespace) -> int:
    from federation.protocol.app_bundle import build_app_bundle

    bundle = build_app_bundle()
    content, digest = bundle.content, bundle.sha256
    if args.out:
        write_atomic(args.out, content)
    allowed = load_site(args.site_dir).allowed_fab_sha256 if args.site_dir else None
    if args.json:
        print_json({"sha256": digest, "size": len(content), "allowed": None if allowed is None else digest in allowed})
        return 0
    print(digest)
    if allowed is not None:
        state = "listed" if digest in allowed else "NOT listed"
        print(f"{state} in {args.site_dir / 'site.toml'} [app] allowed_fab_sha256", file=sys.stderr)
    return 0


EPILOG = """\
answering a request offline (files carried by hand):
  site-agent init --site-id SITE --trust coordinator.pub --site-dir SITEDIR    # once; give SITEDIR/site.pub back
  site-agent map suggest --data export.csv --bundle model.bundle --site-dir SITEDIR --out mapping.toml
  site-agent model review model.bundle --site-dir SITEDIR                # inputs, kind, weights, signer
  site-agent model approve model.bundle --site-dir SITEDIR --by NAME     # once per model bundle
  site-agent check --site-dir SITEDIR --request request.json --bundle model.bundle --data export.csv \\
      --mapping mapping.toml                                              # what would leave; nothing signed
  site-agent run   --site-dir SITEDIR --request request.json --bundle model.bundle --data export.csv \\
      --mapping mapping.toml --out release.json                          # hand release.json back
  site-agent ledger verify --site-dir SITEDIR

online: `site-agent join` (outbound TLS to the coordinator only); approval: review, approve, reject, release.
guide: docs/site-it.md (install, keys, mapping, ports and paths); ethics board: docs/ethics-board.md

exit codes: 0 done; 1 a usage or input error (a bad option too); 2 refused (a signature, the site's policy,
a model not approved, a broken ledger); 3 partial (a release held for approval: nothing was sent); 4 `join`
could not stay online (no restarts left). Errors are one line naming the file, field and rule broken, and
never hold a value from a record.
"""


def build_parser() -> argparse.ArgumentParser:
    parser = ArgumentParser(
        prog="site-agent",
        description="Site agent: scores this site's records with a coordinator's signed, frozen model and "
        "writes a signed release holding only counts that pass the site's disclosure policy. "
        "Records never leave the site, and the agent keeps no per-person scores: it validates a model, it never "
        "produces a screening result or risk report for one person. `site-agent COMMAND --help` explains each "
        "command.",
        epilog=EPILOG,
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    sub = parser.add_subparsers(title="commands", metavar="COMMAND")

    p = sub.add_parser(
        "init",
        help="create a site folder: policy (site.toml), site keys, ledger",
        description="Create the site folder: site.toml (the disclosure policy and settings; review it with your "
        "ethics board), site.key (private, mode 0600; signs releases and the ledger), site.pub (give it to "
        "the coordinator), the ledger, and a copy of each pinned coordinator key.",
        epilog=_examples("site-agent init --site-id clinic-a --trust coordinator.pub --site-dir /srv/validation/site"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--site-id", required=True, help="this site's identifier, agreed with the coordinator")
    p.add_argument(
        "--trust", type=Path, action="append", required=True, help="coordinator public key to pin (repeat for several)"
    )
    option(p, "--site-dir", "--out", dest="site_dir", type=Path, required=True, help="site folder to create")
    p.add_argument("--json", action="store_true", help="print the paths created as JSON")
    p.set_defaults(handler=cmd_init)

    p = sub.add_parser(
        "run",
        help="answer one request offline and write the signed release file",
        description="Verify the request and bundle against the pinned coordinator keys and the site policy, read "
        "and score the local records, withhold small counts, record the release in the ledger and write it, "
        "signed, to --out. Run `site-agent check` first to see what it would release. Exit codes: 0 written; "
        "1 bad input; 2 refused (signature, policy); 3 held for approval (require_approval = true).",
        epilog=_examples(
            "site-agent run --site-dir SITE --request request.json --bundle model.bundle \\\n"
            "    --data export.csv --mapping mapping.toml --out release.json"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _add_request_arguments(p)
    p.add_argument("--out", type=Path, required=True, help="release file to write (hand it to the coordinator)")
    p.add_argument("--json", action="store_true", help="print the release JSON on stdout")
    p.set_defaults(handler=cmd_run)

    p = sub.add_parser(
        "check",
        help="preview what a request would release, without signing or sending anything",
        description="A preview: everything `site-agent run` does except signing, writing the ledger and writing "
        "a release. Shows the participant flow, the counts that would be released and what the policy "
        "withholds. Use it to test a mapping and to show the ethics board a release before it exists.",
        epilog=_examples(
            "site-agent check --site-dir SITE --request request.json --bundle model.bundle \\\n"
            "    --data export.csv --mapping mapping.toml"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    _add_request_arguments(p)
    p.add_argument("--json", action="store_true", help="machine-readable output: the unsigned release and more")
    p.set_defaults(handler=cmd_check)

    mapping = sub.add_parser("map", help="mapping files: local columns and codes -> the model's inputs")
    actions = mapping.add_subparsers(metavar="ACTION")
    p = actions.add_parser(
        "suggest",
        help="propose a mapping from the local columns, for a person to confirm",
        description="Look at the local columns and codes and write a proposed mapping file (TOML) from them to "
        "the model's inputs. Every guess is marked CONFIRM: read and correct it before use. Writes only the "
        "mapping file, never overwrites one, and records nothing in the ledger.",
        epilog=_examples(
            "site-agent map suggest --data export.csv --bundle model.bundle --site-dir SITE --out mapping.toml"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--data", required=True, help="local records: a CSV or Parquet file, or a database URL")
    p.add_argument("--table", help="database table (with a database URL)")
    p.add_argument("--query", help="one read-only SELECT (with a database URL)")
    p.add_argument("--schema", type=Path, help="the model's input schema (TOML)")
    p.add_argument("--bundle", type=Path, help="or the model bundle (verified with the keys pinned in --site-dir)")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, help="site folder whose pinned keys verify --bundle")
    p.add_argument("--rows", type=int, default=5000, help="how many records to look at (default 5000)")
    p.add_argument("--out", type=Path, required=True, help="mapping file to write (never overwritten)")
    p.add_argument("--json", action="store_true", help="print the file written and the to-do notes as JSON")
    p.set_defaults(handler=cmd_map_suggest)

    p = sub.add_parser(
        "join",
        help="join the coordinator's federation online (runs until stopped)",
        description="Start this site's Flower SuperNode and keep it connected to the coordinator's SuperLink "
        "(outbound TLS only; no inbound port). Requests are answered exactly as `site-agent run` answers them, "
        "using [data] in site.toml. Needs node.key from `site-agent init` and the site's hash listed in "
        "[app] allowed_fab_sha256 (see `site-agent app hash`). Run it as a service, as a dedicated user on a host "
        "with no other local users; stop it with Ctrl-C. It prints each connection retry as it happens and, when "
        "the SuperNode stops, the cause in one line: a certificate from another CA or no root certificate stops "
        "it (exit 2); a node key the SuperLink does not accept yet is retried with a growing pause.",
        epilog=_examples(
            "site-agent join --superlink coordinator.example.org:8000 --site-dir SITE --root-certificates ca.crt"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("--superlink", required=True, help="the coordinator's SuperLink, HOST:PORT")
    option(
        p,
        "--site-dir",
        "--site",
        dest="site_dir",
        type=Path,
        required=True,
        help="site folder (made by `site-agent init`)",
    )
    p.add_argument("--root-certificates", type=Path, help="the coordinator's CA certificate (ca.crt)")
    p.add_argument("--runtime-port", type=int, help="local port for the SuperNode's Runtime API (default: a free one)")
    p.add_argument(
        "--max-restarts", type=int, help="give up after this many SuperNode restarts, with exit code 4 (default: never)"
    )
    p.add_argument("--task-poll", type=float, help="seconds between the app runner's task polls (Flower: 1)")
    p.add_argument(
        "--cold-start",
        action="store_true",
        help="start every ClientApp as a new Python process (default: fork it from one warm process that has "
        "imported the agent once; see docs/deployment.md)",
    )
    p.set_defaults(handler=cmd_join)

    app = sub.add_parser("app", help="the app bundle this site runs online").add_subparsers(metavar="ACTION")
    p = app.add_parser(
        "hash",
        help="build the app bundle from the installed agent and print its SHA-256",
        epilog=_examples("site-agent app hash --site-dir SITE   # then list the hash under [app] allowed_fab_sha256"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(
        p,
        "--site-dir",
        "--site",
        dest="site_dir",
        type=Path,
        help="also say whether site.toml [app] allowed_fab_sha256 lists it",
    )
    p.add_argument("--out", type=Path, help="write the bundle (a zip holding only pyproject.toml) to review it")
    p.add_argument("--json", action="store_true", help="print the hash and whether site.toml lists it as JSON")
    p.set_defaults(handler=cmd_app_hash)

    led = sub.add_parser("ledger", help="inspect and verify the site's ledger").add_subparsers(metavar="ACTION")
    p = led.add_parser(
        "verify",
        help="check the hash chain and signatures; names the first bad line",
        description="Check that every ledger entry is signed by the site key and chained to the one before, and "
        "that every release file in the site folder is in the ledger. Exit code 2 names the first bad line. "
        "With --expect-head, also that the ledger still holds the head hash noted earlier (a ledger cut short "
        "keeps a valid chain).",
        epilog=_examples(
            "site-agent ledger verify --site-dir SITE --public-key /safe/copy/site.pub",
            "site-agent ledger verify --site-dir SITE --expect-head 3f5c0a...   # the hash written down last time",
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--public-key", type=Path, help="check against this copy of the site key (default: site.pub)")
    p.add_argument(
        "--expect-head",
        metavar="HASH",
        help="a head hash noted earlier (from `ledger show` or `ledger verify`): exit code 2 if no entry has it, "
        "i.e. entries were cut off the end since",
    )
    p.add_argument("--json", action="store_true", help="print the entry count, key id and last hash as JSON")
    p.set_defaults(handler=cmd_ledger_verify)
    p = led.add_parser(
        "show",
        help="list ledger entries and the head hash to write down",
        description="List every ledger entry in one line each (what was asked, released, refused, approved, sent) "
        "and end with the head hash: note it in the board's minutes; `ledger verify --expect-head` later tells "
        "whether entries were cut off since.",
        epilog=_examples("site-agent ledger show --site-dir SITE", "site-agent ledger show --site-dir SITE --json"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--json", action="store_true", help="every entry in full as JSON")
    p.set_defaults(handler=cmd_ledger_show)

    review.add_commands(sub)  # review, approve, reject, release
    models.add_commands(sub)  # model review, approve, reject
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    return run_cli(build_parser(), argv, "site-agent")


if __name__ == "__main__":
    sys.exit(main())
