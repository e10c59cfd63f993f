"""The site's own approval of model bundles (policy ``require_model_approval = true``).

A coordinator can sign any model. With this setting on, the agent runs a bundle only after a person at the
site has looked at what it is and approved it, by the SHA-256 of the bundle file, in the ledger: the ethics
board approves the model as it approves a protocol. A request naming a bundle without an approval is
refused before any record is read, and the bundle is kept in ``SITEDIR/models/`` for review.

``describe`` is what a reviewer sees: the inputs (schema features with their types and ranges), the kind of
model (the ONNX graph's operators after the static check, or a scorecard's intercept, weights and points
with the attainable score range), the thresholds, who signed it and when it was packed.

Ledger events: ``model_approval`` and ``model_rejection`` (``bundle_sha256``, ``name``, ``signer``, ``by``,
``decided_at``, ``reason``). A rejection is final: a rejected bundle is never approved or decided again.
"""

from __future__ import annotations

import argparse
import json
import math
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from federation.protocol import Bundle, ValidationToolError, load_bundle
from federation.protocol.cli_support import examples, print_json, write_atomic
from federation.protocol.errors import ModelNotApproved, ModelRejected

from . import ledger
from .checked_models import site_scorer
from .config import Site, load_site

MODELS_DIR = "models"
STATES = ("not reviewed", "approved", "rejected")


def decisions(site: Site) -> dict[str, dict[str, Any]]:
    """The latest decision per bundle SHA-256, as the ledger records it."""
    latest: dict[str, dict[str, Any]] = {}
    for entry in ledger.read_entries(site.ledger_path):
        if entry.get("event") in ("model_approval", "model_rejection"):
            details = dict(entry.get("details", {}))
            details["state"] = "approved" if entry["event"] == "model_approval" else "rejected"
            latest[str(details.get("bundle_sha256"))] = details
    return latest


def state(site: Site, bundle_sha256: str) -> str:
    return decisions(site).get(bundle_sha256, {}).get("state", "not reviewed")


def keep(site: Site, bundle: Bundle, bundle_bytes: bytes) -> None:
    """Keep a verified bundle in ``SITEDIR/models/`` (once), so that a person can review what ran."""
    path = site.root / MODELS_DIR / f"{bundle.sha256[:16]}.bundle"
    if not path.exists():
        write_atomic(path, bundle_bytes)


def kept_view(site: Site, bundle_sha256: str) -> dict[str, Any] | None:
    """The review of a kept bundle, or None when the site has no copy."""
    path = site.root / MODELS_DIR / f"{bundle_sha256[:16]}.bundle"
    if not path.exists():
        return None
    try:
        return describe(site, load_bundle(path.read_bytes(), site.trusted, str(path)))
    except ValidationToolError:
        return None


def require_approved(site: Site, bundle: Bundle, bundle_bytes: bytes, what: str = "bundle") -> None:
    """Raise ModelNotApproved unless the policy asks for nothing or the site approved this bundle.

    Every verified bundle is kept in ``SITEDIR/models/``, so that the online agent's bundles can be reviewed
    too and a held release's review shows the model that computed it.
    """
    keep(site, bundle, bundle_bytes)
    if not site.policy.require_model_approval:
        return
    current = state(site, bundle.sha256)
    if current == "approved":
        return
    short = bundle.sha256[:16]
    if current == "rejected":
        raise ModelRejected(f"{what}: model {short} was rejected by this site; it will not be run")
    raise ModelNotApproved(
        f"{what}: model {short} is not approved by this site yet (policy require_model_approval); review it with "
        f"`site-agent model review {short} --site-dir {site.root}`, then `site-agent model approve {short} "
        f"--site-dir {site.root} --by NAME`, and run the request again"
    )


def find(site: Site, reference: str) -> tuple[Bundle, bytes]:
    """A bundle by file path, or by (a prefix of at least 6 hex digits of) its SHA-256 among those kept."""
    path = Path(reference)
    if path.is_file():
        data = path.read_bytes()
        return load_bundle(data, site.trusted, str(path)), data
    folder = site.root / MODELS_DIR
    matches = sorted(folder.glob(f"{reference.lower()}*.bundle")) if len(reference) >= 6 else []
    if len(matches) != 1:
        raise ValidationToolError(
            f"{reference}: no bundle file, and no kept model with this id (see `site-agent model review`)"
        )
    data = matches[0].read_bytes()
    return load_bundle(data, site.trusted, str(matches[0])), data


def kept(site: Site) -> list[tuple[Bundle, bytes]]:
    """Bundles the agent kept because a request named them before any decision (newest first)."""
    folder = site.root / MODELS_DIR
    out = []
    for path in sorted(folder.glob("*.bundle"), key=lambda p: p.stat().st_mtime, reverse=True):
        data = path.read_bytes()
        out.append((load_bundle(data, site.trusted, str(path)), data))
    return out


def describe(site: Site, bundle: Bundle) -> dict[str, Any]:
    """What a reviewer needs to know about a model (nothing here comes from a record)."""
    manifest = bundle.manifest
    inputs = []
    for feature in bundle.schema.features:
        if feature.categories:
            domain = "categories " + ", ".join(feature.categories)
        else:
            low = "-inf" if feature.minimum is None else f"{feature.minimum:g}"
            high = "inf" if feature.maximum is None else f"{feature.maximum:g}"
            domain = f"{feature.type} in [{low}, {high}]"
        inputs.append({"name": feature.name, "type": feature.type, "domain": domain, "required": feature.required})
    scorer = site_scorer(site, bundle)  # the static check (kept for the rounds): a failing bundle is refused here
    view: dict[str, Any] = {
        "id": bundle.sha256[:16],
        "bundle_sha256": bundle.sha256,
        "name": manifest.name,
        "state": state(site, bundle.sha256),
        "signed_by": bundle.signer_key_id,
        "packed_at": manifest.created_at,
        "format": manifest.model_format,
        "score": manifest.score_kind,
        "thresholds": list(manifest.thresholds),
        "rule": "screen-positive when score >= threshold",
        "inputs": inputs,
    }
    if manifest.model_format == "onnx":
        view["operators"] = list(getattr(scorer, "operators", ()))
        view["note"] = (
            "an ONNX graph: its weights are not readable here; the static check proved that each record's score "
            "depends on that record alone, using only the operators listed"
        )
    else:
        card = json.loads(bundle.model_bytes)
        view["scorecard"] = {
            "kind": card.get("kind"),
            "intercept": card.get("intercept", 0),
            "weights": card.get("weights", {}),
            "points": card.get("points", {}),
        }
    view["score_range"] = [_finite_or_text(scorer.low), _finite_or_text(scorer.high)]
    decision = decisions(site).get(bundle.sha256)
    if decision is not None:
        view["decision"] = {k: decision.get(k) for k in ("state", "by", "decided_at", "reason") if decision.get(k)}
    return view


def approve_bundle(site_dir: Path, bundle_bytes: bytes, by: str) -> None:
    """Approve a bundle at a site, as ``site-agent model approve`` does (the demo's sites, scripts)."""
    site = load_site(site_dir)
    decide(site, load_bundle(bundle_bytes, site.trusted, "bundle"), True, by)


def _finite_or_text(value: float) -> float | str:
    return value if math.isfinite(value) else ("-inf" if value < 0 else "inf")


def decide(site: Site, bundle: Bundle, approve: bool, by: str, reason: str = "") -> dict[str, Any]:
    """Record a person's decision about a model in the ledger; returns the entry's details."""
    if not by.strip():
        raise ValidationToolError("--by: name the person who decides")
    if not approve and not reason.strip():
        raise ValidationToolError("--reason: say why the model is rejected")
    earlier = decisions(site).get(bundle.sha256)
    if earlier is not None and earlier.get("state") == "rejected":
        # a rejection is for good (the guides say so): the same bytes cannot be approved later, by anyone
        raise ValidationToolError(
            f"model {bundle.sha256[:16]} was rejected by {earlier.get('by')} on {earlier.get('decided_at')}; a "
            "rejection is final: ask the coordinator for a new bundle"
        )
    site_scorer(site, bundle)  # a model that fails the static check cannot be approved; a passing one is kept
    details = {
        "bundle_sha256": bundle.sha256,
        "model_sha256": bundle.manifest.model_sha256,
        "name": bundle.manifest.name,
        "signer": bundle.signer_key_id,
        "by": by.strip()[:200],
        "decided_at": datetime.now(UTC).replace(microsecond=0).isoformat(),
    }
    if reason.strip():
        details["reason"] = reason.strip()[:2000]
    ledger.append(site.ledger_path, site.private_key(), "model_approval" if approve else "model_rejection", details)
    return details


def render_text(view: dict[str, Any]) -> str:
    lines = [
        f"model {view['id']}  {view['name']}  ({view['state']})",
        f"  bundle SHA-256  {view['bundle_sha256']}",
        f"  signed by key   {view['signed_by']}, packed {view['packed_at']}",
        f"  kind            {view['format']} ({view['score']} score, range {view['score_range'][0]} .. "
        f"{view['score_range'][1]})",
        f"  thresholds      {', '.join(f'{t:g}' for t in view['thresholds'])} ({view['rule']})",
        "  inputs:",
    ]
    lines += [f"    {i['name']:<20} {i['domain']}{'' if i['required'] else ' (optional)'}" for i in view["inputs"]]
    if "operators" in view:
        lines.append("  operators:      " + ", ".join(view["operators"]))
        lines.append(f"  note: {view['note']}")
    if "scorecard" in view:
        card = view["scorecard"]
        lines.append(f"  scorecard:      {card['kind']}, intercept {card['intercept']}")
        for name, weight in card["weights"].items():
            lines.append(f"    weight {name:<13} {weight}")
        for name, table in card["points"].items():
            lines.append(f"    points {name:<13} " + ", ".join(f"{k}: {v}" for k, v in table.items()))
    if "decision" in view:
        decision = view["decision"]
        lines.append(
            f"  decision:       {decision.get('state')} by {decision.get('by')} at {decision.get('decided_at')}"
            + (f" ({decision['reason']})" if decision.get("reason") else "")
        )
    return "\n".join(lines)


def cmd_model_review(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    if args.model:
        views = [describe(site, find(site, args.model)[0])]
    else:
        views = [describe(site, bundle) for bundle, _ in kept(site)]
        if not args.all:
            views = [v for v in views if v["state"] == "not reviewed"]
    if args.json:
        print_json(views)
        return 0
    if not views:
        print("no model awaits review (give a bundle file or id to see one; --all for decided ones)")
        return 0
    print("\n\n".join(render_text(v) for v in views))
    for view in views:
        if view["state"] == "not reviewed":
            print(
                f"\ndecide: site-agent model approve {view['id']} --site-dir {args.site_dir} --by NAME   "
                f"(or: site-agent model reject {view['id']} --site-dir {args.site_dir} --by NAME --reason TEXT)"
            )
    return 0


def cmd_model_approve(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    bundle, _ = find(site, args.model)
    details = decide(site, bundle, True, args.by)
    print(f"model {bundle.sha256[:16]} ({details['name']}) approved by {details['by']}; recorded in the ledger")
    return 0


def cmd_model_reject(args: argparse.Namespace) -> int:
    site = load_site(args.site_dir)
    bundle, _ = find(site, args.model)
    details = decide(site, bundle, False, args.by, args.reason)
    print(f"model {bundle.sha256[:16]} ({details['name']}) rejected by {details['by']}; it will not be run")
    return 0


def add_commands(sub: argparse._SubParsersAction) -> None:
    """Register `site-agent model review|approve|reject`."""
    group = sub.add_parser(
        "model",
        help="review, approve or reject a coordinator's model bundle (policy require_model_approval)",
        description="With require_model_approval = true (what `site-agent init` writes), the agent runs a model "
        "bundle only after a person at the site approved it. `model review` shows what a model is: its inputs, "
        "its kind (the ONNX operators, or a scorecard's weights and points), thresholds and signer. A bundle a "
        "request named before any decision is kept in SITEDIR/models/ and listed by `model review`.",
    )
    actions = group.add_subparsers(metavar="ACTION")
    p = actions.add_parser(
        "review",
        help="show models awaiting review, or one model (bundle file or id)",
        epilog=examples(
            "site-agent model review --site-dir SITE", "site-agent model review model.bundle --site-dir SITE"
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("model", nargs="?", help="a bundle file, or a kept model's id (first hex digits of its SHA-256)")
    p.add_argument("--site-dir", type=Path, required=True, help="site folder")
    p.add_argument("--all", action="store_true", help="also list kept models already decided")
    p.add_argument("--json", action="store_true", help="machine-readable output")
    p.set_defaults(handler=cmd_model_review)
    p = actions.add_parser(
        "approve",
        help="approve a model: requests naming it may run (recorded in the ledger)",
        epilog=examples('site-agent model approve 397b5ba0df4ba166 --site-dir SITE --by "Board member A"'),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("model", help="a bundle file, or a kept model's id")
    p.add_argument("--site-dir", type=Path, required=True, help="site folder")
    p.add_argument("--by", required=True, help="name of the person approving")
    p.set_defaults(handler=cmd_model_approve)
    p = actions.add_parser(
        "reject",
        help="reject a model for good: requests naming it are refused (recorded in the ledger)",
        epilog=examples(
            'site-agent model reject 397b5ba0df4ba166 --site-dir SITE --by NAME --reason "not the protocol\'s"'
        ),
        formatter_class=argparse.RawDescriptionHelpFormatter,
    )
    p.add_argument("model", help="a bundle file, or a kept model's id")
    p.add_argument("--site-dir", type=Path, required=True, help="site folder")
    p.add_argument("--by", required=True, help="name of the person rejecting")
    p.add_argument("--reason", required=True, help="why (kept in the site's ledger; never sent)")
    p.set_defaults(handler=cmd_model_reject)
