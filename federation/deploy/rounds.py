"""One online round, run by the ServerApp inside the SuperLink: quorum, sending, collecting, retrying.

Every enrolled site whose node key is bound in the store and that has not yet released for the study's
request is a *target*. The round

1. waits (until the deadline) for a quorum: released-before plus connected targets >= ``min-sites``;
2. sends the request to each target's node as soon as it is online (nodes are matched to sites by their
   node key, never by the name a node gives itself), and sends again only when Flower reports the
   message undeliverable (node gone, message expired, ClientApp crashed) and the node is back;
3. collects replies by message id and records each site in the store as it happens: ``released``
   (the release was ingested), ``held`` (held at the site for a person's approval; ``--resume`` asks
   again), ``refused`` (the site's reason), ``rejected`` (the coordinator refused the release: wrong key,
   wrong site for this node, replay), or, at the deadline, ``unreachable`` (never connected, or no reply)
   or ``not asked`` (connected, but the round ended before it was asked: no quorum);
4. never waits past the deadline.

A readiness check (``federation run --ping``, kind ``ping``) goes the same way with a ``query.ping``
message; each site is recorded ``ready``, or ``failed`` with the category of the first failed check (an
error reply, such as the site's launcher refusing an app bundle it has not listed, is a failure, never an
answer). A readiness check stores no release and never counts as one.

Every message to a site carries the coordinator's acknowledgements of that site's stored releases: signed
documents (:mod:`federation.protocol.acknowledgement`, signed by ``federation run --sign``; this process never
holds the key), which the site verifies against its pinned coordinator key before it writes ``acknowledged``.

Because every outcome is written when it happens, a round cut short (SuperLink stopped, run stopped)
leaves an exact record; ``federation run --resume`` starts a new round for the same request that asks
only the sites that have not released.
"""

from __future__ import annotations

import re
import time
from collections.abc import Mapping
from dataclasses import dataclass, field
from pathlib import Path

from flwr.app import ConfigRecord, Message, RecordDict
from flwr.common.constant import ErrorCode
from flwr.serverapp import Grid

from federation.protocol import Release, Request, ValidationToolError
from federation.store import Store

from .nodes import fingerprint_of_reported

ACKNOWLEDGEMENTS = "acknowledgements"  # the record site_agent.flower_client reads

VALIDATE = "validate"
PING = "ping"  # a trivial query: measures Flower's own round floor on the same deployment
MESSAGE_TYPES = {VALIDATE: "query.validate", PING: "query.ping"}
# Final within a round; ``held`` (held for a person's approval at the site) is asked again by --resume.
FINAL = {"released", "refused", "rejected", "held", "ready", "failed"}
NOT_ASKED = "not asked"
CONNECTED_WAITING = "connected, waiting for the quorum"
# Flower's error replies to a readiness check, by the category a person on call looks at first.
_PING_ERRORS = {
    int(ErrorCode.CLIENT_APP_RAISED_EXCEPTION): "app runner",
    int(ErrorCode.INVALID_FAB): "app allowlist",
    int(ErrorCode.LOAD_CLIENT_APP_EXCEPTION): "app start",
}
_CLIENTAPP_CLASS = re.compile(r"^<class '([\w.]+)'>")
RETRY_CODES = {ErrorCode.NODE_UNAVAILABLE, ErrorCode.MESSAGE_UNAVAILABLE, ErrorCode.CLIENT_APP_CRASHED}
_CLIENTAPP_REASON = re.compile(r"^<class '[\w.]+'>:<'(.*)'>$", re.DOTALL)


@dataclass(frozen=True)
class RoundSettings:
    study_dir: Path
    round_id: str
    kind: str = VALIDATE
    min_sites: int = 1
    deadline_s: float = 600.0
    poll_s: float = 0.2

    @classmethod
    def from_run_config(cls, run_config: Mapping[str, object]) -> RoundSettings:
        kind = str(run_config.get("round-kind", VALIDATE))
        if kind not in MESSAGE_TYPES:
            raise ValidationToolError(f"run config round-kind: must be one of {', '.join(MESSAGE_TYPES)}")
        return cls(
            study_dir=Path(str(run_config["study-dir"])),
            round_id=str(run_config["round-id"]),
            kind=kind,
            min_sites=int(run_config.get("min-sites", 1)),  # type: ignore[call-overload]
            deadline_s=float(run_config.get("deadline-s", 600.0)),  # type: ignore[arg-type]
            poll_s=float(run_config.get("poll-s", 0.2)),  # type: ignore[arg-type]
        )


@dataclass
class _Target:
    site_id: str
    fingerprint: str
    status: str = "waiting"
    node_id: int | None = None
    retry: bool = False
    seen_online: bool = False


@dataclass
class RoundResult:
    state: str
    released_total: int
    statuses: dict[str, str] = field(default_factory=dict)


def clientapp_reason(reason: str) -> str:
    """The message a ClientApp error carries, without Flower's ``<class ...>:<'...'>`` wrapping."""
    match = _CLIENTAPP_REASON.match(reason.strip())
    return (match.group(1) if match else reason.strip())[:500]


def check_release_binding(release_bytes: bytes, expected_site: str, node_id: int) -> str | None:
    """Why a release may not be accepted from this node, or None: a node speaks only for its bound site."""
    try:
        release = Release.from_bytes(release_bytes, f"release from node {node_id}")
    except ValidationToolError as exc:
        return str(exc)
    if release.site_id != expected_site:
        return f"node {node_id} is bound to site {expected_site!r} but its release claims site {release.site_id!r}"
    return None


class DeployedRound:
    """The round's state machine; :meth:`run` drives it against a Flower ``Grid``."""

    def __init__(self, grid: Grid, settings: RoundSettings) -> None:
        self.grid = grid
        self.settings = settings
        study = settings.study_dir
        self.store = Store(study / "study.db")
        self.request_bytes = (study / "request.json").read_bytes()
        self.bundle_bytes = (study / "model.bundle").read_bytes()
        compare = study / "compare.bundle"  # the second bundle of a paired request, when the study has one
        self.compare_bundle_bytes = compare.read_bytes() if compare.exists() else None
        self.request = Request.from_bytes(self.request_bytes, None, str(study / "request.json"))
        released = self.store.answered(self.request.request_id) if settings.kind == VALIDATE else set()
        self.released_before = len(released)
        self.targets = {
            site: _Target(site, fingerprint)
            for site, (fingerprint, _) in self.store.node_keys().items()
            if site not in released
        }
        self.by_message: dict[str, _Target] = {}

    # --- bookkeeping ------------------------------------------------------------------------------------
    def _set(self, target: _Target, status: str, reason: str = "", sent: bool = False) -> None:
        target.status = status
        self.store.set_round_site(self.settings.round_id, target.site_id, status, reason, target.node_id, sent)

    def _online(self) -> dict[str, int]:
        """Fingerprint -> node id of every online node."""
        online = {}
        for info in self.grid.get_nodes():
            fingerprint = fingerprint_of_reported(bytes(info.public_key))
            if fingerprint:
                online[fingerprint] = int(info.node_id)
        return online

    def _released_total(self) -> int:
        done = "ready" if self.settings.kind == PING else "released"
        return self.released_before + sum(t.status == done for t in self.targets.values())

    # --- the round --------------------------------------------------------------------------------------
    def run(self) -> RoundResult:
        settings = self.settings
        end = time.monotonic() + settings.deadline_s
        mine = [r for r in self.store.rounds(self.request.request_id) if r["round_id"] == settings.round_id]
        if not mine or mine[0]["state"] != "submitted":
            # Not a round `federation run` is waiting for (e.g. a stale run restarted): ask nobody.
            return RoundResult("ignored", self.released_before)
        for target in self.targets.values():
            self._set(target, "waiting")
        self.store.set_round(settings.round_id, "waiting", f"waiting for {settings.min_sites} sites")
        while True:
            online = self._online()
            for target in self.targets.values():
                if not target.seen_online and target.fingerprint in online:
                    target.seen_online = True  # stored, so a round cut short can tell "not asked" from absent
                    self._set(target, "waiting", CONNECTED_WAITING)
            connected = sum(t.fingerprint in online for t in self.targets.values())
            if self.released_before + connected >= settings.min_sites or not self.targets:
                break
            if time.monotonic() >= end:
                return self._finish(
                    f"quorum not reached before the deadline: {connected} of {len(self.targets)} "
                    f"sites connected, {settings.min_sites} needed"
                )
            time.sleep(settings.poll_s)
        self.store.set_round(settings.round_id, "running", f"sending to {len(self.targets)} sites")
        while any(t.status not in FINAL for t in self.targets.values()) and time.monotonic() < end:
            self._send(self._online(), end)
            self._collect()
            time.sleep(settings.poll_s)
        return self._finish("")

    def _send(self, online: dict[str, int], end: float) -> None:
        # Send once per site, and again only after Flower said the message could not be delivered or run
        # (node gone, message expired, ClientApp crashed). Never on a guess: a second copy of a message the
        # node already holds would be refused by the site's ledger as a replay and hide the first answer.
        batch = []
        for target in self.targets.values():
            if target.status in FINAL or target.fingerprint not in online:
                continue
            if target.status == "sent" or (target.status == "unreachable" and not target.retry):
                continue
            target.node_id = online[target.fingerprint]
            target.seen_online = True
            batch.append(target)
        if not batch:
            return
        ttl = max(1.0, end - time.monotonic())
        messages = [Message(self._content(t), dst_node_id=t.node_id, message_type=self._type(), ttl=ttl) for t in batch]
        for target, message_id in zip(batch, self.grid.push_messages(messages), strict=True):
            if not message_id:
                self._set(target, "unreachable", "message could not be queued at the SuperLink")
                target.retry = True
                continue
            target.retry = False
            self.by_message[message_id] = target
            self._set(target, "sent", f"sent to node {target.node_id}", sent=True)

    def _content(self, target: _Target) -> RecordDict:
        records: dict[str, ConfigRecord] = {}
        if self.settings.kind == PING:
            records["ping"] = ConfigRecord({"round": self.settings.round_id})
        else:
            fields = {"request": self.request_bytes, "bundle": self.bundle_bytes}
            if self.compare_bundle_bytes is not None:
                fields["compare_bundle"] = self.compare_bundle_bytes
            records["request"] = ConfigRecord(fields)
        signed = self.store.acknowledgements_of(target.site_id)
        if signed:  # signed by `federation run --sign`; the site verifies each against its pinned coordinator key
            records[ACKNOWLEDGEMENTS] = ConfigRecord({"documents": signed})
        return RecordDict(records)

    def _type(self) -> str:
        return MESSAGE_TYPES[self.settings.kind]

    def _collect(self) -> None:
        if not self.by_message:
            return
        to_store: list[tuple[_Target, bytes]] = []
        for reply in self.grid.pull_messages(list(self.by_message)):
            target = self.by_message.pop(reply.metadata.reply_to_message_id, None)
            if target is not None:
                release = self._classify(target, reply)
                if release is not None:
                    to_store.append((target, release))
        if not to_store:
            return
        # What one poll brought is stored in one transaction (one disk sync), each release checked on its own.
        documents = [(r, f"release from node {t.node_id} (site {t.site_id})") for t, r in to_store]
        for (target, _), result in zip(to_store, self.store.ingest_each(documents), strict=True):
            if isinstance(result, ValidationToolError):
                self._set(target, "rejected", str(result))
            else:
                self._set(target, "released")

    def _classify(self, target: _Target, reply: Message) -> bytes | None:
        """Record what a reply settles by itself; return a release that passed the node binding, to store."""
        if self.settings.kind == PING:
            self._classify_readiness(target, reply)
            return None
        if reply.has_error():
            code, reason = int(reply.error.code), clientapp_reason(str(reply.error.reason))
            if code in RETRY_CODES:
                target.retry = True
                self._set(target, "unreachable", f"Flower error code {code}; will retry while the deadline allows")
            elif code == ErrorCode.CLIENT_APP_RAISED_EXCEPTION:
                self._set(target, "refused", reason or "the site's app runner refused the message")
            elif code == ErrorCode.INVALID_FAB:
                self._set(target, "refused", "the app bundle failed the site's verification")
            elif code == ErrorCode.LOAD_CLIENT_APP_EXCEPTION:
                self._set(target, "refused", "the site could not load the validation app")
            else:
                target.retry = True
                self._set(target, "unreachable", f"Flower error code {code}")
            return None
        try:
            result = reply.content.config_records["result"]
        except KeyError:
            self._set(target, "rejected", "the reply holds no result")
            return None
        if result.get("status") in ("held", "pending"):  # "pending": what older site agents send
            self._set(target, "held", str(result.get("reason", ""))[:500] or "held for approval at the site")
            return None
        if result.get("status") != "released":
            self._set(target, "refused", str(result.get("reason", ""))[:500] or "refused without a reason")
            return None
        release = result.get("release")
        if not isinstance(release, bytes):
            self._set(target, "rejected", "the reply holds no release")
            return None
        problem = check_release_binding(release, target.site_id, int(target.node_id or 0))
        if problem:
            self._set(target, "rejected", problem)
            return None
        return release

    def _classify_readiness(self, target: _Target, reply: Message) -> None:
        """``ready``, or ``failed`` with the category of what failed; Flower's delivery errors are retried."""
        if reply.has_error():
            code, raw = int(reply.error.code), str(reply.error.reason)
            if code in RETRY_CODES:
                target.retry = True
                self._set(target, "unreachable", f"Flower error code {code}; will retry while the deadline allows")
                return
            found = _CLIENTAPP_CLASS.match(raw.strip())
            category = _PING_ERRORS.get(code, "app runner")
            if found and found.group(1).rsplit(".", 1)[-1] == "AppBundleRefused":
                category = "app allowlist"
            reason = clientapp_reason(raw) or f"Flower error code {code}"
            self._set(target, "failed", f"{category}: {reason}"[:500])
            return
        result = reply.content.config_records.get("result")
        if result is None or result.get("kind") != "readiness":
            self._set(target, "failed", "app runner: the reply holds no readiness result (an older site agent?)")
            return
        if result.get("status") == "ready":
            self._set(target, "ready", "checked: " + ", ".join(str(c) for c in result.get("checks", [])))
            return
        reason = str(result.get("reason", "")) or f"{result.get('category', 'site')}: not ready"
        self._set(target, "failed", reason[:500])

    def _finish(self, note: str) -> RoundResult:
        for target in self.targets.values():
            if target.status in FINAL:
                continue
            if target.status == "waiting" and target.seen_online:
                self._set(target, NOT_ASKED, "connected, but the round ended before it was asked")
                continue
            reason = (
                "no reply before the deadline"
                if target.status == "sent"
                else "did not connect before the deadline"
                if target.status == "waiting"
                else "still unreachable at the deadline"
            )
            self._set(target, "unreachable", reason)
        total = self._released_total()
        # A readiness check is complete when enough sites answered it, ready or not (exit 3 says some are not).
        reached = sum(t.status in FINAL for t in self.targets.values()) if self.settings.kind == PING else total
        state = "complete" if reached >= self.settings.min_sites else "no-quorum"
        if not note:
            verb = "ready" if self.settings.kind == PING else "released"
            note = f"{total} {verb} of {self.released_before + len(self.targets)} bound sites"
        self.store.set_round(self.settings.round_id, state, note)
        return RoundResult(state, total, {t.site_id: t.status for t in self.targets.values()})

    def close(self) -> None:
        self.store.close()


# How soon the ServerApp asks again for a reply's content that the SuperLink does not hold yet (seconds).
REPLY_PULL_BACKOFF = (0.1, 1.0)  # first wait, longest wait; Flower 1.42's own: 1 s doubling up to 10 s


def quicker_reply_pulls() -> None:
    """Ask sooner for reply content still in flight, in this process (the ServerApp's) only.

    A reply is listed at the SuperLink as soon as its node announces it, before the node has pushed its
    content; pulling it in between makes Flower's grid wait 1 s, 2 s, 4 s ... (up to 10 s) before asking again,
    and the whole round waits with it (seen: 4-12 s at the end of a 10-site round). The grid's object pull
    (``flwr.superlink.grid.http_grid.pull_objects``, Flower-internal; flwr is pinned) is given a first wait
    of 0.1 s doubling up to 1 s; its overall time limit stays Flower's.
    """
    from functools import partial

    from flwr.superlink.grid import http_grid

    if not isinstance(http_grid.pull_objects, partial):
        first, longest = REPLY_PULL_BACKOFF
        http_grid.pull_objects = partial(http_grid.pull_objects, initial_backoff=first, backoff_cap=longest)


def run_deployed_round(grid: Grid, settings: RoundSettings) -> RoundResult:
    quicker_reply_pulls()
    round_ = DeployedRound(grid, settings)
    try:
        return round_.run()
    finally:
        round_.close()
