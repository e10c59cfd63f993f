"""Flower ServerApp: sends one study request to every connected site and ingests the replies.

A thin adapter over :mod:`federation.store`: replies are matched to what was sent by
``reply_to_message_id``; each site is recorded as released, refused (with the site's reason), rejected
(the coordinator refused its release) or unreachable.
"""

from __future__ import annotations

import json
import time
from collections.abc import Callable
from dataclasses import asdict, dataclass
from pathlib import Path

from flwr.app import ConfigRecord, Context, Message, RecordDict
from flwr.serverapp import Grid, ServerApp

from federation.protocol import ValidationToolError

from .store import Store

MESSAGE_TYPE = "query.validate"


@dataclass(frozen=True)
class SiteOutcome:
    node_id: int
    site_id: str
    status: str  # released | held (for the site's approval) | refused | rejected | unreachable
    reason: str = ""


@dataclass(frozen=True)
class RoundConfig:
    store_path: Path
    request_bytes: bytes
    bundle_bytes: bytes
    min_sites: int = 1
    compare_bundle_bytes: bytes | None = None  # the second bundle of a paired request
    wait_for_sites_s: float = 60.0
    deadline_s: float = 600.0
    poll_s: float = 0.2


def run_round(grid: Grid, config: RoundConfig) -> list[SiteOutcome]:
    """Send the request to every node and collect replies until all answered or the deadline passed."""
    start = time.monotonic()
    node_ids: list[int] = []
    while time.monotonic() - start < config.wait_for_sites_s:
        node_ids = sorted(grid.get_node_ids())
        if len(node_ids) >= config.min_sites:
            break
        time.sleep(config.poll_s)
    if len(node_ids) < config.min_sites:
        raise ValidationToolError(f"only {len(node_ids)} sites connected; the study needs {config.min_sites}")
    fields = {"request": config.request_bytes, "bundle": config.bundle_bytes}
    if config.compare_bundle_bytes is not None:
        fields["compare_bundle"] = config.compare_bundle_bytes
    content = RecordDict({"request": ConfigRecord(fields)})
    messages = [
        Message(content, dst_node_id=node, message_type=MESSAGE_TYPE, ttl=config.deadline_s) for node in node_ids
    ]
    pushed = list(grid.push_messages(messages))
    pending = {mid: node for mid, node in zip(pushed, node_ids, strict=True) if mid}
    outcomes = {
        node: SiteOutcome(node, "", "unreachable", "message could not be sent")
        for mid, node in zip(pushed, node_ids, strict=True)
        if not mid
    }
    store = Store(config.store_path)
    try:
        while pending and time.monotonic() - start < config.deadline_s:
            arrived = []
            for reply in grid.pull_messages(list(pending)):
                node = pending.pop(reply.metadata.reply_to_message_id, None)
                if node is not None:
                    arrived.append((node, reply))
            outcomes.update(_record_all(store, arrived))  # what one poll brought is stored in one transaction
            if pending:
                time.sleep(config.poll_s)
    finally:
        store.close()
    for node in pending.values():
        outcomes[node] = SiteOutcome(node, "", "unreachable", "no reply before the deadline")
    return [outcomes[node] for node in node_ids]


def _record_all(store: Store, arrived: list[tuple[int, Message]]) -> dict[int, SiteOutcome]:
    """Classify the replies one poll brought; store their releases together (each checked on its own)."""
    outcomes: dict[int, SiteOutcome] = {}
    releases: list[tuple[int, str, bytes]] = []
    for node, reply in arrived:
        outcome = _record(node, reply)
        if isinstance(outcome, SiteOutcome):
            outcomes[node] = outcome
        else:
            releases.append((node, *outcome))
    stored = store.ingest_each([(release, f"release from node {node}") for node, _, release in releases])
    for (node, site_id, _), result in zip(releases, stored, strict=True):
        if isinstance(result, ValidationToolError):
            outcomes[node] = SiteOutcome(node, site_id, "rejected", str(result))
        else:
            outcomes[node] = SiteOutcome(node, site_id, "released")
    return outcomes


def _record(node: int, reply: Message) -> SiteOutcome | tuple[str, bytes]:
    """The outcome a reply settles by itself, or (site id, release bytes) still to be stored."""
    if reply.has_error():
        return SiteOutcome(node, "", "unreachable", f"Flower error code {reply.error.code}")
    try:
        result = reply.content.config_records["result"]
    except KeyError:
        return SiteOutcome(node, "", "rejected", "reply holds no result")
    site_id = str(result.get("site_id", ""))
    if result.get("status") in ("held", "pending"):  # "pending": what older site agents send
        return SiteOutcome(node, site_id, "held", str(result.get("reason", ""))[:500])
    if result.get("status") != "released":
        return SiteOutcome(node, site_id, "refused", str(result.get("reason", ""))[:500])
    release = result.get("release")
    if not isinstance(release, bytes):
        return SiteOutcome(node, site_id, "rejected", "reply holds no release")
    return site_id, release


def make_server_app(config: RoundConfig, on_done: Callable[[list[SiteOutcome]], None] | None = None) -> ServerApp:
    server = ServerApp()

    @server.main()
    def main(grid: Grid, context: Context) -> None:
        outcomes = run_round(grid, config)
        if on_done is not None:
            on_done(outcomes)

    return server


app = ServerApp()


@app.main()
def main(grid: Grid, context: Context) -> None:
    """Deployment entry point: the study folder (run config ``study-dir``) holds request, bundle and store."""
    if context.run_config.get("round-id"):
        # Submitted by `federation run`: quorum, node-key binding, retries, per-site status in the store.
        from federation.deploy.rounds import RoundSettings, run_deployed_round

        run_deployed_round(grid, RoundSettings.from_run_config(context.run_config))
        return
    study = Path(str(context.run_config["study-dir"]))
    config = RoundConfig(
        store_path=study / "study.db",
        request_bytes=(study / "request.json").read_bytes(),
        bundle_bytes=(study / "model.bundle").read_bytes(),
        min_sites=int(context.run_config.get("min-sites", 1)),
        compare_bundle_bytes=(study / "compare.bundle").read_bytes() if (study / "compare.bundle").exists() else None,
    )
    outcomes = run_round(grid, config)
    (study / "round.json").write_text(json.dumps([asdict(o) for o in outcomes], indent=2))
