"""The site ledger: append-only JSON Lines, each entry hash-chained to the previous one and signed.

Entry fields: ``seq`` (1, 2, ...), ``time`` (UTC), ``event``, ``details``, ``prev`` (the previous entry's
hash, or 64 zeros), ``hash`` (SHA-256 of the canonical JSON of the fields before it) and ``signature`` (the
site key's Ed25519 signature of ``hash``). An entry is written and flushed to disk (fsync) before anything
it records is sent, so a crash between the two leaves an entry that says what was about to leave.

Events:

``request_received``  a request arrived (its SHA-256 and the bundle's)
``refusal``           the request was refused: ``reason`` as it was sent back (a fixed category, see
                      docs/formats.md), ``detail`` the site's own message, and once the request's signature
                      verified ``study_id``, ``request_id`` and ``coordinator_key_id`` (such a refusal counts
                      against the policy's caps)
``held``              a release was prepared and held for a person's approval (full text, audit facts, review,
                      and whom it answers: ``request`` text, its ``request_sha256`` and the
                      ``coordinator_key_id`` that signed it; ``preview`` in ledgers written before this name
                      was settled, read alike)
``approval``          a person approved a held release (who, when, the SHA-256 they approved)
``rejection``         a person rejected a held release (who, when, why)
``release``           a release is about to leave (full text, the audit facts of what it shows and hides, the
                      review, and whom it answers, as for ``held``)
``model_approval``    a person approved a model bundle (``bundle_sha256``, ``name``, ``signer``, ``by``)
``model_rejection``   a person rejected a model bundle (as above, with ``reason``)
``sent``              the release was handed over (``via``: ``file`` with its path, or ``flower``: handed to
                      the local node (SuperNode) for delivery, which does not yet say it arrived)
``acknowledged``      the coordinator's store holds the release (online: its acknowledgement, signed with a
                      coordinator key this site pinned, arrived with a later message and names a release this
                      ledger records as sent; ``acknowledgement`` keeps the signed document)

A ``release`` without a later ``sent`` for the same SHA-256 means the agent stopped between recording and
handing over (a crash or an interrupted command): the release may or may not have reached the coordinator.
"""

from __future__ import annotations

import fcntl
import json
import os
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import TYPE_CHECKING, Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from federation.protocol import ValidationToolError, canonical_bytes, key_id, sha256_hex
from federation.protocol.keys import sign, verify

if TYPE_CHECKING:  # audit imports scipy; the site-agent's --help and ledger commands do not need it
    from .audit import ReleaseFacts


GENESIS = "0" * 64
EVENTS = (
    "request_received",
    "refusal",
    "model_approval",
    "model_rejection",
    "held",
    "approval",
    "rejection",
    "release",
    "sent",
    "acknowledged",
)
HELD_EVENTS = ("held", "preview")  # "preview": the same event in older ledgers
_FIELDS = ("seq", "time", "event", "details", "prev")


class LedgerError(ValidationToolError):
    exit_code = 2


@dataclass(frozen=True)
class Entry:
    seq: int
    time: str
    event: str
    details: dict[str, Any]
    prev: str
    hash: str
    signature: str


def _entry_hash(fields: dict[str, Any]) -> str:
    return sha256_hex(canonical_bytes(fields))


def _lines(path: Path) -> Iterator[tuple[int, bytes, bool]]:
    """(line number, content, ended by a newline) for every line of the file."""
    data = path.read_bytes()
    lines = data.split(b"\n")
    for number, line in enumerate(lines, start=1):
        last = number == len(lines)
        if last and line == b"":
            return
        yield number, line, not last


def read_entries(path: Path) -> list[dict[str, Any]]:
    """Every entry, in file order; raise LedgerError naming a line that is not a JSON entry."""
    if not path.exists():
        return []
    entries = []
    for number, line, _ in _lines(path):
        if not line.strip():
            continue
        try:
            entry = json.loads(line)
        except (json.JSONDecodeError, UnicodeDecodeError):
            raise LedgerError(f"{path}: line {number} is not a JSON entry") from None
        if not isinstance(entry, dict):
            raise LedgerError(f"{path}: line {number} is not a JSON entry")
        entries.append(entry)
    return entries


def _last_entry(fd: int) -> dict[str, Any] | None:
    """The last entry of the open ledger, read from the end (the ledger can be long)."""
    size = os.fstat(fd).st_size
    if size == 0:
        return None
    chunk = 1 << 16
    buffer = b""
    position = size
    while position > 0:
        step = min(chunk, position)
        position -= step
        buffer = os.pread(fd, step, position) + buffer
        stripped = buffer.rstrip(b"\n")
        if b"\n" in stripped or position == 0:
            line = stripped.rsplit(b"\n", 1)[-1]
            try:
                return json.loads(line)
            except (json.JSONDecodeError, UnicodeDecodeError):
                raise LedgerError(
                    "ledger: the last line is not a complete entry; run `site-agent ledger verify`"
                ) from None
    return None


def append(path: Path, private_key: Ed25519PrivateKey, event: str, details: dict[str, Any]) -> Entry:
    """Append one signed entry and fsync it before returning (an exclusive lock orders concurrent writers)."""
    if event not in EVENTS:
        raise ValueError(f"unknown ledger event {event!r}")
    fd = os.open(path, os.O_RDWR | os.O_APPEND | os.O_CREAT, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        last = _last_entry(fd)
        fields = {
            "seq": (int(last["seq"]) + 1) if last else 1,
            "time": datetime.now(UTC).isoformat(timespec="microseconds"),
            "event": event,
            "details": details,
            "prev": last["hash"] if last else GENESIS,
        }
        digest = _entry_hash(fields)
        entry = {**fields, "hash": digest, "signature": sign(private_key, digest.encode("ascii"))}
        line = json.dumps(entry, sort_keys=True, separators=(",", ":")) + "\n"
        os.write(fd, line.encode("utf-8"))
        os.fsync(fd)
    finally:
        os.close(fd)  # closing releases the lock
    return Entry(**entry)


def verify_ledger(path: Path, public_key: Ed25519PublicKey) -> int:
    """Check every entry; return the number of entries or raise LedgerError naming the first bad line.

    Detects an edited entry (its hash no longer matches), an entry signed by another key, and a deleted,
    inserted or reordered entry (sequence numbers and the hash chain break). Removing entries from the end
    leaves a shorter valid chain; :func:`check_copies` catches that when a release copy is left behind.
    """
    if not path.exists():
        raise LedgerError(f"{path}: no ledger file")
    expected_prev, expected_seq = GENESIS, 1
    site_key = key_id(public_key)
    for number, line, complete in _lines(path):
        where = f"{path}: line {number}"
        if not line.strip():
            raise LedgerError(f"{where}: empty line (an entry was removed or the file was edited)")
        if not complete:
            raise LedgerError(f"{where}: incomplete entry (the file was cut off, e.g. by a crash while writing)")
        try:
            entry = json.loads(line)
            fields = {k: entry[k] for k in _FIELDS}
            digest, signature = entry["hash"], entry["signature"]
        except (json.JSONDecodeError, UnicodeDecodeError):
            raise LedgerError(f"{where}: not a JSON entry (the file was edited)") from None
        except (KeyError, TypeError):
            raise LedgerError(f"{where}: entry is missing a field (the file was edited)") from None
        if set(entry) != {*_FIELDS, "hash", "signature"}:
            raise LedgerError(f"{where}: entry has fields an entry does not have (the file was edited)")
        if _entry_hash(fields) != digest:
            raise LedgerError(f"{where}: entry was edited (its hash does not match its content)")
        if not isinstance(signature, str) or not verify(public_key, digest.encode("ascii"), signature):
            raise LedgerError(f"{where}: signature is not by the site key {site_key} (signed by another key or forged)")
        seq = fields["seq"]
        if seq != expected_seq:
            if isinstance(seq, int) and seq > expected_seq:
                raise LedgerError(
                    f"{where}: sequence number {seq} where {expected_seq} was expected (an entry before it was "
                    "deleted, or entries were reordered)"
                )
            raise LedgerError(
                f"{where}: sequence number {seq} where {expected_seq} was expected (an entry was inserted, or "
                "entries were reordered)"
            )
        if fields["prev"] != expected_prev:
            raise LedgerError(f"{where}: does not chain to the entry before it (an entry was replaced or moved)")
        expected_prev, expected_seq = digest, expected_seq + 1
    return expected_seq - 1


def verify_before_use(path: Path, public_key: Ed25519PublicKey) -> None:
    """Verify the whole ledger, if there is one, before a command reads it for a decision or adds to it (the
    audit's memory and the board's record): :func:`verify_ledger`, raising LedgerError (exit code 2)."""
    if path.exists():
        verify_ledger(path, public_key)


def check_copies(path: Path, folder: Path) -> list[str]:
    """Release files in ``folder`` that the ledger does not record (entries removed from its end)."""
    recorded = {
        e["details"].get("release_sha256") for e in read_entries(path) if e.get("event") in ("release", *HELD_EVENTS)
    }
    missing = []
    for copy in sorted(folder.glob("*.json")) if folder.is_dir() else []:
        if copy.name.endswith(".review.json"):
            continue
        if sha256_hex(copy.read_bytes()) not in recorded:
            missing.append(copy.name)
    return missing


def head(path: Path) -> str:
    entries = read_entries(path)
    return entries[-1]["hash"] if entries else GENESIS


def releases_for_study(path: Path, study_id: str) -> list[dict[str, Any]]:
    """Details of every ``release`` entry of the study."""
    return [
        e["details"]
        for e in read_entries(path)
        if e.get("event") == "release" and e.get("details", {}).get("study_id") == study_id
    ]


def answered_for_study(path: Path, study_id: str | None) -> list[dict[str, Any]]:
    """Releases of the study that left or may leave: released, or held and not rejected (one per SHA-256).

    ``study_id=None`` gives them for every study (the site-wide view the ``max_studies`` cap needs).
    """
    entries = read_entries(path)
    rejected = {e["details"].get("release_sha256") for e in entries if e.get("event") == "rejection"}
    answered: dict[str, dict[str, Any]] = {}
    for entry in entries:
        details = entry.get("details", {})
        if entry.get("event") not in ("release", *HELD_EVENTS):
            continue
        if study_id is not None and details.get("study_id") != study_id:
            continue
        digest = details.get("release_sha256")
        if entry.get("event") in HELD_EVENTS and digest in rejected:
            continue
        answered.setdefault(digest, details)
    return list(answered.values())


def counted_requests(path: Path, study_id: str | None) -> dict[str, dict[str, Any]]:
    """Requests that count against the policy's caps, by request SHA-256 (or release SHA-256 where a ledger
    entry names no request): answered (released, or held and not rejected) and refused after the request's
    signature verified (except refusals by the caps themselves). ``study_id=None`` gives every study's.

    A refusal counts like an answer because a refusal is an answer too: a model built to fail on some records
    would otherwise ask the data yes/no questions for free.
    """
    counted: dict[str, dict[str, Any]] = {}
    for details in answered_for_study(path, study_id):
        counted.setdefault(str(details.get("request_sha256") or details.get("release_sha256")), details)
    for entry in read_entries(path):
        details = entry.get("details", {})
        if entry.get("event") != "refusal" or not details.get("study_id"):
            continue
        if str(details.get("reason", "")).startswith("limit reached"):  # the cap itself answered: nothing to add
            continue
        if study_id is not None and details.get("study_id") != study_id:
            continue
        counted.setdefault(str(details.get("request_sha256")), details)
    return counted


def facts_for_site(path: Path) -> list[ReleaseFacts]:
    """What any recipient knows or may yet learn from this site: the audit facts of every release the site
    made, to every study (recipients of different studies may be the same party), including releases
    awaiting approval (so that approving them later stays safe)."""
    return facts_for_study(path, None)


def facts_for_study(path: Path, study_id: str | None) -> list[ReleaseFacts]:
    """The audit facts of every release to one study (``None``: to every study, as :func:`facts_for_site`)."""
    from .audit import ReleaseFacts

    facts = []
    for details in answered_for_study(path, study_id):
        raw = details.get("facts")
        if raw is None:
            continue
        label = str(details.get("request_id", "?"))
        bundle = ""
        if isinstance(raw, dict):
            bundle = str(raw.get("bundle", ""))
        if not bundle and isinstance(details.get("release"), str):
            try:
                bundle = str(json.loads(details["release"]).get("bundle_sha256", ""))
            except json.JSONDecodeError:
                bundle = ""
        facts.append(ReleaseFacts.from_dict(label, raw, bundle))
    return facts


def unsent(path: Path) -> list[dict[str, Any]]:
    """``release`` entries with no later ``sent`` entry for the same release (interrupted hand-overs)."""
    entries = read_entries(path)
    sent = {e["details"].get("release_sha256") for e in entries if e.get("event") == "sent"}
    return [e for e in entries if e.get("event") == "release" and e["details"].get("release_sha256") not in sent]


def summary(entry: dict[str, Any]) -> str:
    """One line for people: what happened, without the release text or the audit facts."""
    details = entry.get("details", {}) or {}
    event = entry.get("event")
    short = {k: v for k, v in details.items() if k not in ("release", "facts", "review", "request")}
    for key in ("request_sha256", "bundle_sha256", "release_sha256"):
        if isinstance(short.get(key), str):
            short[key] = short[key][:12]
    if event == "release" or event in HELD_EVENTS:
        study, request = details.get("study_id"), details.get("request_id")
        text = f"study {study} request {request} release {str(details.get('release_sha256', ''))[:12]}"
        if details.get("coordinator_key_id"):  # older ledgers do not say whose request it answers
            text += f" for coordinator key {details['coordinator_key_id']}"
        if event in HELD_EVENTS:
            text += f" held for approval as {_held_id(details)}"
        return text
    if event == "approval":
        return f"{_held_id(details)} approved by {details.get('by')}"
    if event == "rejection":
        return f"{_held_id(details)} rejected by {details.get('by')}: {details.get('reason')}"
    if event == "sent":
        if details.get("via") == "flower":
            return f"release {str(details.get('release_sha256', ''))[:12]} handed to the local node for delivery"
        where = details.get("path") or details.get("via")
        return f"release {str(details.get('release_sha256', ''))[:12]} handed over via {where}"
    if event == "acknowledged":
        signer = details.get("coordinator_key_id")
        return (
            f"release {str(details.get('release_sha256', ''))[:12]} stored by the coordinator "
            f"(acknowledged; stored at {details.get('stored_at')}"
            + (f", signed by coordinator key {signer})" if signer else ")")
        )
    if event == "refusal":
        return f"refused: {details.get('reason')}"
    if event in ("model_approval", "model_rejection"):
        verb = "approved" if event == "model_approval" else "rejected"
        model = str(details.get("bundle_sha256", ""))[:16]
        return f"model {model} ({details.get('name')}) {verb} by {details.get('by')}"
    return json.dumps(short, sort_keys=True)


def _held_id(details: dict[str, Any]) -> Any:
    return details.get("held_id", details.get("pending_id"))  # "pending_id" in older ledgers
