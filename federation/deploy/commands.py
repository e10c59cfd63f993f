"""The coordinator's deployment commands: ``certs new``, ``serve``, ``run`` and ``enrol --node-key``.

Kept here so ``federation/cli.py`` only wires them in (:func:`add_deploy_commands`).
"""

from __future__ import annotations

import argparse
import json
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from federation.protocol import ValidationToolError
from federation.protocol.cli_support import examples, option

from .certs import SERVER_DAYS

if TYPE_CHECKING:
    from federation.store import Store

# Flower is imported inside the handlers (via fab, rounds, runs, superlink): building the parser for
# `federation --help` must not pay for importing flwr.


def enrol_node_key(store: Store, site_id: str, node_key_path: Path) -> None:
    """Bind a site's node key in the store; register it now if the study's SuperLink is up."""
    from .nodes import parse_node_key
    from .superlink import LINK_DIR, LINK_FILE, LinkSettings, SuperLinkError, register_node

    try:
        data = Path(node_key_path).read_bytes()
    except FileNotFoundError:
        raise ValidationToolError(f"{node_key_path}: node key not found (the site's node.pub)") from None
    key = parse_node_key(data, str(node_key_path))
    store.bind_node_key(site_id, key.fingerprint, key.pem, str(node_key_path))
    print(f"bound site {site_id} to node key {key.fingerprint[:16]}")
    study = Path(store.path).resolve().parent
    if not (study / LINK_DIR / LINK_FILE).is_file():
        print("  it is registered with the SuperLink when `federation run` starts")
        return
    try:
        node_id = register_node(LinkSettings.for_study(study), key.pem, site_id)
    except SuperLinkError as exc:
        print(f"  not registered yet ({exc}); `federation run` registers it")
        return
    print(f"  registered with the SuperLink as node {node_id}")


def cmd_certs_new(args: argparse.Namespace) -> int:
    from .certs import new_certificates

    paths = new_certificates(args.out_dir, tuple(args.name or ()), args.days)
    if args.json:
        names = ("ca_certificate", "ca_key", "server_certificate", "server_key")
        print(json.dumps({name: str(getattr(paths, name)) for name in names}, indent=2))
        return 0
    print(f"wrote {paths.ca_certificate} (give this to every site: `site-agent join --root-certificates`)")
    print(f"      {paths.server_certificate} and {paths.server_key} (the SuperLink's; the key stays here)")
    print(f"      {paths.ca_key} (signs server certificates; keep it offline)")
    return 0


def cmd_serve(args: argparse.Namespace) -> int:
    from .fab import build_app_bundle
    from .superlink import exec_superlink, prepare_serve

    command, env = prepare_serve(args.study_dir, args.certs_dir, args.host, args.port, args.task_poll)
    bundle = build_app_bundle()
    print(f"starting the SuperLink for {args.study_dir} on {args.host}:{args.port} (TLS, node authentication on)")
    print(f"  app bundle sha256 {bundle.sha256} (sites list it in site.toml [app] allowed_fab_sha256)")
    print("  expose only /v1/fleet/ to sites; keep /v1/control/ and /v1/runtime/ on this host (docs/deployment.md)")
    sys.stdout.flush()
    exec_superlink(command, env)
    return 0  # pragma: no cover - exec does not return


def cmd_run(args: argparse.Namespace) -> int:
    from dataclasses import replace

    from federation.protocol.progress import SiteTable, interactive

    from .rounds import PING, VALIDATE
    from .runs import RunOptions, exit_status, run_study

    options = RunOptions(
        study=args.study_dir,
        min_sites=args.min_sites,
        deadline_s=args.deadline,
        resume=args.resume,
        kind=PING if args.ping else VALIDATE,
        sign_key=args.sign,
    )
    say = (lambda line: print(line, file=sys.stderr)) if args.json else print
    if interactive():  # a live table of site status on stderr; plain lines when piped or logged
        with SiteTable(f"study {args.study_dir}") as table:
            outcome = run_study(replace(options, on_sites=table.update), table.say)
    else:
        outcome = run_study(options, say)
    if args.json:
        print(json.dumps(outcome.to_dict(), indent=2))
    elif options.kind == PING:
        asked = len(outcome.sites)
        print(f"readiness check {outcome.round_id[:8] or '-'}: {outcome.state}; {outcome.ready} of {asked} sites ready")
        for site, info in sorted(outcome.sites.items()):
            if info["status"] != "ready":
                print(f"  {site}: {info['status']}" + (f" ({info['reason']})" if info["reason"] else ""))
    else:
        summary = f"{outcome.state}; {outcome.released} sites released ({outcome.note})"
        print(f"round {outcome.round_id[:8] or '-'}: {summary}")
    return exit_status(outcome)


def add_deploy_commands(sub: argparse._SubParsersAction) -> None:
    certs = sub.add_parser("certs", help="TLS certificates for the SuperLink").add_subparsers(metavar="ACTION")
    p = certs.add_parser(
        "new",
        help="make a private CA (ca.crt, ca.key) and a server certificate (server.pem/.key)",
        epilog=examples("federation certs new --out-dir study/certs --name validation.example.org"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(
        p, "--out-dir", "--out", dest="out_dir", type=Path, required=True, help="folder to write the four files into"
    )
    p.add_argument(
        "--name",
        action="append",
        help="host name or IP address sites dial (repeat; 127.0.0.1 and localhost are always included)",
    )
    p.add_argument("--days", type=int, default=SERVER_DAYS, help=f"server certificate lifetime (default {SERVER_DAYS})")
    p.add_argument("--json", action="store_true", help="print the four file paths as JSON")
    p.set_defaults(handler=cmd_certs_new)

    p = sub.add_parser(
        "serve",
        help="run the study's SuperLink (TLS, node authentication, no dependency installs)",
        epilog=examples("federation serve --study-dir study --host 0.0.0.0 --port 8000"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(
        p,
        "--study-dir",
        "--study",
        dest="study_dir",
        type=Path,
        required=True,
        help="study folder: study.db, request.json, model.bundle",
    )
    option(
        p,
        "--certs-dir",
        "--certs",
        dest="certs_dir",
        type=Path,
        help="folder made by `federation certs new` (default: STUDY_DIR/certs)",
    )
    p.add_argument("--host", default="127.0.0.1", help="address to listen on (default 127.0.0.1; see the docs)")
    p.add_argument("--port", type=int, default=8000, help="port for all three Flower APIs (default 8000)")
    p.add_argument("--task-poll", type=float, help="seconds between the ServerApp runner's task polls (Flower: 1)")
    p.set_defaults(handler=cmd_serve)

    p = sub.add_parser(
        "run",
        help="send the study's request to every enrolled site online and record the outcome",
        description="Send the study's request to every site with a bound node key through the running SuperLink "
        "(`federation serve`), and follow the round: a live table of site status at a terminal, one line per "
        "change otherwise. Exit codes: 0 every asked site released; 1 bad input; 3 quorum reached but some "
        "sites did not release; 4 the SuperLink is unreachable, the quorum was not reached or the round was "
        "cut short (continue with --resume; sites that released are not asked again).",
        epilog="example:\n"
        "  federation run --study-dir study/ --min-sites 3 --deadline 900 --sign coordinator/coordinator.key\n"
        "  federation run --study-dir study/ --resume --sign coordinator/coordinator.key",
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(
        p,
        "--study-dir",
        "--study",
        dest="study_dir",
        type=Path,
        required=True,
        help="study folder served by `federation serve`",
    )
    p.add_argument("--min-sites", type=int, help="quorum: sites that must release (default: every enrolled site)")
    p.add_argument("--deadline", type=float, default=600.0, help="seconds the round may take (default 600)")
    p.add_argument("--resume", action="store_true", help="continue the request: ask only sites that have not released")
    p.add_argument(
        "--ping",
        action="store_true",
        help="readiness check instead: each site checks its folder, policy, keys, ledger, app allowlist and data "
        "source without reading a record; nothing is released (exit 0 all ready, 3 some not)",
    )
    p.add_argument(
        "--sign",
        type=Path,
        help="coordinator private key (coordinator.key): signs an acknowledgement of every stored release, which "
        "the next message to its site carries; without it sites record releases as sent, never as acknowledged",
    )
    p.add_argument("--json", action="store_true", help="print the outcome as JSON on stdout")
    p.set_defaults(handler=cmd_run)
