"""`site-agent`: the site's command line (run by site IT inside the site's network)."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

from federation.protocol import ValidationToolError
from federation.protocol.cli_support import print_json, run_cli, write_atomic

from . import ledger
from .config import init_site, load_site
from .runner import run_request


def _read(path: Path, what: str) -> bytes:
    try:
        return Path(path).read_bytes()
    except FileNotFoundError:
        raise ValidationToolError(f"{path}: {what} not found") from None


def cmd_init(args: argparse.Namespace) -> int:
    root = init_site(args.out, args.site_id, args.trust)
    site = load_site(root)
    print(f"created site folder {root} for site {site.site_id}")
    print(f"  policy and settings: {root / 'site.toml'} (review it with your ethics board)")
    print(f"  release-signing key: {root / 'site.key'} (private) and {root / 'site.pub'} (give to the coordinator)")
    print(f"  ledger:              {root / 'ledger.jsonl'}")
    return 0


def cmd_run(args: argparse.Namespace) -> int:
    site = load_site(args.site)
    outcome = run_request(
        site,
        _read(args.request, "request file"),
        _read(args.bundle, "bundle file"),
        args.data,
        args.mapping,
    )
    release = outcome.release
    write_atomic(args.out, outcome.release_bytes)
    if args.json:
        print_json(json.loads(outcome.release_bytes))
        return 0
    print(f"release for study {release.study_id}, request {release.request_id} written to {args.out}")
    print(f"  recorded in the ledger {site.ledger_path}")
    for table in release.confusion:
        shown = ", ".join(f"{c}={'suppressed' if v is None else v}" for c, v in table.cells.items())
        print(f"  threshold {table.threshold}: {shown}")
    return 0


def cmd_ledger_verify(args: argparse.Namespace) -> int:
    site = load_site(args.site)
    count = ledger.verify_ledger(site.ledger_path, site.public_key())
    print(f"{site.ledger_path}: {count} entries, chain and signatures intact")
    return 0


def cmd_ledger_show(args: argparse.Namespace) -> int:
    site = load_site(args.site)
    entries = ledger.read_entries(site.ledger_path)
    if args.json:
        print_json(entries)
        return 0
    for entry in entries:
        details = entry.get("details", {})
        summary = {k: v for k, v in details.items() if k != "release"}
        print(f"{entry.get('seq'):>4}  {entry.get('time')}  {entry.get('event'):<17} {json.dumps(summary)}")
    return 0


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="site-agent",
        description="Site agent: scores this site's records with a coordinator's signed, frozen model and "
        "writes a signed release holding only counts that pass the site's disclosure policy. "
        "Records never leave the site.",
    )
    sub = parser.add_subparsers(title="commands", metavar="COMMAND")

    p = sub.add_parser("init", help="create a site folder: policy (site.toml), site keys, ledger")
    p.add_argument("--site-id", required=True, help="this site's identifier, agreed with the coordinator")
    p.add_argument(
        "--trust", type=Path, action="append", required=True, help="coordinator public key to pin (repeat for several)"
    )
    p.add_argument("--out", type=Path, required=True, help="site folder to create")
    p.set_defaults(handler=cmd_init)

    p = sub.add_parser("run", help="answer one request offline and write the signed release file")
    p.add_argument("--site", type=Path, required=True, help="site folder (made by `site-agent init`)")
    p.add_argument("--request", type=Path, required=True, help="request file from the coordinator")
    p.add_argument("--bundle", type=Path, required=True, help="model bundle from the coordinator")
    p.add_argument("--data", type=Path, help="local records (CSV); default: [data].path in site.toml")
    p.add_argument("--mapping", type=Path, help="mapping file (TOML); default: [data].mapping, else by name")
    p.add_argument("--out", type=Path, required=True, help="release file to write (hand it to the coordinator)")
    p.add_argument("--json", action="store_true", help="print the release JSON on stdout")
    p.set_defaults(handler=cmd_run)

    led = sub.add_parser("ledger", help="inspect and verify the site's ledger").add_subparsers(metavar="ACTION")
    p = led.add_parser("verify", help="check the hash chain and signatures; names the first bad line")
    p.add_argument("--site", type=Path, required=True)
    p.set_defaults(handler=cmd_ledger_verify)
    p = led.add_parser("show", help="list ledger entries")
    p.add_argument("--site", type=Path, required=True)
    p.add_argument("--json", action="store_true")
    p.set_defaults(handler=cmd_ledger_show)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    return run_cli(build_parser(), argv, "site-agent")


if __name__ == "__main__":
    sys.exit(main())
