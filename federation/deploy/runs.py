"""``federation run``: submit a round to the study's SuperLink, follow it, record the end, resume it.

The ServerApp (:mod:`federation.deploy.rounds`) does the round inside the SuperLink and writes every site's
status to the study store as it happens; this side submits the run, prints what the store says, and makes
sure the command itself ends: at the round's end, at the deadline plus a bounded start-up allowance, when
the SuperLink stops answering, or on Ctrl-C (the run is stopped). Whatever ended the round, a later
``federation run --resume`` asks only the sites that have not released; a site is never asked twice for a
request it already answered (the store also refuses a second release for the same request and site, and
the site's ledger refuses a replayed request id).
"""

from __future__ import annotations

import time
import uuid
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from federation.protocol import Request, ValidationToolError, load_private_key
from federation.store import Store

from .acknowledge import sign_acknowledgements
from .fab import build_app_bundle
from .rounds import CONNECTED_WAITING, NOT_ASKED, PING, VALIDATE
from .superlink import LinkSettings, SuperLinkError, register_node, registered_nodes, run_status, stop_run, submit_run

LIVE_STATES = {"submitted", "waiting", "running"}
# How a round is stored: a readiness check is never a release round (``--resume`` and the one-round-per-request
# rule look at validation rounds only).
STORED_KIND = {VALIDATE: VALIDATE, PING: "readiness"}
START_ALLOWANCE_S = 120.0  # how long the SuperLink may take to start the ServerApp before we give up


class RoundError(ValidationToolError):
    """The round ended without a quorum, or was cut short; ``--resume`` continues it."""

    exit_code = 4


@dataclass(frozen=True)
class RunOptions:
    study: Path
    min_sites: int | None = None  # default: every site with a bound node key
    deadline_s: float = 600.0
    resume: bool = False
    kind: str = VALIDATE
    poll_s: float = 0.2
    link: LinkSettings | None = None
    link_grace_s: float = 5.0  # how long the SuperLink may stay silent before the round counts as cut short
    # The coordinator's signing key (coordinator.key): signs the acknowledgements of stored releases that the
    # round's messages carry to the sites. Without it no acknowledgement is signed and sites keep ``sent``.
    sign_key: Path | None = None
    # Called with every site's status on each poll (a live table at a terminal); when given, the per-site
    # change lines are not said, since the table shows them.
    on_sites: Callable[[dict[str, dict]], None] | None = None


@dataclass
class RunOutcome:
    round_id: str
    run_id: int
    request_id: str
    state: str
    note: str
    sites: dict[str, dict] = field(default_factory=dict)
    released_before: int = 0
    wall_s: float = 0.0

    kind: str = VALIDATE

    @property
    def released(self) -> int:
        """Sites that released (a readiness check releases nothing: 0)."""
        if self.kind == PING:
            return 0
        return self.released_before + sum(s["status"] == "released" for s in self.sites.values())

    @property
    def ready(self) -> int:
        """Sites a readiness check found ready (0 for a validation round)."""
        return sum(s["status"] == "ready" for s in self.sites.values()) if self.kind == PING else 0

    def to_dict(self) -> dict:
        return {
            "round_id": self.round_id,
            "kind": STORED_KIND[self.kind],
            "run_id": self.run_id,
            "request_id": self.request_id,
            "state": self.state,
            "note": self.note,
            "released_before": self.released_before,
            "released": self.released,
            **({"ready": self.ready} if self.kind == PING else {}),
            "wall_s": round(self.wall_s, 3),
            "sites": self.sites,
        }


def _study_request(study: Path, store: Store) -> Request:
    path = study / "request.json"
    try:
        request = Request.from_bytes(path.read_bytes(), None, str(path))
    except FileNotFoundError:
        raise ValidationToolError(
            f"{path}: not found (a study folder holds study.db, request.json, model.bundle)"
        ) from None
    if store.request(request.request_id) is None:
        raise ValidationToolError(f"{path}: request {request.request_id!r} was not issued from {store.path}")
    return request


def _close_earlier_rounds(store: Store, link: LinkSettings, request_id: str, say: Callable[[str], None]) -> None:
    """Make sure no earlier run of this request is still asking sites; mark a round left live as cut short.

    A round can be left live in the store (the command was killed) and a run can be left live at the
    SuperLink (the command gave up on it); either could otherwise ask sites alongside the new round.
    """
    for earlier in store.rounds(request_id):
        if earlier["run_id"]:
            status, _, _ = run_status(link, int(earlier["run_id"]))
            if status not in ("finished", "unknown"):
                say(f"stopping the earlier run {earlier['run_id']} of round {earlier['round_id'][:8]}")
                stop_run(link, int(earlier["run_id"]))
        if earlier["state"] in LIVE_STATES:
            _mark_cut_short(store, earlier["round_id"], "interrupted", "cut short; continued by a later round")


def _mark_cut_short(store: Store, round_id: str, state: str, note: str) -> None:
    for site, row in store.round_sites(round_id).items():
        if row["status"] == "sent":
            store.set_round_site(round_id, site, "unreachable", f"round {state}: {note}")
        elif row["status"] == "waiting" and row["reason"] == CONNECTED_WAITING:
            store.set_round_site(round_id, site, NOT_ASKED, f"connected, but the round was {state} before it was asked")
        elif row["status"] == "waiting":
            store.set_round_site(round_id, site, "unreachable", f"did not connect before the round was {state}")
    store.set_round(round_id, state, note)


def _sync_registrations(store: Store, link: LinkSettings, say: Callable[[str], None]) -> None:
    """Register with the SuperLink every bound node key it does not know yet."""
    known = registered_nodes(link)
    for site, (fingerprint, pem) in store.node_keys().items():
        if fingerprint not in known:
            node_id = register_node(link, pem, site)
            say(f"registered the node key of site {site} with the SuperLink (node {node_id})")


def run_study(options: RunOptions, say: Callable[[str], None] = print) -> RunOutcome:
    """Submit one round for the study's request and follow it to its end (see module docstring)."""
    started = time.monotonic()
    study = Path(options.study).resolve()
    link = options.link or LinkSettings.for_study(study)
    if options.kind not in (VALIDATE, PING):
        raise ValidationToolError(f"round kind must be {VALIDATE} or {PING}")
    if options.deadline_s <= 0:
        raise ValidationToolError("--deadline: must be a positive number of seconds")
    signing_key = load_private_key(options.sign_key) if options.sign_key is not None else None
    store = Store(study / "study.db")
    try:
        request = _study_request(study, store)
        bound = store.node_keys()
        if not bound:
            raise ValidationToolError(f"{store.path}: no site has a node key (enrol sites with --node-key)")
        min_sites = len(bound) if options.min_sites is None else options.min_sites
        if not 1 <= min_sites <= len(bound):
            raise ValidationToolError(f"--min-sites: must be from 1 to {len(bound)} (the sites with a node key)")
        if options.kind == VALIDATE:
            earlier = store.rounds(request.request_id)
            validate_rounds = [r for r in earlier if r["kind"] == VALIDATE]
            if validate_rounds and not options.resume:
                last = validate_rounds[-1]
                raise ValidationToolError(
                    f"request {request.request_id} already had a round ({last['round_id'][:8]}, {last['state']}); "
                    "continue it with --resume (sites that released are not asked again)"
                )
            _close_earlier_rounds(store, link, request.request_id, say)
            released = store.answered(request.request_id)
        else:
            released = set()
        targets = sorted(set(bound) - released)
        if not targets:
            say(f"every site with a node key has released for request {request.request_id}; nothing to ask")
            return RunOutcome(
                "", 0, request.request_id, "complete", "nothing to ask", {}, len(released), time.monotonic() - started
            )
        _sync_registrations(store, link, say)
        _acknowledge(store, signing_key, say)
        bundle = build_app_bundle()
        round_id = uuid.uuid4().hex
        store.start_round(round_id, request.request_id, STORED_KIND[options.kind], min_sites, options.deadline_s)
        run_config: dict[str, str | int | float | bool] = {
            "study-dir": str(study),
            "round-id": round_id,
            "round-kind": options.kind,
            "min-sites": min_sites,
            "deadline-s": float(options.deadline_s),
            "poll-s": float(options.poll_s),
        }
        if options.kind == PING:
            say(
                f"readiness check {round_id[:8]}: {len(targets)} sites, deadline {options.deadline_s:g} s, "
                f"app bundle sha256 {bundle.sha256} (nothing is computed or released)"
            )
        else:
            say(
                f"round {round_id[:8]}: request {request.request_id} to {len(targets)} sites "
                f"({len(released)} released earlier), quorum {min_sites}, deadline {options.deadline_s:g} s, "
                f"app bundle sha256 {bundle.sha256}"
            )
        try:
            run_id = submit_run(link, bundle, run_config)
        except SuperLinkError:
            _mark_cut_short(store, round_id, "interrupted", "the SuperLink did not accept the run")
            raise
        store.set_round(round_id, None, None, run_id=run_id)  # the ServerApp may already have moved on
        outcome = RunOutcome(
            round_id, run_id, request.request_id, "submitted", "", {}, len(released), kind=options.kind
        )
        try:
            _follow(store, link, outcome, options, say)
        except KeyboardInterrupt:
            try:
                stop_run(link, run_id)
            except SuperLinkError:
                pass
            _mark_cut_short(store, round_id, "interrupted", "stopped by the coordinator (Ctrl-C)")
            say(f"round {round_id[:8]} interrupted; continue with `federation run --study {study} --resume`")
            raise
        outcome.wall_s = time.monotonic() - started
        _acknowledge(store, signing_key, say)  # this round's releases: delivered with the next message
        return outcome
    finally:
        store.close()


def _acknowledge(store: Store, key: Ed25519PrivateKey | None, say: Callable[[str], None]) -> None:
    """Sign an acknowledgement for every stored release without one (needs ``--sign``)."""
    if key is None:
        if store.unacknowledged():
            say("acknowledgements: not signed (no --sign key): sites keep their stored releases as sent only")
        return
    count = sign_acknowledgements(store, key)
    if count:
        say(f"acknowledgements: signed {count} for stored releases (sites record them with the next message)")


def _follow(store: Store, link: LinkSettings, outcome: RunOutcome, options: RunOptions, say: Callable) -> None:
    limit = time.monotonic() + options.deadline_s + START_ALLOWANCE_S
    silent_since: float | None = None
    shown: dict[str, tuple[str, str]] = {}
    next_status_check = 0.0
    while True:
        time.sleep(options.poll_s)
        row = _round_row(store, outcome)
        sites = store.round_sites(outcome.round_id)
        if options.on_sites is not None:
            options.on_sites(sites)
        for site, info in sorted(sites.items()):
            seen = (info["status"], info["reason"])
            if shown.get(site) != seen:
                shown[site] = seen
                if options.on_sites is None:
                    say(f"  {site}: {info['status']}" + (f" ({info['reason']})" if info["reason"] else ""))
        outcome.sites, outcome.state, outcome.note = sites, row["state"], row["note"]
        if row["state"] not in LIVE_STATES:
            return
        now = time.monotonic()
        if now >= limit:
            _cut_short(store, link, outcome, "the round outlived its deadline")
            return
        if now < next_status_check:
            continue
        next_status_check = now + 1.0
        try:
            status, sub_status, details = run_status(link, outcome.run_id)
            silent_since = None
        except SuperLinkError:
            silent_since = silent_since or now
            if now - silent_since >= options.link_grace_s:
                _cut_short(store, link, outcome, "the SuperLink stopped answering", stop=False)
                return
            continue
        if status == "finished":
            row = _round_row(store, outcome)
            if row["state"] in LIVE_STATES:
                why = f"the ServerApp ended ({sub_status}{': ' + details if details else ''})"
                _cut_short(store, link, outcome, why[:300], stop=False)
            continue


def _round_row(store: Store, outcome: RunOutcome) -> dict:
    return next(r for r in store.rounds(outcome.request_id) if r["round_id"] == outcome.round_id)


def _cut_short(store: Store, link: LinkSettings, outcome: RunOutcome, why: str, stop: bool = True) -> None:
    if stop:
        try:
            stop_run(link, outcome.run_id)
        except SuperLinkError:
            pass
    _mark_cut_short(store, outcome.round_id, "interrupted", why)
    outcome.state, outcome.note = "interrupted", why
    outcome.sites = store.round_sites(outcome.round_id)


def exit_status(outcome: RunOutcome) -> int:
    """0: every asked site released (or, for a readiness check, is ready); 3: quorum reached without some sites;
    RoundError otherwise."""
    if outcome.state == "complete":
        done = "ready" if outcome.kind == PING else "released"
        missing = [s for s, info in outcome.sites.items() if info["status"] != done]
        return 3 if missing else 0
    raise RoundError(
        f"round {outcome.round_id[:8]} {outcome.state}: {outcome.note}; continue with `federation run --resume`"
    )
