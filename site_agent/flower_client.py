"""Flower ClientApp: a thin adapter from a Flower message to :func:`site_agent.runner.run_request`.

The message carries the request and the bundle as bytes; the reply carries the signed release as bytes,
or a refusal reason: one of the fixed categories of docs/formats.md ("Refusals"), with the agent's own
message only where it cannot depend on a record; never a path, an exception's type or text, or a value.

Which site folder a node serves: ``node_config["site-dir"]`` in deployment
(``flower-supernode --node-config 'site-dir="/srv/site"'``); in simulation the factory maps each virtual
node's ``partition-id`` to a site folder.
"""

from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

from flwr.app import ConfigRecord, Context, Message, RecordDict
from flwr.clientapp import ClientApp

from federation.protocol import ValidationToolError

from .approval import AwaitingApproval, record_sent
from .config import load_site
from .runner import run_request

ACTION = "validate"
MESSAGE_TYPE = f"query.{ACTION}"


def _site_dir(context: Context, site_dirs: Sequence[Path] | None) -> Path:
    if "site-dir" in context.node_config:
        return Path(str(context.node_config["site-dir"]))
    if site_dirs is not None and "partition-id" in context.node_config:
        return Path(site_dirs[int(context.node_config["partition-id"])])
    raise ValidationToolError("this node has no site folder (set node config site-dir)")


def answer(message: Message, context: Context, site_dirs: Sequence[Path] | None = None) -> Message:
    """Answer one validation request; every outcome is a normal reply the coordinator can record."""
    try:
        site = load_site(_site_dir(context, site_dirs))
    except Exception:  # the site folder cannot be read: the site's IT sees why when it runs the agent locally
        return _reply(message, {"status": "refused", "reason": "internal error at the site", "site_id": ""})
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
    try:
        outcome = run_request(site, request_bytes, bundle_bytes, compare_bundle_bytes=compare_bytes)
    except AwaitingApproval as exc:  # held at the site until a person approves it; nothing was sent
        return _reply(message, {"status": "held", "reason": str(exc), "site_id": site.site_id})
    except Exception as exc:  # recorded in the ledger by run_request, which sets the line that may travel
        reason = getattr(exc, "refusal", "internal error at the site")
        return _reply(message, {"status": "refused", "reason": reason, "site_id": site.site_id})
    reply = _reply(message, {"status": "released", "release": outcome.release_bytes, "site_id": site.site_id})
    record_sent(site, outcome.release_bytes, "flower")  # handed to the node for delivery
    return reply


def _reply(message: Message, fields: dict) -> Message:
    return Message(RecordDict({"result": ConfigRecord(fields)}), reply_to=message)


def make_client_app(site_dirs: Sequence[Path] | None = None) -> ClientApp:
    client = ClientApp()

    @client.query(ACTION)
    def validate(message: Message, context: Context) -> Message:
        return answer(message, context, site_dirs)

    return client


app = make_client_app()
