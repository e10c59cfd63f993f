"""Everything the report reads, gathered from the study store alone.

The numbers come from the analysis ``federation analyze --json`` prints
(:func:`federation.analysis.results.analyze_releases`), run on the same read of the stored releases that gives
the provenance; their signatures are checked once, against the keys enrolled in the store, so a report is never
built from a release that was altered after ingest.
"""

from __future__ import annotations

import json
import sqlite3
from dataclasses import dataclass
from typing import Any

from federation.analysis import choose_study
from federation.analysis.results import analyze_releases, verified_releases
from federation.protocol import Release, Request, ValidationToolError, sha256_hex
from federation.store import Store

__all__ = ["ReleaseRecord", "ReportInputs", "gather"]


@dataclass(frozen=True)
class ReleaseRecord:
    """One stored release, as the provenance table shows it."""

    site_id: str
    request_id: str
    created_at: str
    release_sha256: str
    min_cell_size: int | None
    policy_sha256: str | None
    release: Release


@dataclass(frozen=True)
class ReportInputs:
    """What one report is built from."""

    store_name: str
    study_id: str
    analysis: dict[str, Any]
    releases: tuple[ReleaseRecord, ...]
    requests: tuple[Request, ...]
    bundle_sha256: tuple[str, ...]
    manifest: dict[str, Any] | None
    enrolled_without_release: tuple[str, ...]

    @property
    def requested_analyses(self) -> tuple[str, ...]:
        """Names of the analyses the study's requests asked for, in first-asked order."""
        names: list[str] = []
        for request in self.requests:
            for spec in request.analyses:
                if spec.name not in names:
                    names.append(spec.name)
        return tuple(names)

    @property
    def releases_digest(self) -> str:
        """SHA-256 over the sorted release hashes: one value that names the whole evidence base."""
        return sha256_hex("\n".join(sorted(r.release_sha256 for r in self.releases)).encode())

    @property
    def score_kind(self) -> str | None:
        """``"probability"`` when the model's score is a predicted risk (from the bundle manifest)."""
        if not self.manifest:
            return None
        score = self.manifest.get("score")
        return score.get("kind") if isinstance(score, dict) else None

    def latest_release(self, site_id: str) -> Release | None:
        chosen = [r.release for r in self.releases if r.site_id == site_id]
        return max(chosen, key=lambda r: r.created_at) if chosen else None


def _manifest(store: Store, sha256: str) -> dict[str, Any] | None:
    # The store keeps the manifest of every bundle a request named; read-only, so the report cannot change it.
    uri = f"file:{store.path.resolve()}?mode=ro"
    try:
        db = sqlite3.connect(uri, uri=True)
        try:
            row = db.execute("SELECT manifest FROM bundles WHERE sha256 = ?", (sha256,)).fetchone()
        finally:
            db.close()
    except sqlite3.DatabaseError:
        return None
    if not row:
        return None
    try:
        value = json.loads(row[0])
    except json.JSONDecodeError:
        return None
    return value if isinstance(value, dict) else None


def gather(
    store: Store, study_id: str | None = None, covariates: dict[str, dict[str, float | str]] | None = None
) -> ReportInputs:
    """Read the analysis, the releases (signatures checked again) and the requests of one study.

    Raises
    ------
    AnalysisError
        No such study, several studies and none named, or no releases yet (exit code 1).
    SignatureError
        A stored release no longer verifies against its site's enrolled key (exit code 2).
    """
    study = choose_study(store, study_id)
    releases = verified_releases(store, study)
    analysis = analyze_releases(store, study, releases, covariates=covariates)
    records = []
    for stored in releases:
        release = stored.release
        policy = release.policy
        records.append(
            ReleaseRecord(
                site_id=release.site_id,
                request_id=release.request_id,
                created_at=release.created_at,
                release_sha256=sha256_hex(stored.document),
                min_cell_size=policy.get("min_cell_size") if isinstance(policy.get("min_cell_size"), int) else None,
                policy_sha256=policy.get("policy_sha256") if isinstance(policy.get("policy_sha256"), str) else None,
                release=release,
            )
        )
    requests: list[Request] = []
    for request_id in dict.fromkeys(r.request_id for r in records):
        request = store.request(request_id)
        if request is None:
            raise ValidationToolError(f"{store.path}: release answers request {request_id!r}, missing from the store")
        requests.append(request)
    bundles = tuple(dict.fromkeys(r.bundle_sha256 for r in requests))
    answered = {r.site_id for r in records}
    return ReportInputs(
        store_name=store.path.name,
        study_id=study,
        analysis=analysis,
        releases=tuple(records),
        requests=tuple(requests),
        bundle_sha256=bundles,
        manifest=_manifest(store, bundles[0]) if bundles else None,
        enrolled_without_release=tuple(s for s in store.sites() if s not in answered),
    )
