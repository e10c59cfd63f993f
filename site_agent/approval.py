"""Releases held for a person's approval (policy ``require_approval = true``).

A held release is prepared and signed once; its exact bytes are written to ``SITEDIR/held/ID.json``
(with what suppression did and the audit's result beside it in ``ID.review.json``) and recorded in full in
the ledger (event ``held``). Reviewing, approving and releasing all use those bytes: approving records their
SHA-256, and a release leaves only if the bytes still have that SHA-256, so nothing is recomputed between
what a person saw and what leaves. The state of each held release is read from the ledger alone:

``held``      prepared, no decision yet (nothing has left)
``approved``  a person approved it; the next ``site-agent run`` of the same request, the online agent's
              next answer to it, or ``site-agent release ID`` hands it over
``rejected``  a person rejected it; it never leaves
``released``  approved and handed over (recorded by a ``release`` entry)

``ID`` is the first 16 hex digits of the release's SHA-256.

Ledgers and site folders written before these names were settled say ``preview`` (event), ``pending``
(state), ``pending_id`` (field) and ``pending/`` (folder); they are read as ``held`` alike.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from federation.protocol import PolicyViolation, Release, Request, ValidationToolError, sha256_hex
from federation.protocol.cli_support import EXIT_PARTIAL, write_atomic

from . import ledger
from .config import Site
from .ledger import HELD_EVENTS

HELD_DIR = "held"
OLD_HELD_DIR = "pending"  # folder name in site folders made before this version


class AwaitingApproval(ValidationToolError):
    """The release is held until a person at the site approves it (not an error: exit code 3)."""

    exit_code = EXIT_PARTIAL

    def __init__(self, held_id: str, message: str) -> None:
        super().__init__(message)
        self.held_id = held_id


@dataclass(frozen=True)
class Held:
    held_id: str
    state: str  # held | approved | rejected | released
    study_id: str
    request_id: str
    request_sha256: str
    release_sha256: str
    prepared_at: str
    decided_by: str = ""
    decided_at: str = ""
    reason: str = ""

    def path(self, site: Site) -> Path:
        path = site.root / HELD_DIR / f"{self.held_id}.json"
        old = site.root / OLD_HELD_DIR / f"{self.held_id}.json"
        return old if not path.exists() and old.exists() else path


def _held_id(details: dict[str, Any]) -> Any:
    return details.get("held_id", details.get("pending_id"))


def addressee(request: Request, request_bytes: bytes) -> dict[str, str]:
    """Who a release answers, for the ledger: the request (verified) and the coordinator key that signed it."""
    return {
        "request_sha256": sha256_hex(request_bytes),
        "coordinator_key_id": request.coordinator_key_id,
        "request": request_bytes.decode("utf-8"),
    }


ADDRESSEE_FIELDS = ("request_sha256", "coordinator_key_id", "request")


def hold(
    site: Site,
    request: Request,
    request_bytes: bytes,
    release_bytes: bytes,
    facts: dict[str, Any],
    review: dict[str, Any],
) -> Held:
    """Queue a signed release for approval: ledger first (fsynced), then the files people read."""
    release = Release.from_bytes(release_bytes, "release")
    digest = sha256_hex(release_bytes)
    held_id = digest[:16]
    request_sha256 = sha256_hex(request_bytes)
    entry = ledger.append(
        site.ledger_path,
        site.private_key(),
        "held",
        {
            "held_id": held_id,
            "study_id": release.study_id,
            "request_id": release.request_id,
            **addressee(request, request_bytes),
            "release_sha256": digest,
            "release": release_bytes.decode("utf-8"),
            "facts": facts,
            "review": review,
        },
    )
    folder = site.root / HELD_DIR
    write_atomic(folder / f"{held_id}.json", release_bytes)
    write_atomic(folder / f"{held_id}.review.json", json.dumps(review, indent=2, sort_keys=True).encode() + b"\n")
    return Held(held_id, "held", release.study_id, release.request_id, request_sha256, digest, entry.time)


def held_releases(site: Site) -> dict[str, Held]:
    """Every release ever held at this site, by id, with its state as the ledger records it."""
    held: dict[str, Held] = {}
    for entry in ledger.read_entries(site.ledger_path):
        details = entry.get("details", {})
        event = entry.get("event")
        held_id = details.get("held_id", details.get("pending_id"))
        if event in HELD_EVENTS:
            held[held_id] = Held(
                held_id,
                "held",
                details.get("study_id", ""),
                details.get("request_id", ""),
                details.get("request_sha256", ""),
                details.get("release_sha256", ""),
                entry.get("time", ""),
            )
        elif held_id in held and event in ("approval", "rejection", "release"):
            old = held[held_id]
            if event == "release":
                held[held_id] = _replace(old, state="released")
            elif old.state == "held":
                held[held_id] = _replace(
                    old,
                    state="approved" if event == "approval" else "rejected",
                    decided_by=str(details.get("by", "")),
                    decided_at=str(details.get("decided_at", entry.get("time", ""))),
                    reason=str(details.get("reason", "")),
                )
    return held


def _replace(held: Held, **changes: Any) -> Held:
    return Held(**{**held.__dict__, **changes})


def held_for_request(site: Site, request_sha256: str) -> Held | None:
    """The latest held release answering exactly these request bytes, if any."""
    matches = [h for h in held_releases(site).values() if h.request_sha256 == request_sha256]
    return matches[-1] if matches else None


def find(site: Site, held_id: str) -> Held:
    held = held_releases(site)
    if held_id not in held:
        matches = [h for key, h in held.items() if key.startswith(held_id)] if len(held_id) >= 6 else []
        if len(matches) != 1:
            raise ValidationToolError(f"{held_id}: no held release with this id (see `site-agent review`)")
        return matches[0]
    return held[held_id]


def reviewed_bytes(site: Site, held: Held) -> bytes:
    """The held release's bytes, checked against the SHA-256 the ledger recorded when it was prepared."""
    path = held.path(site)
    try:
        data = path.read_bytes()
    except FileNotFoundError:
        data = _from_ledger(site, held)
    if sha256_hex(data) != held.release_sha256:
        raise ValidationToolError(
            f"{path}: changed since it was prepared (its SHA-256 is not the one in the ledger); reject it and run "
            "the request again"
        )
    return data


def held_entry(site: Site, held: Held) -> dict[str, Any]:
    """The ``held`` entry's details as the ledger recorded them when the release was prepared ({} if none)."""
    for entry in ledger.read_entries(site.ledger_path):
        details = entry.get("details", {})
        if entry.get("event") in HELD_EVENTS and _held_id(details) == held.held_id:
            return details if isinstance(details, dict) else {}
    return {}


def _from_ledger(site: Site, held: Held) -> bytes:
    details = held_entry(site, held)
    if not details:
        raise ValidationToolError(f"{held.held_id}: the ledger holds no prepared release with this id")
    return str(details.get("release", "")).encode("utf-8")


def _decide(site: Site, held_id: str, event: str, by: str, reason: str = "") -> Held:
    held = find(site, held_id)
    if held.state != "held":
        raise ValidationToolError(f"{held.held_id}: already {held.state}; a decision is made once")
    if not by.strip():
        raise ValidationToolError("--by: name the person who decides")
    reviewed_bytes(site, held)  # the decision is about exactly these bytes
    now = datetime.now(UTC).replace(microsecond=0).isoformat()
    details = {
        "held_id": held.held_id,
        "study_id": held.study_id,
        "request_id": held.request_id,
        "release_sha256": held.release_sha256,
        "by": by.strip()[:200],
        "decided_at": now,
    }
    if reason:
        details["reason"] = reason.strip()[:2000]
    ledger.append(site.ledger_path, site.private_key(), event, details)
    return find(site, held.held_id)


def approve(site: Site, held_id: str, by: str, reason: str = "") -> Held:
    return _decide(site, held_id, "approval", by, reason)


def reject(site: Site, held_id: str, reason: str, by: str) -> Held:
    if not reason.strip():
        raise ValidationToolError("--reason: say why the release is rejected")
    return _decide(site, held_id, "rejection", by, reason)


def hand_over(site: Site, held: Held) -> bytes:
    """The approved bytes, with the ``release`` entry written (once) before they may leave.

    Raises AwaitingApproval while no one has decided, and PolicyViolation once it was rejected.
    """
    if held.state == "held":
        raise AwaitingApproval(
            held.held_id, f"release {held.held_id} is held for approval by the site (nothing has been sent)"
        )
    if held.state == "rejected":
        raise PolicyViolation(f"release {held.held_id}: the site's reviewer rejected it; it will not be sent")
    data = reviewed_bytes(site, held)
    if held.state == "approved":
        release = Release.from_bytes(data, "release")
        prepared = held_entry(site, held)
        # the release entry says what the held one said: which request (and coordinator key) it answers, the
        # counts behind it and the review, so that a ledger reader needs no other entry
        answered = {key: prepared[key] for key in ADDRESSEE_FIELDS if key in prepared}
        ledger.append(
            site.ledger_path,
            site.private_key(),
            "release",
            {
                "held_id": held.held_id,
                "study_id": release.study_id,
                "request_id": release.request_id,
                **answered,
                "release_sha256": held.release_sha256,
                "release": data.decode("utf-8"),
                "facts": prepared.get("facts", {}),
                "review": prepared.get("review", {}),
            },
        )
        write_atomic(site.releases_dir / f"{release.study_id}-{release.request_id}.json", data)
    return data


def record_sent(site: Site, release_bytes: bytes, via: str, path: Path | None = None) -> None:
    """Ledger entry after a release was handed over (``via`` = ``file`` or ``flower``).

    Online (``flower``) the release is handed to the site's own node for delivery: the entry says so, and an
    ``acknowledged`` entry follows once the coordinator's store is known to hold it.
    """
    details: dict[str, Any] = {"release_sha256": sha256_hex(release_bytes), "via": via}
    if via == "flower":
        details["note"] = "handed to the local node (SuperNode) for delivery; not yet acknowledged by the coordinator"
    if path is not None:
        details["path"] = str(path)
    ledger.append(site.ledger_path, site.private_key(), "sent", details)
