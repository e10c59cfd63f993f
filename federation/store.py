"""The coordinator's study store (SQLite): bundles, requests issued, enrolled sites, ingested releases.

Every write happens in one transaction, so a refused or failed ingest leaves the store as it was.
"""

from __future__ import annotations

import json
import sqlite3
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from federation.protocol import (
    IngestError,
    KeyRing,
    Release,
    Request,
    SignatureError,
    ValidationToolError,
    key_id,
    sha256_hex,
)
from federation.protocol.crashpoints import crash_point
from federation.protocol.keys import parse_public_key, public_pem

SCHEMA = """
CREATE TABLE IF NOT EXISTS bundles (
    sha256 TEXT PRIMARY KEY, name TEXT NOT NULL, manifest TEXT NOT NULL, added_at TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS requests (
    request_id TEXT PRIMARY KEY, study_id TEXT NOT NULL, bundle_sha256 TEXT NOT NULL,
    document BLOB NOT NULL, issued_at TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS sites (
    site_id TEXT PRIMARY KEY, key_id TEXT NOT NULL UNIQUE, public_key BLOB NOT NULL, enrolled_at TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS releases (
    release_sha256 TEXT PRIMARY KEY, request_id TEXT NOT NULL REFERENCES requests(request_id),
    study_id TEXT NOT NULL, site_id TEXT NOT NULL REFERENCES sites(site_id), document BLOB NOT NULL,
    ingested_at TEXT NOT NULL, UNIQUE (request_id, site_id));
CREATE TABLE IF NOT EXISTS site_nodes (
    site_id TEXT PRIMARY KEY REFERENCES sites(site_id), node_key_sha256 TEXT NOT NULL UNIQUE,
    node_public_key BLOB NOT NULL, bound_at TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS rounds (
    round_id TEXT PRIMARY KEY, request_id TEXT NOT NULL REFERENCES requests(request_id), kind TEXT NOT NULL,
    min_sites INTEGER NOT NULL, deadline_s REAL NOT NULL, state TEXT NOT NULL, note TEXT NOT NULL,
    run_id TEXT, started_at TEXT NOT NULL, updated_at TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS round_sites (
    round_id TEXT NOT NULL REFERENCES rounds(round_id), site_id TEXT NOT NULL, status TEXT NOT NULL,
    reason TEXT NOT NULL, node_id TEXT, attempts INTEGER NOT NULL, updated_at TEXT NOT NULL,
    PRIMARY KEY (round_id, site_id));
CREATE TABLE IF NOT EXISTS acknowledgements (
    release_sha256 TEXT PRIMARY KEY REFERENCES releases(release_sha256), site_id TEXT NOT NULL,
    document BLOB NOT NULL, signed_at TEXT NOT NULL);
"""


def _now() -> str:
    return datetime.now(UTC).replace(microsecond=0).isoformat()


@dataclass(frozen=True)
class StoredRelease:
    release: Release
    document: bytes


def _check_consistency(release: Release, request: Request, source: str) -> None:
    """Refuse a release whose released counts contradict each other or whose results the request did not ask for.

    Only relations between counts that are all released are checked (a suppressed count is null): analysed
    = analysed_positive + analysed_negative; read = analysed + every exclusion; at each threshold
    tp + fn = analysed_positive and fp + tn = analysed_negative.
    """
    asked = {"confusion", *(a.name for a in request.analyses)}
    unasked = sorted(set(release.extra) - asked)
    if unasked:
        raise IngestError(f"{source}: results.{unasked[0][:40]} was not asked for by request {release.request_id!r}")
    for name, value in release.extra.items():
        if not isinstance(value, (dict, list)):
            raise IngestError(f"{source}: results.{name} must be an object or a list")
    flow = release.flow
    analysed, positive, negative = (flow.get(k) for k in ("analysed", "analysed_positive", "analysed_negative"))
    if None not in (analysed, positive, negative) and positive + negative != analysed:
        raise IngestError(f"{source}: flow.analysed is not analysed_positive + analysed_negative")
    excluded = list(flow.get("excluded", {}).values())
    read = flow.get("read")
    if read is not None and analysed is not None:
        known = analysed + sum(e for e in excluded if e is not None)
        if known > read or (None not in excluded and known != read):
            raise IngestError(f"{source}: flow.read does not match analysed + the excluded counts")
    sums = (("tp", "fn", positive, "analysed_positive"), ("fp", "tn", negative, "analysed_negative"))
    for i, table in enumerate(release.confusion):
        cells = table.cells
        for a, b, total, name in sums:
            if None not in (cells[a], cells[b], total) and cells[a] + cells[b] != total:
                raise IngestError(f"{source}: results.confusion[{i}]: {a} + {b} is not flow.{name}")


class Store:
    def __init__(self, path: Path) -> None:
        self.path = Path(path)
        try:
            self._db = sqlite3.connect(self.path, isolation_level=None)
            self._db.executescript(SCHEMA)
        except sqlite3.DatabaseError:
            raise ValidationToolError(f"{path}: not a study store (SQLite database)") from None

    def close(self) -> None:
        self._db.close()

    @contextmanager
    def transaction(self) -> Iterator[sqlite3.Connection]:
        self._db.execute("BEGIN IMMEDIATE")
        try:
            yield self._db
        except BaseException:
            self._db.execute("ROLLBACK")
            raise
        self._db.execute("COMMIT")

    # --- bundles and requests -------------------------------------------------------------------------
    def add_bundle(self, sha256: str, name: str, manifest_json: str) -> None:
        with self.transaction() as db:
            db.execute("INSERT OR IGNORE INTO bundles VALUES (?, ?, ?, ?)", (sha256, name, manifest_json, _now()))

    def integer_features(self, study_id: str) -> frozenset[str]:
        """Names of the ``int`` inputs in the schemas of the bundles the study's requests name."""
        rows = self._db.execute(
            "SELECT b.manifest FROM bundles b JOIN requests r ON r.bundle_sha256 = b.sha256 WHERE r.study_id = ?",
            (study_id,),
        ).fetchall()
        names: set[str] = set()
        for (text,) in rows:
            try:
                features = json.loads(text).get("schema", {}).get("features", [])
            except (ValueError, AttributeError):
                continue
            names.update(f["name"] for f in features if isinstance(f, dict) and f.get("type") == "int")
        return frozenset(names)

    def score_kind(self, study_id: str) -> str | None:
        """The score kind (``probability`` or ``points``) of the bundle the study's first request names."""
        row = self._db.execute(
            "SELECT b.manifest FROM bundles b JOIN requests r ON r.bundle_sha256 = b.sha256 WHERE r.study_id = ? "
            "ORDER BY r.issued_at LIMIT 1",
            (study_id,),
        ).fetchone()
        try:
            kind = json.loads(row[0]).get("score", {}).get("kind") if row else None
        except (ValueError, AttributeError):
            return None
        return kind if isinstance(kind, str) else None

    def add_request(self, request: Request, document: bytes) -> None:
        with self.transaction() as db:
            db.execute(
                "INSERT INTO requests VALUES (?, ?, ?, ?, ?)",
                (request.request_id, request.study_id, request.bundle_sha256, document, request.issued_at),
            )

    def request(self, request_id: str) -> Request | None:
        row = self._db.execute("SELECT document FROM requests WHERE request_id = ?", (request_id,)).fetchone()
        return Request.from_bytes(row[0], None, "stored request") if row else None

    def studies(self) -> list[str]:
        return [r[0] for r in self._db.execute("SELECT DISTINCT study_id FROM requests ORDER BY study_id")]

    # --- sites ----------------------------------------------------------------------------------------
    def enrol(self, site_id: str, public_key_pem: bytes, source: str) -> str:
        key = parse_public_key(public_key_pem, source)
        kid = key_id(key)
        with self.transaction() as db:
            row = db.execute("SELECT key_id FROM sites WHERE site_id = ?", (site_id,)).fetchone()
            if row and row[0] != kid:
                raise IngestError(f"site {site_id!r} is already enrolled with another key ({row[0]})")
            other = db.execute("SELECT site_id FROM sites WHERE key_id = ?", (kid,)).fetchone()
            if other and other[0] != site_id:
                raise IngestError(f"{source}: this key is already enrolled for site {other[0]!r}")
            db.execute("INSERT OR IGNORE INTO sites VALUES (?, ?, ?, ?)", (site_id, kid, public_pem(key), _now()))
        return kid

    def site_keys(self) -> dict[str, KeyRing]:
        rings = {}
        for site_id, pem in self._db.execute("SELECT site_id, public_key FROM sites"):
            key = parse_public_key(pem, f"store key of {site_id}")
            rings[site_id] = KeyRing({key_id(key): key})
        return rings

    def site_key(self, site_id: str) -> KeyRing | None:
        """The enrolled key of one site (checking a release parses this one key, not every site's)."""
        row = self._db.execute("SELECT public_key FROM sites WHERE site_id = ?", (site_id,)).fetchone()
        if row is None:
            return None
        key = parse_public_key(row[0], f"store key of {site_id}")
        return KeyRing({key_id(key): key})

    def sites(self) -> list[str]:
        return [r[0] for r in self._db.execute("SELECT site_id FROM sites ORDER BY site_id")]

    # --- releases -------------------------------------------------------------------------------------
    def check_release(self, data: bytes, source: str) -> Release:
        """Everything ingest checks, without writing: structure, site key, request, bundle, duplicates."""
        release = Release.from_bytes(data, source)
        ring = self.site_key(release.site_id)
        if ring is None:
            raise IngestError(f"{source}: site {release.site_id!r} is not enrolled in this store")
        try:
            release.verify(ring, source)
        except SignatureError as exc:
            raise IngestError(f"{exc} (not the key enrolled for site {release.site_id!r})") from None
        request = self.request(release.request_id)
        if request is None:
            raise IngestError(f"{source}: answers request {release.request_id!r}, which this store did not issue")
        if request.study_id != release.study_id:
            raise IngestError(f"{source}: study id does not match request {release.request_id!r}")
        if request.bundle_sha256 != release.bundle_sha256:
            raise IngestError(f"{source}: bundle hash does not match the one request {release.request_id!r} named")
        _check_consistency(release, request, source)
        row = self._db.execute(
            "SELECT release_sha256 FROM releases WHERE request_id = ? AND site_id = ?",
            (release.request_id, release.site_id),
        ).fetchone()
        if row:
            same = row[0] == sha256_hex(data)
            raise IngestError(
                f"{source}: site {release.site_id!r} already answered request {release.request_id!r}"
                + (" (this release is already ingested)" if same else " (a replay or second answer is refused)")
            )
        return release

    def ingest(self, documents: list[tuple[bytes, str]]) -> list[Release]:
        """Ingest all documents or none: each is checked, then all are written in one transaction."""
        seen: set[tuple[str, str]] = set()
        checked = []
        for data, source in documents:
            release = self.check_release(data, source)
            pair = (release.request_id, release.site_id)
            if pair in seen:
                raise IngestError(f"{source}: the same site answers the same request twice in this batch")
            seen.add(pair)
            checked.append((release, data))
        with self.transaction() as db:
            for release, data in checked:
                db.execute(
                    "INSERT INTO releases VALUES (?, ?, ?, ?, ?, ?)",
                    (sha256_hex(data), release.request_id, release.study_id, release.site_id, data, _now()),
                )
                crash_point("coordinator:mid-ingest")  # inert unless MSV_CRASH_AT says so (crash-safety tests)
        return [release for release, _ in checked]

    def ingest_each(self, documents: list[tuple[bytes, str]]) -> list[Release | ValidationToolError]:
        """Check each document on its own and store every one that passes in one transaction (one disk sync).

        The result holds, in order, the stored release or the reason it was refused. What a round collects
        in one poll is stored this way: one site's bad release does not hold back the others.
        """
        seen: set[tuple[str, str]] = set()
        results: list[Release | ValidationToolError] = []
        accepted: list[tuple[Release, bytes]] = []
        for data, source in documents:
            try:
                release = self.check_release(data, source)
            except ValidationToolError as exc:
                results.append(exc)
                continue
            pair = (release.request_id, release.site_id)
            if pair in seen:
                results.append(IngestError(f"{source}: the same site answers the same request twice in this batch"))
                continue
            seen.add(pair)
            accepted.append((release, data))
            results.append(release)
        if accepted:
            with self.transaction() as db:
                for release, data in accepted:
                    db.execute(
                        "INSERT INTO releases VALUES (?, ?, ?, ?, ?, ?)",
                        (sha256_hex(data), release.request_id, release.study_id, release.site_id, data, _now()),
                    )
        return results

    def releases(self, study_id: str) -> list[StoredRelease]:
        rows = self._db.execute(
            "SELECT document FROM releases WHERE study_id = ? ORDER BY site_id, ingested_at", (study_id,)
        )
        return [StoredRelease(Release.from_bytes(doc, "stored release"), doc) for (doc,) in rows]

    def answered(self, request_id: str) -> set[str]:
        rows = self._db.execute("SELECT site_id FROM releases WHERE request_id = ?", (request_id,))
        return {r[0] for r in rows}

    def stored_releases_of(self, site_id: str) -> list[tuple[str, str]]:
        """(release SHA-256, when it was stored) of every release from a site: what acknowledgements name."""
        rows = self._db.execute(
            "SELECT release_sha256, ingested_at FROM releases WHERE site_id = ? ORDER BY ingested_at, rowid", (site_id,)
        )
        return [(digest, when) for digest, when in rows]

    # --- acknowledgements: the coordinator's signed word that a release is stored -----------------------
    def unacknowledged(self) -> list[tuple[str, str, str, str, str]]:
        """(release SHA-256, study, request, site, stored at) of every stored release without an acknowledgement."""
        rows = self._db.execute(
            "SELECT r.release_sha256, r.study_id, r.request_id, r.site_id, r.ingested_at FROM releases r "
            "LEFT JOIN acknowledgements a ON a.release_sha256 = r.release_sha256 WHERE a.release_sha256 IS NULL "
            "ORDER BY r.ingested_at, r.rowid"
        )
        return [tuple(row) for row in rows]  # type: ignore[misc]

    def add_acknowledgements(self, signed: list[tuple[str, str, bytes]]) -> None:
        """Keep signed acknowledgements, (release SHA-256, site, document), in one transaction."""
        with self.transaction() as db:
            for digest, site_id, document in signed:
                db.execute(
                    "INSERT OR IGNORE INTO acknowledgements VALUES (?, ?, ?, ?)", (digest, site_id, document, _now())
                )

    def acknowledgements_of(self, site_id: str) -> list[bytes]:
        """The signed acknowledgements of a site's stored releases, oldest release first."""
        rows = self._db.execute(
            "SELECT a.document FROM acknowledgements a JOIN releases r ON r.release_sha256 = a.release_sha256 "
            "WHERE a.site_id = ? ORDER BY r.ingested_at, r.rowid",
            (site_id,),
        )
        return [bytes(document) for (document,) in rows]

    # --- node keys (online sites): node key <-> site id <-> release-signing key ------------------------
    def bind_node_key(self, site_id: str, node_key_sha256: str, node_public_key_pem: bytes, source: str) -> None:
        """Bind an enrolled site to the node key its SuperNode authenticates with (one key per site)."""
        with self.transaction() as db:
            if db.execute("SELECT 1 FROM sites WHERE site_id = ?", (site_id,)).fetchone() is None:
                raise IngestError(f"{source}: site {site_id!r} is not enrolled (enrol its release-signing key too)")
            row = db.execute("SELECT node_key_sha256 FROM site_nodes WHERE site_id = ?", (site_id,)).fetchone()
            if row and row[0] != node_key_sha256:
                raise IngestError(f"site {site_id!r} is already bound to another node key ({row[0][:16]})")
            query = "SELECT site_id FROM site_nodes WHERE node_key_sha256 = ?"
            other = db.execute(query, (node_key_sha256,)).fetchone()
            if other and other[0] != site_id:
                raise IngestError(f"{source}: this node key is already bound to site {other[0]!r}")
            db.execute(
                "INSERT OR IGNORE INTO site_nodes VALUES (?, ?, ?, ?)",
                (site_id, node_key_sha256, node_public_key_pem, _now()),
            )

    def node_keys(self) -> dict[str, tuple[str, bytes]]:
        """Site id -> (SHA-256 of the node key's DER form, PEM public key), for every bound site."""
        rows = self._db.execute("SELECT site_id, node_key_sha256, node_public_key FROM site_nodes ORDER BY site_id")
        return {site: (digest, pem) for site, digest, pem in rows}

    # --- rounds: what happened to each site when a request went out online ---------------------------
    def start_round(self, round_id: str, request_id: str, kind: str, min_sites: int, deadline_s: float) -> None:
        with self.transaction() as db:
            db.execute(
                "INSERT INTO rounds VALUES (?, ?, ?, ?, ?, 'submitted', '', NULL, ?, ?)",
                (round_id, request_id, kind, min_sites, deadline_s, _now(), _now()),
            )

    def set_round(self, round_id: str, state: str | None, note: str | None = "", run_id: int | None = None) -> None:
        """Update a round; ``None`` keeps the stored state or note."""
        with self.transaction() as db:
            db.execute(
                "UPDATE rounds SET state = COALESCE(?, state), note = COALESCE(?, note), "
                "run_id = COALESCE(?, run_id), updated_at = ? WHERE round_id = ?",
                (state, note, None if run_id is None else str(run_id), _now(), round_id),
            )

    def set_round_site(
        self, round_id: str, site_id: str, status: str, reason: str = "", node_id: int | None = None, sent: bool = False
    ) -> None:
        """Record a site's status in a round; ``sent`` counts one more attempt."""
        with self.transaction() as db:
            db.execute(
                "INSERT INTO round_sites VALUES (?, ?, ?, ?, ?, ?, ?) ON CONFLICT (round_id, site_id) DO UPDATE SET "
                "status = excluded.status, reason = excluded.reason, node_id = COALESCE(excluded.node_id, node_id), "
                "attempts = attempts + excluded.attempts, updated_at = excluded.updated_at",
                (round_id, site_id, status, reason[:500], None if node_id is None else str(node_id), int(sent), _now()),
            )

    def rounds(self, request_id: str) -> list[dict]:
        rows = self._db.execute(
            "SELECT round_id, kind, min_sites, deadline_s, state, note, run_id, started_at, updated_at FROM rounds "
            "WHERE request_id = ? ORDER BY started_at, rowid",
            (request_id,),
        )
        keys = ("round_id", "kind", "min_sites", "deadline_s", "state", "note", "run_id", "started_at", "updated_at")
        return [dict(zip(keys, row, strict=True)) for row in rows]

    def round_sites(self, round_id: str) -> dict[str, dict]:
        rows = self._db.execute(
            "SELECT site_id, status, reason, node_id, attempts, updated_at FROM round_sites WHERE round_id = ?",
            (round_id,),
        )
        keys = ("status", "reason", "node_id", "attempts", "updated_at")
        return {row[0]: dict(zip(keys, row[1:], strict=True)) for row in rows}
