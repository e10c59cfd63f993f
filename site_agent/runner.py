"""One request, end to end at the site: verify, read, score, count, suppress, record, sign.

The same function serves the offline command (``site-agent run``) and the Flower ClientApp, so the
online and offline paths are one code path. Order matters: the request and bundle are verified against
the site's pinned coordinator keys before anything else; the release's full text is in the ledger (and
synced) before it is written out or returned for sending; every refusal is in the ledger too.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

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
from federation.protocol.crashpoints import crash_point

from . import approval, ledger
from .analyses import Flow, build_analyses, collect_counts, combined_schema, tabulate
from .approval import AwaitingApproval
from .config import Site
from .counts import CountSet
from .data import DEFAULT_CHUNK_ROWS, exclusion_reasons
from .disclosure import Protected, protect
from .mapping import default_mapping, load_mapping
from .sources import SourceSpec


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
        for subgroup in analysis.subgroups:
            if subgroup.variable not in site.policy.allowed_subgroups:
                raise PolicyViolation(
                    f"request: subgroup variable {subgroup.variable!r} is not allowed by this site's policy "
                    "(allowed_subgroups)"
                )
    earlier = ledger.answered_for_study(site.ledger_path, request.study_id)  # released, or held and not rejected
    if any(r.get("request_id") == request.request_id for r in earlier):
        raise PolicyViolation("request: this request id was already answered (a replay or duplicate)")
    if len(earlier) >= site.policy.max_requests_per_study:
        raise PolicyViolation("request: the site's maximum number of requests for this study is reached")
    if not earlier:  # a new study: the audit starts a new scope, so the number of scopes is capped site-wide
        studies = {r.get("study_id") for r in ledger.answered_for_study(site.ledger_path, None)}
        if len(studies) >= site.policy.max_studies:
            raise PolicyViolation("request: the site's maximum number of studies is reached (policy max_studies)")
    return request, bundle


def check_compare_bundle(site: Site, request: Request, compare_bundle_bytes: bytes | None) -> Bundle | None:
    """The second bundle of a paired request, verified like the first; None when the request has none."""
    expected = request.compare_bundle_sha256
    if not expected:
        if compare_bundle_bytes is not None:
            raise PolicyViolation("request: a comparison bundle was given, but the request names no paired analysis")
        return None
    if compare_bundle_bytes is None:
        raise PolicyViolation("request: names a paired comparison; the comparison bundle is missing (--compare-bundle)")
    compare = load_bundle(compare_bundle_bytes, site.trusted, "comparison bundle")
    if compare.sha256 != expected:
        raise PolicyViolation("comparison bundle: its SHA-256 is not the one the request names")
    return compare


def run_request(
    site: Site,
    request_bytes: bytes,
    bundle_bytes: bytes,
    data_path: Path | str | SourceSpec | None = None,
    mapping_path: Path | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    compare_bundle_bytes: bytes | None = None,
    progress: Callable[[int], None] | None = None,
) -> Outcome:
    """Answer one request; every outcome, release or refusal, is written to the ledger first.

    ``progress``, when given, is called with the number of records in each chunk read (for a progress bar).
    """
    private_key = site.private_key()
    ledger.append(
        site.ledger_path,
        private_key,
        "request_received",
        {"request_sha256": sha256_hex(request_bytes), "bundle_sha256": sha256_hex(bundle_bytes)},
    )
    holder: dict[str, Any] = {}
    try:
        held = approval.held_for_request(site, sha256_hex(request_bytes))
        if held is not None:  # asked before and held for approval: answer with exactly the reviewed bytes
            Request.from_bytes(request_bytes, site.trusted, "request")
            data = approval.hand_over(site, held)
            return Outcome(Release.from_bytes(data, "release"), data)
        answered = recorded_release(site, sha256_hex(request_bytes))
        if answered is not None:  # the same bytes asked again (a lost reply): the recorded release, not a new one
            Request.from_bytes(request_bytes, site.trusted, "request")
            copy = site.releases_dir / f"{answered.release.study_id}-{answered.release.request_id}.json"
            write_atomic(copy, answered.release_bytes)  # restores the site's copy if a crash came first
            return answered
        request, bundle = check_request(site, request_bytes, bundle_bytes)
        compare = check_compare_bundle(site, request, compare_bundle_bytes)
        release, facts = _compute(
            site, request, bundle, data_path, mapping_path or site.mapping_path, chunk_rows, compare, holder, progress
        )
    except AwaitingApproval:
        raise
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
    if site.policy.require_approval:
        held = approval.hold(site, sha256_hex(request_bytes), release_bytes, facts, holder["protected"].review())
        raise AwaitingApproval(
            held.held_id, f"release {held.held_id} is held for approval by the site (nothing has been sent)"
        )
    ledger.append(
        site.ledger_path,
        private_key,
        "release",
        {
            "study_id": signed.study_id,
            "request_id": signed.request_id,
            "request_sha256": sha256_hex(request_bytes),
            "release_sha256": sha256_hex(release_bytes),
            "release": release_bytes.decode("utf-8"),
            "facts": facts,
            "review": holder["protected"].review(),
        },
    )
    crash_point("site:after-ledger-release")
    write_atomic(site.releases_dir / f"{signed.study_id}-{signed.request_id}.json", release_bytes)
    crash_point("site:before-send")
    return Outcome(signed, release_bytes)


def recorded_release(site: Site, request_sha256: str) -> Outcome | None:
    """The release this site already recorded for exactly these request bytes, or None.

    Handing it back again discloses nothing new: the bytes are the ones already in the ledger (and already
    audited); nothing is recomputed. A different request that reuses the request id is still refused by
    :func:`check_request`.
    """
    for entry in ledger.read_entries(site.ledger_path):
        details = entry.get("details", {})
        if entry.get("event") == "release" and details.get("request_sha256") == request_sha256:
            data = details["release"].encode("utf-8")
            if sha256_hex(data) != details.get("release_sha256"):
                raise PolicyViolation("ledger: the recorded release does not match its SHA-256 (run ledger verify)")
            return Outcome(Release.from_bytes(data, "recorded release"), data)
    return None


@dataclass(frozen=True)
class Preview:
    """What a request would release, before signing: the release, every count and what was suppressed."""

    release: Release
    counts: CountSet
    protected: Protected


def preview_request(
    site: Site,
    request_bytes: bytes,
    bundle_bytes: bytes,
    data: Path | str | SourceSpec | None = None,
    mapping_path: Path | None = None,
    chunk_rows: int = DEFAULT_CHUNK_ROWS,
    compare_bundle_bytes: bytes | None = None,
    progress: Callable[[int], None] | None = None,
) -> Preview:
    """Everything ``run_request`` computes, without signing, sending or writing to the ledger."""
    request, bundle = check_request(site, request_bytes, bundle_bytes)
    compare = check_compare_bundle(site, request, compare_bundle_bytes)
    holder: dict[str, Any] = {}
    release, _ = _compute(
        site, request, bundle, data, mapping_path or site.mapping_path, chunk_rows, compare, holder, progress
    )
    return Preview(release, holder["counts"], holder["protected"])


def _compute(
    site: Site,
    request: Request,
    bundle: Bundle,
    data: Path | str | SourceSpec | None,
    mapping_path: Path | None,
    chunk_rows: int,
    compare: Bundle | None = None,
    holder: dict[str, Any] | None = None,
    progress: Callable[[int], None] | None = None,
) -> tuple[Release, dict[str, Any]]:
    """Return the unsigned release and the audit facts (definitions of what it shows and hides)."""
    source = data if isinstance(data, SourceSpec) else site.source(data)
    schema = combined_schema(bundle.schema, compare.schema if compare else None)
    mapping = load_mapping(mapping_path, schema) if mapping_path else default_mapping(schema)
    scorer = make_scorer(bundle)
    flow = Flow(exclusion_reasons(mapping))
    analyses = build_analyses(request.analyses, bundle, compare)
    pair = (compare, make_scorer(compare)) if compare is not None else None
    tabulate(source, mapping, bundle, scorer, flow, analyses, chunk_rows, pair, progress)
    counts = collect_counts(flow, analyses, site.policy)
    earlier = ledger.facts_for_study(site.ledger_path, request.study_id)
    protected = protect(counts, site.policy, earlier, bundle.sha256, request.request_id)
    if holder is not None:
        holder.update(counts=counts, protected=protected)
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
