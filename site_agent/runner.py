"""One request, end to end at the site: verify, read, score, count, suppress, record, sign.

The same function serves the offline command (``site-agent run``) and the Flower ClientApp, so the
online and offline paths are one code path. Order matters: the request and bundle are verified against
the site's pinned coordinator keys before anything else; the release's full text is in the ledger (and
synced) before it is written out or returned for sending; every refusal is in the ledger too.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path

from federation.protocol import (
    Bundle,
    ConfusionTable,
    PolicyViolation,
    Release,
    Request,
    ValidationToolError,
    load_bundle,
    make_scorer,
    sha256_hex,
)
from federation.protocol.cli_support import write_atomic

from . import ledger
from .analyses import Flow, build_analyses
from .config import Site
from .data import DEFAULT_CHUNK_ROWS, prepare_chunk, read_csv_chunks
from .disclosure import protect
from .mapping import default_mapping, load_mapping


@dataclass(frozen=True)
class Outcome:
    release: Release
    release_bytes: bytes


def check_request(site: Site, request_bytes: bytes, bundle_bytes: bytes) -> tuple[Request, Bundle]:
    """Verify signatures, the bundle hash and the site policy; raise on any refusal."""
    request = Request.from_bytes(request_bytes, site.trusted, "request")
    bundle = load_bundle(bundle_bytes, site.trusted, "bundle")
    if bundle.sha256 != request.bundle_sha256:
        raise PolicyViolation("bundle: its SHA-256 is not the one the request names")
    for analysis in request.analyses:
        if analysis.name not in site.policy.allowed_analyses:
            raise PolicyViolation(f"request: analysis {analysis.name!r} is not allowed by this site's policy")
    earlier = ledger.releases_for_study(site.ledger_path, request.study_id)
    if any(r.get("request_id") == request.request_id for r in earlier):
        raise PolicyViolation("request: this request id was already answered (a replay or duplicate)")
    if len(earlier) >= site.policy.max_requests_per_study:
        raise PolicyViolation("request: the site's maximum number of requests for this study is reached")
    return request, bundle


def run_request(
    site: Site,
    request_bytes: bytes,
    bundle_bytes: bytes,
    data_path: Path | None = None,
    mapping_path: Path | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
) -> Outcome:
    """Answer one request; every outcome, release or refusal, is written to the ledger first."""
    private_key = site.private_key()
    ledger.append(
        site.ledger_path,
        private_key,
        "request_received",
        {"request_sha256": sha256_hex(request_bytes), "bundle_sha256": sha256_hex(bundle_bytes)},
    )
    try:
        request, bundle = check_request(site, request_bytes, bundle_bytes)
        release, facts = _compute(
            site, request, bundle, data_path or site.data_path, mapping_path or site.mapping_path, chunk_rows
        )
    except Exception as exc:
        # Only our own messages (which never hold record values) are recorded and may travel; anything
        # unexpected is named by its type alone.
        reason = str(exc) if isinstance(exc, ValidationToolError) else f"internal error ({type(exc).__name__})"
        ledger.append(
            site.ledger_path,
            private_key,
            "refusal",
            {"request_sha256": sha256_hex(request_bytes), "reason": reason, "error": type(exc).__name__},
        )
        raise
    release_bytes = release.signed_bytes(private_key)
    signed = Release.from_bytes(release_bytes, "release")
    ledger.append(
        site.ledger_path,
        private_key,
        "release",
        {
            "study_id": signed.study_id,
            "request_id": signed.request_id,
            "release_sha256": sha256_hex(release_bytes),
            "release": release_bytes.decode("utf-8"),
            "facts": facts,
        },
    )
    write_atomic(site.releases_dir / f"{signed.study_id}-{signed.request_id}.json", release_bytes)
    return Outcome(signed, release_bytes)


def _compute(
    site: Site,
    request: Request,
    bundle: Bundle,
    data_path: Path | None,
    mapping_path: Path | None,
    chunk_rows: int,
) -> tuple[Release, list[dict]]:
    """Return the unsigned release and the audit facts (definitions of what it shows and hides)."""
    if data_path is None:
        raise ValidationToolError("no data file: give --data or set [data].path in site.toml")
    schema = bundle.schema
    mapping = load_mapping(mapping_path, schema) if mapping_path else default_mapping(schema)
    scorer = make_scorer(bundle)
    flow = Flow()
    analyses = build_analyses(request.analyses, bundle)
    for frame in read_csv_chunks(data_path, mapping.columns_needed(), chunk_rows):
        chunk = prepare_chunk(frame, schema, mapping, str(data_path))
        scores = scorer.score(chunk.inputs)
        flow.add(chunk, scores)
        for analysis in analyses:
            analysis.add(chunk, scores)
    counts = flow.counts()
    for analysis in analyses:
        counts.merge(analysis.counts())
    protected = protect(counts, site.policy)
    results = {a.name: a.render(protected.released, protected.derived) for a in analyses}
    release = Release(
        study_id=request.study_id,
        request_id=request.request_id,
        bundle_sha256=bundle.sha256,
        site_id=site.site_id,
        created_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
        policy=site.policy.release_statement(),
        flow=flow.render(protected.released, protected.derived),
        confusion=tuple(ConfusionTable.from_dict(t, "release.results.confusion") for t in results.pop("confusion", [])),
        extra=results,
    )
    return release, protected.facts(counts)
