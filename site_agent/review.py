"""What a site's reviewer sees and does: held releases, decisions, and the ledger for people.

``site-agent review`` shows every release held for approval: exactly the text that would leave (and its
SHA-256), the participant flow, the results, which counts were suppressed and why, and the audit's result
(the range of values the coordinator could still deduce for each hidden count, given everything the site
has released, to any study). ``--html`` writes the same as one self-contained page for an ethics board:
no scripts, no fonts or styles fetched from anywhere. ``approve`` / ``reject`` record a decision in the
ledger; ``release`` writes an approved release to a file.
"""

from __future__ import annotations

import argparse
import getpass
import html
import json
import textwrap
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from federation.protocol import ValidationToolError, key_id, load_public_key
from federation.protocol.cli_support import EXIT_PARTIAL, examples, option, print_json, write_atomic

from . import approval, ledger, models, plain
from .approval import Held
from .config import Site, load_site


def _listed(values: Any) -> str:
    return ", ".join(str(v) for v in values) if isinstance(values, (list, tuple)) and values else "none"


def _policy_lines(policy: dict[str, Any]) -> list[tuple[str, str]]:
    """The policy the release states it was made under, every field of it, in words."""
    zeros = "a count of zero is shown" if policy.get("allow_zero", True) else "a count of zero is withheld too"
    approval_text = "a person approves each release" if policy.get("require_approval") else "no approval step"
    models_text = (
        "a person approves each new model before its first use"
        if policy.get("require_model_approval")
        else "models are not approved one by one"
    )
    bands = policy.get("min_band_width") or {}
    band_text = "; ".join(f"{name} at least {_number_text(width)}" for name, width in sorted(bands.items()))
    return [
        (
            "the site's rules",
            f"counts under {policy.get('min_cell_size')} are withheld (the minimum cell size); {zeros}; every "
            f"withheld count must keep at least {policy.get('protection_width', 2)} possible values; {approval_text}; "
            f"{models_text} (policy fingerprint {str(policy.get('policy_sha256'))[:16]})",
        ),
        ("analyses allowed", _listed(policy.get("allowed_analyses"))),
        ("subgroups allowed", _listed(policy.get("allowed_subgroups"))),
        ("narrowest bands", band_text or "no narrowest band set"),
        (
            "requests allowed",
            f"at most {policy.get('max_requests_per_study')} per study (refusals count), in at most "
            f"{policy.get('max_studies')} studies",
        ),
        ("coordinator keys trusted", _listed(policy.get("trusted_coordinator_keys"))),
    ]


def describe(site: Site, held: Held) -> dict[str, Any]:
    """Everything a reviewer needs about one held release (verified against the ledger's SHA-256)."""
    data = approval.reviewed_bytes(site, held)
    document = json.loads(data)
    prepared = approval.held_entry(site, held)
    review = prepared.get("review", {}) or {}
    facts = prepared.get("facts", {}) if isinstance(prepared.get("facts"), dict) else {}
    results = document.get("results", {}) if isinstance(document.get("results"), dict) else {}
    return {
        "id": held.held_id,
        "state": held.state,
        "prepared_at": held.prepared_at,
        "decided_by": held.decided_by,
        "decided_at": held.decided_at,
        "reason": held.reason,
        "study_id": held.study_id,
        "request_id": held.request_id,
        "coordinator_key_id": str(prepared.get("coordinator_key_id", "")),
        "release_sha256": held.release_sha256,
        "document": document,
        "text": data.decode("utf-8"),
        "model": review.get("model"),
        "model_review": models.kept_view(site, str(document.get("bundle_sha256", ""))),
        "suppressed": review.get("suppressed", {}),
        "audit": review.get("audit"),
        "parts": plain.analysis_parts(facts, results),
        "withheld": plain.withheld_sentences(facts, review),
        "audit_sentence": plain.audit_sentence(review.get("audit")),
        "cut_back": plain.cut_back_sentences(review),
        "findings": plain.finding_sentences(facts, review.get("audit")),
        "not_searched": plain.unsearched_sentences(review.get("audit")),
    }


STATE_WORDS = {
    "held": "held: waiting for a decision; nothing has left the site",
    "approved": "approved: it leaves when the request is answered again",
    "rejected": "rejected: it will never leave the site",
    "released": "approved and handed over to the coordinator",
}


def _when(stamp: str) -> str:
    """``2026-12-02T12:50:02.867830+00:00`` -> ``2026-12-02 12:50 UTC``."""
    try:
        moment = datetime.fromisoformat(stamp)
    except (TypeError, ValueError):
        return str(stamp or "")
    return moment.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")


def _model_line(view: dict[str, Any]) -> str:
    model = view.get("model") or {}
    digest = str(view["document"].get("bundle_sha256", ""))
    if not model:
        return f"the model bundle with SHA-256 {digest}"
    thresholds = ", ".join(_number_text(t) for t in model.get("thresholds", []))
    return (
        f"“{model.get('name')}” ({model.get('format')}, score: {model.get('score')}), screen + when the score is "
        f"at or above {thresholds}; {len(model.get('inputs', []))} inputs; model bundle SHA-256 {digest}"
    )


def _number_text(value: Any) -> str:
    return f"{value:g}" if isinstance(value, float) else str(value)


def _decision_lines(view: dict[str, Any], site_dir: Path) -> list[str]:
    if view["state"] == "held":
        return [
            "Not decided yet. To decide:",
            f"  site-agent approve {view['id']} --site-dir {site_dir} --by NAME",
            f"  site-agent reject {view['id']} --site-dir {site_dir} --reason TEXT --by NAME",
        ]
    verb = "Rejected" if view["state"] == "rejected" else "Approved"
    line = f"{verb} by {view['decided_by'] or 'an unnamed person'} on {_when(view['decided_at'])}"
    line += f". Reason given: {str(view['reason']).rstrip('.')}." if view["reason"] else ". No reason was given."
    if view["state"] == "released":
        line += " It has left the site (sent, or written to a file for the coordinator)."
    return [line]


def _meta_lines(view: dict[str, Any]) -> list[tuple[str, str]]:
    doc = view["document"]
    return [
        ("state", STATE_WORDS.get(view["state"], view["state"])),
        ("study and request", f"study {view['study_id']}, request {view['request_id']}"),
        (
            "asked by",
            f"the coordinator key {view['coordinator_key_id']} (it signed the request; the release goes to it)"
            if view.get("coordinator_key_id")
            else "not recorded (a ledger written before the asker was kept)",
        ),
        ("site", str(doc.get("site_id"))),
        ("prepared", _when(view["prepared_at"])),
        ("the model it comes from", _model_line(view)),
        *_policy_lines(doc.get("policy", {})),
        (
            "what is approved",
            f"exactly the release text with SHA-256 {view['release_sha256']} (statistics on this page are rounded "
            "for reading; that text holds every digit)",
        ),
    ]


LABEL_WIDTH = 72  # a longer row label is wrapped onto more lines, never cut


def _text_table(table: plain.Table, indent: str = "  ", caption: bool = False) -> list[str]:
    widths = [max(len(row[i]) for row in [table.header, *table.rows]) for i in range(len(table.header))]
    widths[0] = min(widths[0], LABEL_WIDTH)
    out = [f"{indent}{table.caption if caption else table.explain}"]
    for n, row in enumerate([table.header, *table.rows]):
        label = textwrap.wrap(row[0], widths[0], break_long_words=True) or [""]
        for more in label[:-1]:  # the numbers stand on the label's last line
            out.append(f"{indent}{more}")
        cells = [label[-1].ljust(widths[0])] + [c.rjust(w) for c, w in zip(row[1:], widths[1:], strict=True)]
        out.append(f"{indent}{'  '.join(cells).rstrip()}")
        if n == 0:
            out.append(f"{indent}{'-' * (sum(widths) + 2 * (len(widths) - 1))}")
    return out


def _text_part(part: plain.Part, depth: int = 0) -> list[str]:
    indent = "  " * (depth + 1)
    out = ["", f"{'  ' * depth}{part.title}"]
    for table in part.tables:
        out += _text_table(table, indent, caption=depth > 0)
    out += [f"{indent}{sentence}" for sentence in part.sentences]
    for child in part.children:
        out += _text_part(child, depth + 1)
    return out


def render_text(view: dict[str, Any], site_dir: Path, exact: bool = False) -> str:
    """The held release in plain words, for a terminal (``--exact`` adds the exact text that would leave)."""
    out = [f"Release {view['id']}"]
    out += [f"  {name + ':':<26}{value}" for name, value in _meta_lines(view)]
    for part in view["parts"]:
        out += _text_part(part)
    for cut in view["document"].get("cut_back", []):
        out.append(f"  Cut back: {cut['analysis']}: {cut['action']}, {cut['rule']}")
    out += ["", f"Withheld, and why ({len(view['withheld'])})"]
    out += [f"  {line}" for line in _withheld_summary(view["withheld"])]
    for group, items in _by_group(view["withheld"]).items():
        out += [f"  {group}"] + [f"    - {item.text}" for item in items]
    if view["cut_back"]:
        out += ["", "Cut back so that the main table could be released"] + [f"  - {s}" for s in view["cut_back"]]
    out += ["", "Disclosure audit", f"  {view['audit_sentence']}"]
    for finding in view["findings"]:
        out.append(f"  - {finding}")
    if view.get("not_searched"):
        out += ["  What the audit did not search:"] + [f"  - {line}" for line in view["not_searched"]]
    if view.get("model_review"):
        out += ["", "What the model is (site-agent model review)"]
        out += [f"  {line}" for line in models.render_text(view["model_review"]).splitlines()]
    out += ["", "Decision"] + [f"  {line}" for line in _decision_lines(view, site_dir)]
    body = "\n".join(out)
    terms = plain.glossary(body)
    if terms:
        out += ["", "Words and abbreviations used above"] + [f"  {term}: {meaning}" for term, meaning in terms]
    if exact:
        out += ["", "The exact text that would leave:", view["text"]]
    else:
        out += [
            "",
            f"The exact text that would leave is held/{view['id']}.json; add --exact to print it here.",
        ]
    return "\n".join(out)


_STYLE = """
body{font-family:system-ui,-apple-system,"Segoe UI",sans-serif;margin:2rem auto;max-width:60rem;color:#1d1d1f;
line-height:1.45;padding:0 1rem}
h1{font-size:1.5rem}h2{font-size:1.25rem;border-bottom:1px solid #bbb;margin-top:2.5rem}
table{border-collapse:collapse;margin:.4rem 0 .8rem}td,th{border:1px solid #ccc;padding:.25rem .6rem;text-align:left;
vertical-align:top}th{background:#f1f1f1}td.n{text-align:right;font-variant-numeric:tabular-nums}
td.withheld{font-style:italic;color:#555}.meta td:first-child{font-weight:600;white-space:nowrap}
details{margin:.5rem 0;border:1px solid #ddd;border-radius:4px;padding:.3rem .8rem}
details>summary{cursor:pointer;font-weight:600;padding:.2rem 0}details details{border-color:#eee}
pre{background:#f6f6f6;border:1px solid #ddd;padding:.8rem;overflow-x:auto;font-size:.85rem;white-space:pre-wrap}
.explain{color:#444;margin:.2rem 0}.decision{background:#f6f8fb;border-left:4px solid #0072B2;padding:.5rem 1rem}
dt{font-weight:600}dd{margin:0 0 .5rem 1rem}
"""


def _html_table(table: plain.Table, caption: bool = False) -> str:
    head = "".join(f"<th>{html.escape(h)}</th>" for h in table.header)
    rows = []
    for row in table.rows:
        cells = [f"<td>{html.escape(row[0])}</td>"]
        for cell in row[1:]:
            klass = "n withheld" if cell == plain.WITHHELD else "n"
            cells.append(f'<td class="{klass}">{html.escape(cell)}</td>')
        rows.append(f"<tr>{''.join(cells)}</tr>")
    lead = (
        f"<h4>{html.escape(table.caption)}</h4>" if caption else f'<p class="explain">{html.escape(table.explain)}</p>'
    )
    return f"{lead}<table><tr>{head}</tr>{''.join(rows)}</table>"


def _html_part(part: plain.Part, open_: bool, depth: int = 0) -> str:
    inner = "".join(_html_table(t, caption=depth > 0) for t in part.tables)
    inner += "".join(f"<p>{html.escape(s)}</p>" for s in part.sentences)
    inner += "".join(_html_part(child, False, depth + 1) for child in part.children)
    return f"<details{' open' if open_ else ''}><summary>{html.escape(part.title)}</summary>{inner}</details>"


def _html_view(view: dict[str, Any], site: Site) -> str:
    meta = "".join(
        f"<tr><td>{html.escape(name)}</td><td>{html.escape(value)}</td></tr>" for name, value in _meta_lines(view)
    )
    groups = _by_group(view["withheld"])
    withheld = "".join(f"<p>{html.escape(line)}</p>" for line in _withheld_summary(view["withheld"])) + "".join(
        f"<details{' open' if len(groups) == 1 else ''}><summary>{html.escape(group)} ({len(items)})</summary><ul>"
        + "".join(f"<li>{html.escape(item.text)}</li>" for item in items)
        + "</ul></details>"
        for group, items in groups.items()
    )
    findings = "".join(f"<li>{html.escape(f)}</li>" for f in view["findings"])
    decision = _decision_lines(view, site.root)
    decision_html = f"<p>{html.escape(decision[0])}</p>"
    if len(decision) > 1:
        decision_html += "<pre>" + html.escape("\n".join(line.strip() for line in decision[1:])) + "</pre>"
    parts = "".join(_html_part(part, i < 2) for i, part in enumerate(view["parts"]))
    return (
        f'<section id="release-{html.escape(view["id"])}"><h2>Release {html.escape(view["id"])}</h2>'
        f'<table class="meta">{meta}</table>'
        f'<div class="decision"><strong>Decision.</strong> {decision_html}</div>'
        f"<h3>What it holds, analysis by analysis</h3>{parts}"
        f"<details open><summary>Withheld, and why ({len(view['withheld'])})</summary>{withheld}</details>"
        + (
            "<details open><summary>Cut back so that the main table could be released</summary><ul>"
            + "".join(f"<li>{html.escape(s)}</li>" for s in view["cut_back"])
            + "</ul></details>"
            if view["cut_back"]
            else ""
        )
        + (
            f"<details><summary>What the model is</summary><pre>{html.escape(models.render_text(view['model_review']))}"
            "</pre></details>"
            if view.get("model_review")
            else ""
        )
        + f"<details open><summary>Disclosure audit</summary><p>{html.escape(view['audit_sentence'])}</p>"
        f"{'<ul>' + findings + '</ul>' if findings else ''}"
        + (
            "<p>What the audit did not search:</p><ul>"
            + "".join(f"<li>{html.escape(line)}</li>" for line in view["not_searched"])
            + "</ul>"
            if view.get("not_searched")
            else ""
        )
        + "</details>"
        f"<details><summary>The exact text that would leave (SHA-256 {html.escape(view['release_sha256'][:16])}…)"
        f"</summary><pre>{html.escape(view['text'])}</pre></details></section>"
    )


def render_html(views: list[dict[str, Any]], site: Site) -> str:
    """One self-contained page (inline style, no scripts, nothing fetched) for an ethics board."""
    now = datetime.now(UTC).replace(microsecond=0).isoformat()
    body = [
        f"<h1>Releases held for approval at site {html.escape(site.site_id)}</h1>",
        f"<p>Prepared {html.escape(_when(now))}. Each release below has been computed and signed at the site "
        "but has <strong>not</strong> left it. Approving a release approves exactly the text shown, identified by "
        "its SHA-256 fingerprint; nothing is recomputed afterwards. Counts marked <em>withheld</em> are not "
        "released, by one of the site's rules; each is listed with the rule that withheld it.</p>"
        "<p>The tool validates a screening model across sites: it releases counts of participants, never a "
        "result or a score for one person.</p>",
    ]
    if not views:
        body.append("<p>No release is held for approval.</p>")
    elif len(views) > 1:
        links = "".join(
            f'<li><a href="#release-{html.escape(v["id"])}">Release {html.escape(v["id"])}</a>: study '
            f"{html.escape(v['study_id'])}, {html.escape(v['state'])}</li>"
            for v in views
        )
        body.append(f"<nav><p>{len(views)} releases:</p><ul>{links}</ul></nav>")
    body += [_html_view(view, site) for view in views]
    text = " ".join(
        [
            *(v["audit_sentence"] for v in views),
            *(line for v in views for line in v.get("not_searched", [])),
            *(w.text for v in views for w in v["withheld"]),
            *(_parts_text(v) for v in views),
        ]
    )
    terms = plain.glossary(text + " SHA-256 withheld")
    if terms:
        entries = "".join(f"<dt>{html.escape(t)}</dt><dd>{html.escape(m)}</dd>" for t, m in terms)
        body.append(f'<h2 id="glossary">Words and abbreviations</h2><dl>{entries}</dl>')
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>Releases held for approval: {html.escape(site.site_id)}</title>"
        f"<style>{_STYLE}</style></head><body>{''.join(body)}</body></html>\n"
    )


def _by_group(items: list[plain.Withheld]) -> dict[str, list[plain.Withheld]]:
    groups: dict[str, list[plain.Withheld]] = {}
    for item in items:
        groups.setdefault(item.group, []).append(item)
    return groups


def _withheld_summary(items: list[plain.Withheld]) -> list[str]:
    """ "Nothing was withheld.", or how many counts each rule withheld, in one sentence."""
    if not items:
        return ["Nothing was withheld."]
    rules: dict[str, int] = {}
    for item in items:
        rules[item.rule] = rules.get(item.rule, 0) + 1
    parts = [f"{n} {rule}" for rule, n in rules.items()]
    return [f"{len(items)} count{'s' if len(items) != 1 else ''} withheld: " + "; ".join(parts) + "."]


def _parts_text(view: dict[str, Any]) -> str:
    out: list[str] = []
    for part in view["parts"]:
        out += _text_part(part)
    return "\n".join(out)


# --- command handlers (registered by site_agent.cli) -------------------------------------------------------


def _checked_site(root: Path) -> Site:
    """The site, once its whole ledger verified: the review page is built from the ledger's entries, so a page
    read from an edited ledger would show the board other numbers than the held bytes hold."""
    site = load_site(root)
    ledger.verify_before_use(site.ledger_path, site.public_key())
    return site


def cmd_review(args: argparse.Namespace) -> int:
    site = _checked_site(args.site_dir)
    held = approval.held_releases(site).values()
    chosen = [h for h in held if args.all or h.state == "held"]
    views = [describe(site, h) for h in chosen]
    if args.html:
        write_atomic(args.html, render_html(views, site).encode("utf-8"))
        print(f"wrote {args.html} ({len(views)} release(s); a self-contained page, open it in any browser)")
        return 0
    if args.json:
        skip = ("text", "parts", "withheld")
        print_json(
            [
                {**{k: v for k, v in view.items() if k not in skip}, "withheld": [w.__dict__ for w in view["withheld"]]}
                for view in views
            ]
        )
        return 0
    if not views:
        print("no release is held for approval" if not args.all else "no release has been held for approval")
        return 0
    print("\n\n".join(render_text(view, args.site_dir, args.exact) for view in views))
    return 0


def cmd_approve(args: argparse.Namespace) -> int:
    site = _checked_site(args.site_dir)
    held = approval.approve(site, args.id, args.by, args.reason or "")
    print(f"release {held.held_id} approved by {held.decided_by}; recorded in {site.ledger_path}")
    print("it leaves when the request is answered again (`site-agent run` or the online agent), or with")
    print(f"  site-agent release {held.held_id} --site-dir {args.site_dir} --out FILE")
    return 0


def cmd_reject(args: argparse.Namespace) -> int:
    site = _checked_site(args.site_dir)
    held = approval.reject(site, args.id, args.reason, args.by or getpass.getuser())
    print(f"release {held.held_id} rejected by {held.decided_by}; it will not be sent")
    return 0


def cmd_release(args: argparse.Namespace) -> int:
    site = _checked_site(args.site_dir)
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
    p = sub.add_parser(
        "review",
        help="show releases held for approval (exactly what would leave, and why)",
        epilog=examples("site-agent review --site-dir SITE", "site-agent review --site-dir SITE --html review.html"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--html", type=Path, help="write one self-contained HTML page for an ethics board instead")
    p.add_argument("--all", action="store_true", help="also show releases already decided")
    p.add_argument("--exact", action="store_true", help="also print the exact text that would leave")
    p.add_argument("--json", action="store_true")
    p.set_defaults(handler=cmd_review)

    p = sub.add_parser(
        "approve",
        help="approve a held release (recorded in the ledger)",
        epilog=examples(
            'site-agent approve 3f5c0a1b2c3d4e5f --site-dir SITE --by "Board member A" --reason "as agreed"'
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("id", help="held release id (from `site-agent review`)")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--by", required=True, help="name of the person approving")
    p.add_argument("--reason", help="why, in a sentence (kept in the site's ledger and shown on the review page)")
    p.set_defaults(handler=cmd_approve)

    p = sub.add_parser(
        "reject",
        help="reject a held release; it will never be sent",
        epilog=examples(
            'site-agent reject 3f5c0a1b2c3d4e5f --site-dir SITE --reason "not the agreed analyses" --by NAME'
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("id", help="held release id (from `site-agent review`)")
    option(p, "--site-dir", "--site", dest="site_dir", type=Path, required=True, help="site folder")
    p.add_argument("--reason", required=True, help="why (kept in the site's ledger; never sent)")
    p.add_argument("--by", default="", help="name of the person rejecting (default: your login name)")
    p.set_defaults(handler=cmd_reject)

    p = sub.add_parser(
        "release",
        help="write an approved release to a file to hand to the coordinator",
        epilog=examples("site-agent release 3f5c0a1b2c3d4e5f --site-dir SITE --out release.json"),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
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
