"""The site ledger: append-only JSON Lines, each entry hash-chained to the previous one and signed.

Entry fields: ``seq`` (1, 2, ...), ``time``, ``event`` (``request_received``, ``refusal``, ``release``),
``details``, ``prev`` (the previous entry's hash, or 64 zeros), ``hash`` (SHA-256 of the canonical JSON of
the fields before it) and ``signature`` (the site key's Ed25519 signature of ``hash``). An entry is written
and flushed to disk (fsync) before anything it records is sent.
"""

from __future__ import annotations

import json
import os
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey, Ed25519PublicKey

from federation.protocol import ValidationToolError, canonical_bytes, sha256_hex
from federation.protocol.keys import sign, verify

GENESIS = "0" * 64


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


def read_entries(path: Path) -> list[dict[str, Any]]:
    if not path.exists():
        return []
    entries = []
    with open(path, encoding="utf-8") as handle:
        for number, line in enumerate(handle, start=1):
            if not line.strip():
                continue
            try:
                entries.append(json.loads(line))
            except json.JSONDecodeError:
                raise LedgerError(f"{path}: line {number} is not a JSON entry") from None
    return entries


def append(path: Path, private_key: Ed25519PrivateKey, event: str, details: dict[str, Any]) -> Entry:
    """Append one signed entry and fsync it before returning."""
    entries = read_entries(path)
    prev = entries[-1]["hash"] if entries else GENESIS
    fields = {
        "seq": len(entries) + 1,
        "time": datetime.now(UTC).isoformat(timespec="microseconds"),
        "event": event,
        "details": details,
        "prev": prev,
    }
    digest = _entry_hash(fields)
    entry = {**fields, "hash": digest, "signature": sign(private_key, digest.encode("ascii"))}
    line = json.dumps(entry, sort_keys=True, separators=(",", ":")) + "\n"
    fd = os.open(path, os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o600)
    try:
        os.write(fd, line.encode("utf-8"))
        os.fsync(fd)
    finally:
        os.close(fd)
    return Entry(**entry)


def verify_ledger(path: Path, public_key: Ed25519PublicKey) -> int:
    """Check every entry; return the number of entries or raise LedgerError naming the first bad line."""
    expected_prev = GENESIS
    entries = read_entries(path)
    for number, entry in enumerate(entries, start=1):
        where = f"{path}: line {number}"
        try:
            fields = {k: entry[k] for k in ("seq", "time", "event", "details", "prev")}
            digest, signature = entry["hash"], entry["signature"]
        except (KeyError, TypeError):
            raise LedgerError(f"{where}: entry is missing a field") from None
        if fields["seq"] != number:
            raise LedgerError(f"{where}: sequence number breaks (entry deleted, inserted or reordered)")
        if fields["prev"] != expected_prev:
            raise LedgerError(f"{where}: does not chain to the previous entry (deleted, inserted or reordered)")
        if _entry_hash(fields) != digest:
            raise LedgerError(f"{where}: entry was edited (hash does not match its content)")
        if not verify(public_key, digest.encode("ascii"), signature):
            raise LedgerError(f"{where}: signature is not the site key's")
        expected_prev = digest
    return len(entries)


def releases_for_study(path: Path, study_id: str) -> list[dict[str, Any]]:
    return [
        e["details"]
        for e in read_entries(path)
        if e.get("event") == "release" and e.get("details", {}).get("study_id") == study_id
    ]
