"""One request, end to end at the site: verify, read, score, count, suppress, record, sign.

The same function serves the offline command (``site-agent run``) and the Flower ClientApp, so the
online and offline paths are one code path. Order matters: the request and bundle are verified against
the site's pinned coordinator keys before anything else; the release's full text is in the ledger (and
synced) before it is written out or returned for sending; every refusal is in the ledger too.
"""

from __future__ import annotations

from collections import Counter
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
from .config import Site
from .data import DEFAULT_CHUNK_ROWS, EXCLUSION_REASONS, prepare_chunk, read_csv_chunks
from .disclosure import Relation, suppress
from .mapping import default_mapping, load_mapping
from .tables import ConfusionCounts


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
        release = _compute(
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
) -> Release:
    if data_path is None:
        raise ValidationToolError("no data file: give --data or set [data].path in site.toml")
    schema = bundle.schema
    mapping = load_mapping(mapping_path, schema) if mapping_path else default_mapping(schema)
    thresholds: list[float] = []
    for analysis in request.analyses:
        if analysis.name == "confusion":
            thresholds.extend(analysis.thresholds or bundle.manifest.thresholds)
    thresholds = sorted(set(thresholds))
    scorer = make_scorer(bundle)
    confusion = ConfusionCounts(tuple(thresholds))
    read, positives, negatives = 0, 0, 0
    excluded: Counter[str] = Counter({reason: 0 for reason in EXCLUSION_REASONS})
    for frame in read_csv_chunks(data_path, mapping.columns_needed(), chunk_rows):
        chunk = prepare_chunk(frame, schema, mapping, str(data_path))
        read += chunk.read
        excluded.update(chunk.excluded)
        positives += int(chunk.outcome.sum())
        negatives += len(chunk.outcome) - int(chunk.outcome.sum())
        confusion.add(scorer.score(chunk.inputs), chunk.outcome)
    counts = {
        "flow.read": read,
        "flow.analysed": positives + negatives,
        "flow.analysed_positive": positives,
        "flow.analysed_negative": negatives,
        **{f"flow.excluded.{reason}": excluded[reason] for reason in EXCLUSION_REASONS},
    }
    relations = [
        Relation("flow.read", ("flow.analysed", *(f"flow.excluded.{r}" for r in EXCLUSION_REASONS))),
        Relation("flow.analysed", ("flow.analysed_positive", "flow.analysed_negative")),
    ]
    for i in range(len(thresholds)):
        table = confusion.table(i)
        counts.update({f"confusion[{i}].{cell}": value for cell, value in table.items()})
        relations.append(Relation("flow.analysed_positive", (f"confusion[{i}].tp", f"confusion[{i}].fn")))
        relations.append(Relation("flow.analysed_negative", (f"confusion[{i}].fp", f"confusion[{i}].tn")))
    released, hidden = suppress(counts, relations, site.policy.min_cell_size, site.policy.allow_zero)
    flow = {
        "read": released["flow.read"],
        "analysed": released["flow.analysed"],
        "analysed_positive": released["flow.analysed_positive"],
        "analysed_negative": released["flow.analysed_negative"],
        "excluded": {reason: released[f"flow.excluded.{reason}"] for reason in EXCLUSION_REASONS},
        "suppressed": sorted(name.removeprefix("flow.") for name in hidden if name.startswith("flow.")),
    }
    tables = []
    for i, threshold in enumerate(thresholds):
        cells = {cell: released[f"confusion[{i}].{cell}"] for cell in ("tp", "fp", "fn", "tn")}
        tables.append(ConfusionTable(threshold, cells, tuple(c for c in ("tp", "fp", "fn", "tn") if cells[c] is None)))
    return Release(
        study_id=request.study_id,
        request_id=request.request_id,
        bundle_sha256=bundle.sha256,
        site_id=site.site_id,
        created_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
        policy=site.policy.release_statement(),
        flow=flow,
        confusion=tuple(tables),
    )
