"""What a site's reviewer sees and does: held releases, decisions, and the ledger for people.

``site-agent review`` shows every release held for approval: exactly the text that would leave (and its
SHA-256), the participant flow, the results, which counts were suppressed and why, and the audit's result
(the range of values the coordinator could still deduce for each hidden count, given everything the site
has released to the study). ``--html`` writes the same as one self-contained page for an ethics board:
no scripts, no fonts or styles fetched from anywhere. ``approve`` / ``reject`` record a decision in the
ledger; ``release`` writes an approved release to a file.
"""

from __future__ import annotations

import argparse
import getpass
import html
import json
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from federation.protocol import ValidationToolError, key_id, load_public_key
from federation.protocol.cli_support import EXIT_PARTIAL, option, print_json, write_atomic

from . import approval, ledger
from .approval import Held
from .config import Site, load_site

HIDDEN = "hidden"


def _fmt(value: Any) -> str:
    if value is None:
        return HIDDEN
    if isinstance(value, float):
        return f"{value:.4g}"
    if isinstance(value, (dict, list)):
        return json.dumps(value, sort_keys=True)
    return str(value)


def _flow_rows(flow: dict[str, Any], prefix: str = "") -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    for key, value in flow.items():
        if key == "suppressed":
            continue
        if isinstance(value, dict):
            rows.extend(_flow_rows(value, f"{prefix}{key}: "))
        else:
            rows.append((f"{prefix}{key}", _fmt(value)))
    return rows


def _result_rows(results: dict[str, Any]) -> list[tuple[str, str]]:
    rows: list[tuple[str, str]] = []
    for table in results.get("confusion", []):
        cells = ", ".join(f"{c} {_fmt(v)}" for c, v in table.get("cells", {}).items())
        rows.append((f"confusion at threshold {table.get('threshold')}", cells))
    for name, value in results.items():
        if name != "confusion":
            rows.append((name, _fmt(value)))
    return rows


def _policy_line(policy: dict[str, Any]) -> str:
    zeros = "zeros shown" if policy.get("allow_zero", True) else "zeros hidden"
    approval_text = "approval required" if policy.get("require_approval") else "no approval required"
    return (
        f"minimum cell size {policy.get('min_cell_size')}, {zeros}, protection width "
        f"{policy.get('protection_width', 2)}, {approval_text} (policy SHA-256 {str(policy.get('policy_sha256'))[:16]})"
    )


def describe(site: Site, held: Held) -> dict[str, Any]:
    """Everything a reviewer needs about one held release (verified against the ledger's SHA-256)."""
    data = approval.reviewed_bytes(site, held)
    document = json.loads(data)
    review = approval.review_details(site, held)
    return {
        "id": held.held_id,
        "state": held.state,
        "prepared_at": held.prepared_at,
        "decided_by": held.decided_by,
        "decided_at": held.decided_at,
        "reason": held.reason,
        "study_id": held.study_id,
        "request_id": held.request_id,
        "release_sha256": held.release_sha256,
        "document": document,
        "text": data.decode("utf-8"),
        "suppressed": review.get("suppressed", {}),
        "audit": review.get("audit"),
    }


def _audit_lines(audit: dict[str, Any] | None) -> list[str]:
    if not audit:
        return ["no audit result recorded"]
    earlier = audit.get("releases_considered", 1) - 1
    scope = f"this release with {earlier} earlier release(s) to the study" if earlier else "this release"
    verdict = "passed" if audit.get("ok") else "FAILED"
    lines = [
        f"{verdict}: {scope}; {audit.get('atoms')} regions, {audit.get('constraints')} linear facts, "
        f"{audit.get('seconds')} s; every hidden count must keep at least {audit.get('protection_width')} "
        "possible values"
    ]
    for interval in audit.get("intervals", []):
        high = "no upper bound" if interval["high"] is None else interval["high"]
        if interval.get("exact", True):
            lines.append(f"{interval['name']}: the coordinator can only tell it lies in {interval['low']} .. {high}")
        else:  # two feasible tables were found with these values: the true range is at least this wide
            lines.append(f"{interval['name']}: the coordinator cannot narrow it below {interval['low']} .. {high}")
    for finding in audit.get("findings", []):
        lines.append(f"finding: {finding['text']}")
    return lines


def render_text(view: dict[str, Any], site_dir: Path) -> str:
    doc = view["document"]
    out = [
        f"Held release {view['id']} ({view['state']}, prepared {view['prepared_at']})",
        f"  study {view['study_id']}, request {view['request_id']}, site {doc.get('site_id')}",
        f"  model bundle SHA-256 {doc.get('bundle_sha256')}",
        f"  release SHA-256 {view['release_sha256']} (what is approved is exactly this text)",
        f"  policy in force: {_policy_line(doc.get('policy', {}))}",
        "",
        "Participant flow (as it would leave)",
    ]
    out += [f"  {name:<36} {value}" for name, value in _flow_rows(doc.get("flow", {}))]
    out += ["", "Results (as they would leave)"]
    out += [f"  {name}: {value}" for name, value in _result_rows(doc.get("results", {}))]
    out += ["", "Suppressed, and why (this part stays at the site)"]
    out += [f"  {name:<36} {why}" for name, why in view["suppressed"].items()] or ["  nothing suppressed"]
    out += ["", "Audit"] + [f"  {line}" for line in _audit_lines(view["audit"])]
    if view["state"] == "held":
        out += [
            "",
            f"Decide:  site-agent approve {view['id']} --site-dir {site_dir} --by NAME",
            f"         site-agent reject {view['id']} --site-dir {site_dir} --reason TEXT --by NAME",
        ]
    elif view["decided_by"]:
        note = f": {view['reason']}" if view["reason"] else ""
        out += ["", f"Decided: {view['state']} by {view['decided_by']} at {view['decided_at']}{note}"]
    out += ["", "Exact text that would leave:", view["text"]]
    return "\n".join(out)


_STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:60rem;color:#1d1d1f;
line-height:1.4;padding:0 1rem}
h1{font-size:1.5rem}h2{font-size:1.2rem;border-bottom:1px solid #bbb;margin-top:2.5rem}h3{font-size:1rem}
table{border-collapse:collapse;margin:.5rem 0}td,th{border:1px solid #ccc;padding:.2rem .6rem;text-align:left;
vertical-align:top}th{background:#f1f1f1}pre{background:#f6f6f6;border:1px solid #ddd;padding:.8rem;overflow-x:auto;
font-size:.85rem}.hidden{font-style:italic;color:#555}.meta td:first-child{font-weight:600}
.verdict{font-weight:700}
"""


def _table(rows: list[tuple[str, str]], header: tuple[str, str] | None = None, css: str = "") -> str:
    parts = [f'<table class="{css}">' if css else "<table>"]
    if header:
        parts.append(f"<tr><th>{html.escape(header[0])}</th><th>{html.escape(header[1])}</th></tr>")
    for name, value in rows:
        klass = ' class="hidden"' if value == HIDDEN else ""
        parts.append(f"<tr><td>{html.escape(name)}</td><td{klass}>{html.escape(value)}</td></tr>")
    parts.append("</table>")
    return "".join(parts)


def render_html(views: list[dict[str, Any]], site: Site) -> str:
    """One self-contained page (inline style, no scripts, nothing fetched) for an ethics board."""
    now = datetime.now(UTC).replace(microsecond=0).isoformat()
    body = [
        f"<h1>Releases held for approval at site {html.escape(site.site_id)}</h1>",
        f"<p>Prepared {html.escape(now)} from the site folder <code>{html.escape(str(site.root))}</code>. "
        "Each release below has been computed and signed but has <strong>not</strong> left the site. "
        "Approving a release approves exactly the text shown, identified by its SHA-256; nothing is "
        "recomputed afterwards. Counts shown as <em>hidden</em> are suppressed by the site's policy.</p>",
    ]
    if not views:
        body.append("<p>No release is held for approval.</p>")
    for view in views:
        doc = view["document"]
        meta = [
            ("held release id", view["id"]),
            ("state", view["state"]),
            ("prepared", view["prepared_at"]),
            ("study", view["study_id"]),
            ("request", view["request_id"]),
            ("model bundle SHA-256", str(doc.get("bundle_sha256"))),
            ("release SHA-256", view["release_sha256"]),
            ("policy in force", _policy_line(doc.get("policy", {}))),
        ]
        suppressed = list(view["suppressed"].items()) or [("nothing suppressed", "")]
        audit = _audit_lines(view["audit"])
        body += [
            f"<h2>Release {html.escape(view['id'])}</h2>",
            _table(meta, css="meta"),
            "<h3>Participant flow (as it would leave)</h3>",
            _table(_flow_rows(doc.get("flow", {})), ("count", "value")),
            "<h3>Results (as they would leave)</h3>",
            _table(_result_rows(doc.get("results", {})), ("result", "value")),
            "<h3>Suppressed, and why (this part stays at the site)</h3>",
            _table(suppressed, ("count", "reason")),
            "<h3>Audit across every release to this study</h3>",
            f'<p class="verdict">{html.escape(audit[0])}</p>',
            "<ul>" + "".join(f"<li>{html.escape(line)}</li>" for line in audit[1:]) + "</ul>",
            "<h3>How to decide</h3>",
            f"<pre>site-agent approve {html.escape(view['id'])} --site-dir {html.escape(str(site.root))} --by NAME\n"
            f"site-agent reject {html.escape(view['id'])} --site-dir {html.escape(str(site.root))} --reason TEXT "
            "--by NAME</pre>",
            "<h3>Exact text that would leave</h3>",
            f"<pre>{html.escape(view['text'])}</pre>",
        ]
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        f"<title>Releases held for approval: {html.escape(site.site_id)}</title>"
        f"<style>{_STYLE}</style></head><body>{''.join(body)}</body></html>\n"
    )


# --- command handlers (registered by site_agent.cli) -------------------------------------------------------


def cmd_review(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    held = approval.held_releases(site).values()
    chosen = [h for h in held if args.all or h.state == "held"]
    views = [describe(site, h) for h in chosen]
    if args.html:
        write_atomic(args.html, render_html(views, site).encode("utf-8"))
        print(f"wrote {args.html} ({len(views)} release(s); a self-contained page, open it in any browser)")
        return 0
    if args.json:
        print_json([{k: v for k, v in view.items() if k != "text"} for view in views])
        return 0
    if not views:
        print("no release is held for approval" if not args.all else "no release has been held for approval")
        return 0
    print("\n\n".join(render_text(view, args.site_dir) for view in views))
    return 0


def cmd_approve(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    held = approval.approve(site, args.id, args.by)
    print(f"release {held.held_id} approved by {held.decided_by}; recorded in {site.ledger_path}")
    print("it leaves when the request is answered again (`site-agent run` or the online agent), or with")
    print(f"  site-agent release {held.held_id} --site-dir {args.site_dir} --out FILE")
    return 0


def cmd_reject(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    held = approval.reject(site, args.id, args.reason, args.by or getpass.getuser())
    print(f"release {held.held_id} rejected by {held.decided_by}; it will not be sent")
    return 0


def cmd_release(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    held = approval.find(site, args.id)
    data = approval.hand_over(site, held)
    write_atomic(args.out, data)
    approval.record_sent(site, data, "file", args.out)
    print(f"approved release {held.held_id} written to {args.out} (SHA-256 {held.release_sha256})")
    return 0


def cmd_ledger_verify(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    public_key = load_public_key(args.public_key) if args.public_key else site.public_key()
    count = ledger.verify_ledger(site.ledger_path, public_key)
    missing = ledger.check_copies(site.ledger_path, site.releases_dir)
    if missing:
        raise ledger.LedgerError(
            f"{site.releases_dir / missing[0]}: this release file is not in the ledger (entries were removed from "
            "the end of the ledger, or the file was placed there by hand)"
        )
    head = ledger.head(site.ledger_path)
    expected = getattr(args, "expect_head", None)
    found_at = _find_noted_head(site, expected) if expected else None
    if getattr(args, "json", False):
        report: dict[str, Any] = {
            "ledger": str(site.ledger_path),
            "entries": count,
            "intact": True,
            "site_key_id": key_id(public_key),
            "last_entry_hash": head,
        }
        if expected:
            report["expected_head"] = {"hash": expected, "found_at_entry": found_at}
        print_json(report)
        return 0
    print(f"{site.ledger_path}: {count} entries, chain and signatures intact (site key {key_id(public_key)})")
    if expected:
        later = count - int(found_at or 0)
        added = "1 entry was" if later == 1 else f"{later} entries were"
        print(f"  the head you noted ({expected[:16]}…) is entry {found_at}; {added} added since")
    print(f"  head (last entry hash) {head}")
    print("  write it down: `ledger verify --expect-head HASH` later tells whether entries were cut off")
    return 0


_HEX = frozenset("0123456789abcdef")


def _find_noted_head(site: Site, noted: str) -> int:
    """The entry number whose hash is ``noted`` (the full hash, or its first 16 or more hex digits).

    Raises LedgerError when no entry has it: the ledger was cut short (or rewritten) since it was noted.
    """
    wanted = noted.strip().lower()
    if len(wanted) < 16 or len(wanted) > 64 or not set(wanted) <= _HEX:
        raise ValidationToolError("--expect-head: give the head hash as printed (at least its first 16 hex digits)")
    for entry in ledger.read_entries(site.ledger_path):
        if str(entry.get("hash", "")).startswith(wanted):
            return int(entry.get("seq", 0))
    raise ledger.LedgerError(
        f"{site.ledger_path}: no entry has the head hash {wanted[:16]}… noted earlier: entries were cut off the "
        "end of the ledger (or it was replaced) since then"
    )


def cmd_ledger_show(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    entries = ledger.read_entries(site.ledger_path)
    if args.json:
        print_json(entries)
        return 0
    for entry in entries:
        print(f"{entry.get('seq'):>4}  {entry.get('time')}  {entry.get('event'):<17} {ledger.summary(entry)}")
    for entry in ledger.unsent(site.ledger_path):
        digest = str(entry["details"].get("release_sha256", ""))[:12]
        print(
            f"note: release {digest} (entry {entry.get('seq')}) has no 'sent' entry after it: the agent stopped "
            "between recording and handing it over, so it may not have reached the coordinator"
        )
    print(f"head (last entry hash): {ledger.head(site.ledger_path)}")
    print("  write it down; `site-agent ledger verify --expect-head HASH` later tells whether entries were cut off")
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    """Register review, approve, reject and release on the ``site-agent`` parser."""
    p = sub.add_parser("review", help="show releases held for approval (exactly what would leave, and why)")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--html", type=Path, help="write one self-contained HTML page for an ethics board instead")
    p.add_argument("--all", action="store_true", help="also show releases already decided")
    p.add_argument("--json", action="store_true")
    p.set_defaults(handler=cmd_review)

    p = sub.add_parser("approve", help="approve a held release (recorded in the ledger)")
    p.add_argument("id", help="held release id (from `site-agent review`)")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--by", required=True, help="name of the person approving")
    p.set_defaults(handler=cmd_approve)

    p = sub.add_parser("reject", help="reject a held release; it will never be sent")
    p.add_argument("id", help="held release id (from `site-agent review`)")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--reason", required=True, help="why (kept in the site's ledger; never sent)")
    p.add_argument("--by", default="", help="name of the person rejecting (default: your login name)")
    p.set_defaults(handler=cmd_reject)

    p = sub.add_parser("release", help="write an approved release to a file to hand to the coordinator")
    p.add_argument("id", help="held release id")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--out", type=Path, required=True, help="release file to write")
    p.set_defaults(handler=cmd_release)


def print_held(error: approval.AwaitingApproval, site_dir: Path) -> int:
    """What `site-agent run` says when a release is held (exit code 3)."""
    print(f"release held for approval as {error.held_id}; nothing has been sent")
    print(f"  review it:  site-agent review --site-dir {site_dir}   (or --html review.html for the ethics board)")
    print(f"  decide:     site-agent approve {error.held_id} --site-dir {site_dir} --by NAME")
    print("  then run the same request again (or `site-agent release ID --out FILE`) to write the release")
    return EXIT_PARTIAL
