"""Flower ClientApp: a thin adapter from a Flower message to :func:`site_agent.runner.run_request`.

Two message types:

``query.validate``  the request and the bundle as bytes; the reply carries the signed release as bytes, or a
                    refusal reason: one of the fixed categories of docs/formats.md ("Refusals"), with the
                    agent's own message only where it cannot depend on a record; never a path, an
                    exception's type or text, or a value.
``query.ping``      a readiness check (:mod:`site_agent.readiness`): site folder, policy, keys, ledger, app
                    allowlist and data source, without reading a record; the reply is a fixed set of fields
                    whose reason never holds a path of the site's file system.

Either message may carry the coordinator's **acknowledgements**: one document per release from this site
that its store holds, signed with the coordinator's key. Each one whose signature verifies against a pinned
coordinator key and that names a release this site handed to its node, not yet acknowledged, is written to
the ledger (``acknowledged``, with the signed document), so the ledger tells a release handed to the local
node (``sent``) from one the coordinator stored. A forged or altered one is logged and not recorded.

Which site folder a node serves: ``node_config["site-dir"]`` in deployment
(``flower-supernode --node-config 'site-dir="/srv/site"'``); in simulation the factory maps each virtual
node's ``partition-id`` to a site folder.
"""

from __future__ import annotations

import os
import sys
from collections.abc import Sequence
from pathlib import Path

from flwr.app import ConfigRecord, Context, Message, RecordDict
from flwr.clientapp import ClientApp

from federation.protocol import ValidationToolError

from .config import Site, load_site
from .readiness import check_readiness, shareable

ACTION = "validate"
PING = "ping"
MESSAGE_TYPE = f"query.{ACTION}"
PING_MESSAGE_TYPE = f"query.{PING}"
ACKNOWLEDGEMENTS = "acknowledgements"  # the record holding the coordinator's acknowledgements


def _site_dir(context: Context, site_dirs: Sequence[Path] | None) -> Path:
    if "site-dir" in context.node_config:
        return Path(str(context.node_config["site-dir"]))
    if site_dirs is not None and "partition-id" in context.node_config:
        return Path(site_dirs[int(context.node_config["partition-id"])])
    raise ValidationToolError("this node has no site folder (set node config site-dir)")


def record_acknowledgements(site: Site, message: Message) -> int:
    """Write the coordinator's signed acknowledgements of this site's releases to the ledger; return how many.

    Each acknowledgement is a document signed with the coordinator's key
    (:mod:`federation.protocol.acknowledgement`). It counts only when its signature verifies against a
    coordinator key this site pinned, it names this site, and it names a release this site's ledger records
    as handed over. Anything else is said on the app runner's log and not recorded: a forged or altered
    acknowledgement (``signature does not verify``) never makes the ledger claim a delivery.
    """
    from federation.protocol import SignatureError
    from federation.protocol.acknowledgement import Acknowledgement

    from . import ledger

    record = message.content.config_records.get(ACKNOWLEDGEMENTS)
    if record is None:
        return 0
    documents = record.get("documents", [])
    if not isinstance(documents, list) or not all(isinstance(d, bytes) for d in documents):
        print("acknowledgements: malformed record ignored (not a list of signed documents)", file=sys.stderr)
        return 0
    entries = ledger.read_entries(site.ledger_path)
    released = {
        e["details"].get("release_sha256"): e["details"]
        for e in entries
        if e.get("event") == "release" and isinstance(e.get("details"), dict)
    }
    handed = {e["details"].get("release_sha256") for e in entries if e.get("event") == "sent"}
    done = {e["details"].get("release_sha256") for e in entries if e.get("event") == "acknowledged"}
    new = 0
    for index, document in enumerate(documents):
        try:
            ack = Acknowledgement.from_bytes(document, site.trusted, f"acknowledgement {index + 1}")
        except SignatureError as exc:
            print(f"acknowledgements: refused, not recorded as delivered: {exc}", file=sys.stderr)
            continue
        except ValidationToolError as exc:
            print(f"acknowledgements: malformed, ignored: {exc}", file=sys.stderr)
            continue
        digest = ack.release_sha256
        if digest in done:
            continue
        if ack.site_id != site.site_id or digest not in handed or digest not in released:
            print(f"acknowledgements: release {digest[:12]} is not one this site handed over; ignored", file=sys.stderr)
            continue
        details = released[digest]
        ledger.append(
            site.ledger_path,
            site.private_key(),
            "acknowledged",
            {
                "release_sha256": digest,
                "study_id": details.get("study_id", ""),
                "request_id": details.get("request_id", ""),
                "stored_at": ack.stored_at,
                "coordinator_key_id": ack.coordinator_key_id,
                "acknowledgement": document.decode("utf-8"),
                "via": "flower",
                "note": "the coordinator's store holds this release (its signed acknowledgement, on a later message)",
            },
        )
        done.add(digest)
        new += 1
    return new


def _acknowledge(site: Site, message: Message) -> None:
    try:
        record_acknowledgements(site, message)
    except Exception as exc:  # never let bookkeeping of an earlier release stop the answer to this message
        print(f"acknowledgements: not recorded ({type(exc).__name__})", file=sys.stderr)


def answer(message: Message, context: Context, site_dirs: Sequence[Path] | None = None) -> Message:
    """Answer one validation request; every outcome is a normal reply the coordinator can record."""
    try:
        site = load_site(_site_dir(context, site_dirs))
    except Exception:  # the site folder cannot be read: the site's IT sees why when it runs the agent locally
        return _reply(message, {"status": "refused", "reason": "internal error at the site", "site_id": ""})
    _acknowledge(site, message)
    try:
        record = message.content.config_records["request"]
        request_bytes, bundle_bytes = record["request"], record["bundle"]
        compare_bytes = record.get("compare_bundle")  # the second bundle of a paired request
        if not isinstance(request_bytes, bytes) or not isinstance(bundle_bytes, bytes):
            raise ValidationToolError("message: request and bundle must be bytes")
        if compare_bytes is not None and not isinstance(compare_bytes, bytes):
            raise ValidationToolError("message: the comparison bundle must be bytes")
    except (KeyError, TypeError):
        reason = "request not accepted: message: no request in it"
        return _reply(message, {"status": "refused", "reason": reason, "site_id": site.site_id})
    except ValidationToolError as exc:
        return _reply(message, {"status": "refused", "reason": f"request not accepted: {exc}", "site_id": site.site_id})
    from .approval import AwaitingApproval, record_sent
    from .runner import run_request  # pandas, pyarrow and scipy: only a validation message needs them

    try:
        outcome = run_request(site, request_bytes, bundle_bytes, compare_bundle_bytes=compare_bytes)
    except AwaitingApproval as exc:  # held at the site until a person approves it; nothing was sent
        return _reply(message, {"status": "held", "reason": str(exc), "site_id": site.site_id})
    except Exception as exc:  # recorded in the ledger by run_request, which sets the line that may travel
        reason = shareable(getattr(exc, "refusal", "internal error at the site"), site.root)
        return _reply(message, {"status": "refused", "reason": reason, "site_id": site.site_id})
    reply = _reply(message, {"status": "released", "release": outcome.release_bytes, "site_id": site.site_id})
    record_sent(site, outcome.release_bytes, "flower")  # handed to the local node; acknowledged on a later message
    return reply


def readiness(message: Message, context: Context, site_dirs: Sequence[Path] | None = None) -> Message:
    """Answer a readiness check (``federation run --ping``) with a fixed set of fields; no record is read."""
    from .launcher import CHECKED_BUNDLE_ENV

    try:
        root: Path | None = _site_dir(context, site_dirs)
    except ValidationToolError:
        root = None
    result = check_readiness(root, os.environ.get(CHECKED_BUNDLE_ENV))
    if result.site_id and root is not None:
        try:
            _acknowledge(load_site(root), message)
        except ValidationToolError:
            pass
    return _reply(message, result.fields())


def _reply(message: Message, fields: dict) -> Message:
    return Message(RecordDict({"result": ConfigRecord(fields)}), reply_to=message)


def make_client_app(site_dirs: Sequence[Path] | None = None) -> ClientApp:
    client = ClientApp()

    @client.query(ACTION)
    def validate(message: Message, context: Context) -> Message:
        return answer(message, context, site_dirs)

    @client.query(PING)
    def ping(message: Message, context: Context) -> Message:
        return readiness(message, context, site_dirs)

    return client


app = make_client_app()
