"""One request, end to end at the site: verify, read, score, count, suppress, record, sign.

The same function serves the offline command (``site-agent run``) and the Flower ClientApp, so the
online and offline paths are one code path. Order matters: the request and bundle are verified against
the site's pinned coordinator keys before anything else; the release's full text is in the ledger (and
synced) before it is written out or returned for sending; every refusal is in the ledger too.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence
from dataclasses import dataclass
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

from federation.protocol import (
    Bundle,
    BundleError,
    ConfusionTable,
    DataValidationError,
    PolicyViolation,
    Release,
    Request,
    Schema,
    ValidationToolError,
    load_bundle,
    sha256_hex,
)
from federation.protocol.cli_support import write_atomic
from federation.protocol.crashpoints import crash_point
from federation.protocol.errors import LimitReached, ModelNotApproved, ModelRejected, ScoringError

from . import approval, ledger, models
from .analyses import Flow, build_analyses, collect_counts, combined_schema, tabulate
from .approval import AwaitingApproval
from .audit.facts import AuditError, ReleaseFacts
from .audit.model import describe_bundle
from .checked_models import site_scorer
from .config import Site
from .counts import CountSet
from .data import DEFAULT_CHUNK_ROWS, exclusion_reasons
from .disclosure import Protected, protect
from .mapping import Mapping, default_mapping, load_mapping
from .occupancy import combinations
from .sources import SourceSpec
from .withheld import annotate


@dataclass(frozen=True)
class Outcome:
    release: Release
    release_bytes: bytes
    resent_at: str = ""  # set when this is a release recorded earlier, handed over again (nothing recomputed)


class InternalError(ValidationToolError):
    """An unexpected failure inside the agent; only its type is named (its text could hold a value)."""

    exit_code = 2


def refusal_reason(exc: BaseException, phase: str) -> tuple[str, str]:
    """(the line that travels to the coordinator, the line for the site's own terminal and ledger).

    The travelling line starts with one of ``REFUSAL_CATEGORIES`` (federation/protocol/errors.py). Our own
    message follows only when it was decided before any record was read (it then depends on the request,
    the bundle and the policy alone) or by the disclosure audit (which names an analysis and a rule, never a
    count; where the audit stopped on the values themselves, one fixed line, ``AuditError.public``). After
    records were read, a data or scoring failure travels as its category alone, the same whatever the record.
    ``phase``: ``verify`` (request, bundle, policy), ``model`` (static checks of the analyses and the model;
    whether the bundle's schema declares shared features as every earlier release's did), ``setup`` (the
    mapping and the source), ``records`` (reading and scoring), ``disclosure`` (suppression and the audit).
    """
    local = str(exc) if isinstance(exc, ValidationToolError) else f"internal error at the site ({type(exc).__name__})"
    if not isinstance(exc, ValidationToolError):
        return "internal error at the site", local
    if isinstance(exc, ScoringError):
        return "scoring failed", local
    if isinstance(exc, LimitReached):
        return f"limit reached: {exc}", local
    if isinstance(exc, ModelNotApproved):
        if isinstance(exc, ModelRejected):
            return "model not approved by the site: it rejected this model bundle", local
        return "model not approved by the site: it has not approved this model bundle yet", local
    if phase in ("verify", "model"):
        if isinstance(exc, BundleError):
            return f"bundle not accepted: {exc}", local
        if isinstance(exc, PolicyViolation):
            return f"request not accepted by the site's policy: {exc}", local
        return f"request not accepted: {exc}", local
    if phase == "disclosure" and isinstance(exc, PolicyViolation):
        # an audit that stopped on the values themselves sends one fixed line (its message names a count)
        public = exc.public if isinstance(exc, AuditError) and exc.public else str(exc)
        return f"release withheld by the site's disclosure control: {public}", local
    if phase in ("setup", "records"):
        return "data could not be read", local
    return "internal error at the site", local


def check_request(site: Site, request_bytes: bytes, bundle_bytes: bytes) -> tuple[Request, Bundle]:
    """Verify signatures, the bundle hash and the site policy; raise on any refusal."""
    request = read_request(site, request_bytes)
    return request, check_policy(site, request, request_bytes, bundle_bytes)


def read_request(site: Site, request_bytes: bytes) -> Request:
    """The request document, its coordinator's signature verified against the site's pinned keys.

    A refusal of the document itself (not JSON, a field missing or of the wrong kind, a bad signature) is marked
    ``input_file = "request"``: the command line then names the file it read, on the site's terminal only. The
    runner sees bytes, never a path, so no path can reach the line that travels or the ledger.
    """
    try:
        return Request.from_bytes(request_bytes, site.trusted, "request")
    except ValidationToolError as exc:
        exc.input_file = "request"  # type: ignore[attr-defined]  # read by the CLI
        raise


def check_policy(site: Site, request: Request, request_bytes: bytes, bundle_bytes: bytes) -> Bundle:
    """The bundle and everything the policy says about a verified request, before any record is read.

    Every request that was verified and then refused counts against the caps like an answered one (one per
    distinct request, by SHA-256): a model that fails on some records cannot ask yes/no questions for free.
    """
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
    answered = ledger.answered_for_study(site.ledger_path, request.study_id)  # released, or held and not rejected
    if any(r.get("request_id") == request.request_id for r in answered):
        raise PolicyViolation("request: this request id was already answered (a replay or duplicate)")
    digest = sha256_hex(request_bytes)
    counted = ledger.counted_requests(site.ledger_path, None)
    if digest not in counted:  # the same bytes asked again (e.g. after the site fixed its mapping) count once
        in_study = [c for c in counted.values() if c.get("study_id") == request.study_id]
        if len(in_study) >= site.policy.max_requests_per_study:
            raise LimitReached(
                "request: the site's maximum number of requests for this study is reached (policy "
                "max_requests_per_study; refused requests count too)"
            )
        studies = {c.get("study_id") for c in counted.values()}
        if request.study_id not in studies and len(studies) >= site.policy.max_studies:
            raise LimitReached(
                "request: the site's maximum number of studies is reached (policy max_studies; refused requests "
                "count too)"
            )
    models.require_approved(site, bundle, bundle_bytes)
    return bundle


def model_facts(bundle: Bundle) -> dict[str, Any]:
    """What a reviewer needs to know of the model a release came from (kept with a held release)."""
    manifest = bundle.manifest
    return {
        "name": manifest.name,
        "format": manifest.model_format,
        "score": manifest.score_kind,
        "thresholds": list(manifest.thresholds),
        "created_at": manifest.created_at,
        "bundle_sha256": bundle.sha256,
        "inputs": [feature.name for feature in manifest.schema.features],
    }


def _reading(entry: dict[str, Any]) -> tuple:
    """What decides which records a schema entry lets through and the value it gives them: type, range,
    categories (as a set) and the missing-value rule."""
    categories = entry.get("categories")
    return (
        entry.get("type"),
        entry.get("min"),
        entry.get("max"),
        frozenset(categories) if categories else None,
        entry.get("missing"),
    )


def check_schema_reads_alike(schema: Schema, earlier: Sequence[ReleaseFacts]) -> None:
    """Refuse, before any record is read, a bundle whose schema declares a feature differently from the schema
    of an earlier release of the site (to any study): another type, range, categories or missing-value rule.

    The audit relates every release of the site over one set of records with one status each (analysed, or
    excluded for a reason) and one value of each feature. A feature declared differently could exclude other
    records or give a record another value (a missing age filled as 0 by one bundle and as 95 by another). The
    audit would then see the same count change, and refuse *because of the records* (one bit about them, and
    before this check the reason named the count; found by our red team). Comparing the declarations decides it
    without reading a record. A feature only one of the schemas declares (a paired comparison's second model
    reads more inputs) can still exclude records the other schema analyses; where it does, the audit refuses
    with one fixed line (docs/threat-model.md, R1). Releases whose ledger entry records no schema (older
    ledgers) are not compared.
    """
    own = {f.name: _reading(f.to_dict()) for f in schema.features}
    for release in earlier:
        theirs = {name: _reading(dict(entry)) for name, entry in release.domains.items()}
        differs = sorted(n for n in set(own) & set(theirs) if own[n] != theirs[n])
        if differs:
            raise PolicyViolation(
                f"bundle schema: feature {differs[0]!r} is declared differently (type, range, categories or "
                "missing-value rule) from the schema of an earlier release of this site; the site's disclosure "
                "audit relates releases that read the same records alike, so every bundle a site answers for must "
                "declare a feature they share the same way (a new declaration needs a new site folder and "
                "ledger: docs/threat-model.md, R1)"
            )


def check_compare_bundle(site: Site, request: Request, compare_bundle_bytes: bytes | None) -> Bundle | None:
    """The second bundle of a paired request, verified like the first; None when the request has none."""
    expected = request.compare_bundle_sha256
    if not expected:
        if compare_bundle_bytes is not None:
            raise PolicyViolation("request: a comparison bundle was given, but the request names no paired analysis")
        return None
    if compare_bundle_bytes is None:
        raise PolicyViolation("request: names a paired comparison; the comparison bundle is missing (--compare)")
    compare = load_bundle(compare_bundle_bytes, site.trusted, "comparison bundle")
    if compare.sha256 != expected:
        raise PolicyViolation("comparison bundle: its SHA-256 is not the one the request names")
    models.require_approved(site, compare, compare_bundle_bytes, "comparison bundle")
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
    # the ledger is the audit's memory and the board's record: a broken one stops the run before anything
    ledger.verify_before_use(site.ledger_path, site.public_key())
    ledger.append(
        site.ledger_path,
        private_key,
        "request_received",
        {"request_sha256": sha256_hex(request_bytes), "bundle_sha256": sha256_hex(bundle_bytes)},
    )
    holder: dict[str, Any] = {"phase": "verify"}
    request: Request | None = None
    try:
        request = read_request(site, request_bytes)
        answered = recorded_release(site, sha256_hex(request_bytes))
        if answered is not None:  # the same bytes asked again (a lost reply): the recorded release, not a new one
            copy = site.releases_dir / f"{answered.release.study_id}-{answered.release.request_id}.json"
            write_atomic(copy, answered.release_bytes)  # restores the site's copy if a crash came first
            return answered
        held = approval.held_for_request(site, sha256_hex(request_bytes))
        if held is not None:  # asked before and held for approval: answer with exactly the reviewed bytes
            data = approval.hand_over(site, held)
            return Outcome(Release.from_bytes(data, "release"), data)
        bundle = check_policy(site, request, request_bytes, bundle_bytes)
        compare = check_compare_bundle(site, request, compare_bundle_bytes)
        release, facts = _compute(
            site, request, bundle, data_path, mapping_path or site.mapping_path, chunk_rows, compare, holder, progress
        )
    except AwaitingApproval:
        raise
    except Exception as exc:
        # What travels is a fixed category (with our own message only where it cannot depend on a record);
        # the site's ledger and terminal get our message, or an unexpected error's type alone.
        sent, local = refusal_reason(exc, holder["phase"])
        details = {"request_sha256": sha256_hex(request_bytes), "reason": sent, "error": type(exc).__name__}
        if local != sent:
            details["detail"] = local
        if request is not None:  # a verified request: the refusal counts against the policy's caps
            details.update(
                study_id=request.study_id, request_id=request.request_id, coordinator_key_id=request.coordinator_key_id
            )
        ledger.append(site.ledger_path, private_key, "refusal", details)
        if not isinstance(exc, ValidationToolError):
            exc = InternalError(f"{local}; the request was refused and the refusal recorded in the ledger")
        exc.refusal = sent  # type: ignore[attr-defined]  # read by the Flower adapter and the CLI
        raise exc from None
    release_bytes = release.signed_bytes(private_key)
    signed = Release.from_bytes(release_bytes, "release")
    assert request is not None  # set in the try block, which returned or raised otherwise
    if site.policy.require_approval:
        review = {**holder["protected"].review(), "model": model_facts(bundle)}  # for the reviewer's page
        held = approval.hold(site, request, request_bytes, release_bytes, facts, review)
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
            **approval.addressee(request, request_bytes),
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


# The mapping rule behind each exclusion reason (docs/formats.md, "Mapping file"), for a person to fix.
EXCLUSION_RULES = {
    "missing_outcome": "[outcome]: the reference-standard column is empty, or its value is listed under `missing`",
    "missing_feature": "[features.*]: a required input's column is empty, or its value is listed under `missing`",
    "out_of_range": "[features.*]: a value lies outside the schema's min..max or is not a whole number where the "
    "schema asks for one (check the column, its unit and its `codes`)",
    "unknown_category": "[features.*] codes: a value is not mapped to one of the schema's categories",
    "duplicate_id": "[id]: records repeat an earlier record's id (is it the right column?)",
}


def check_something_analysed(flow: Flow, mapping: Mapping, min_cell_size: int) -> None:
    """Refuse, before anything is signed, a run in which (almost) no record was analysed.

    Fewer analysed records than the minimum cell size means the release could show nothing but withheld
    counts: nearly always a mapping that excludes everyone. The message names the mapping rule behind the
    most frequent exclusion reason; it holds no count and no value.
    """
    analysed = flow.positive + flow.negative
    if analysed >= min_cell_size:
        return
    reason = max(flow.reasons, key=lambda r: flow.excluded[r]) if any(flow.excluded.values()) else None
    where = mapping.source
    if reason is None:
        raise DataValidationError(f"{where}: no record was read; nothing to analyse (check the data source)")
    rule = EXCLUSION_RULES.get(reason, reason)
    by_feature = {name: n for (why, name), n in flow.flagged.items() if why == reason and n}
    if by_feature:  # name the feature (its mapping table) behind most of them, not [features.*]
        name = max(sorted(by_feature), key=lambda f: by_feature[f])
        column = mapping.features[name].column if name in mapping.features else name
        rule = rule.replace("[features.*]", f"[features.{name}] (column {column!r})", 1)
    raise DataValidationError(
        f"{where}: fewer records were analysed than the minimum cell size, so nothing could be released; most were "
        f"excluded as {reason}, by the rule {rule}. Fix the mapping and run `site-agent check` again (nothing was "
        "signed)"
    )


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
            return Outcome(Release.from_bytes(data, "recorded release"), data, str(entry.get("time", "")))
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
    ledger.verify_before_use(site.ledger_path, site.public_key())  # as `run` does: a broken ledger is no audit
    answered = recorded_release(site, sha256_hex(request_bytes))
    if answered is not None:
        raise PolicyViolation(
            f"request: already answered (the release recorded in the ledger at {answered.resent_at}); `site-agent "
            "run` would hand over that same release again, and this data and mapping would not be used"
        )
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
    """Return the unsigned release and the audit facts (definitions of what it shows and hides).

    Everything that can refuse without reading a record comes first (the models' static checks, the
    analyses, the mapping), so that such a refusal cannot depend on the data. ``holder["phase"]`` says how
    far it got (see :func:`refusal_reason`).
    """
    holder = {} if holder is None else holder
    holder["phase"] = "model"
    schema = combined_schema(bundle.schema, compare.schema if compare else None)
    # the audit's scope is the site: every release it made, to any study (max_studies is only a rate limit)
    earlier = ledger.facts_for_site(site.ledger_path)
    check_schema_reads_alike(schema, earlier)
    scorer = site_scorer(site, bundle)  # the static check, kept per model in the site folder once it was made
    pair = (compare, site_scorer(site, compare)) if compare is not None else None
    analyses = build_analyses(request.analyses, bundle, compare)
    holder["phase"] = "setup"
    source = data if isinstance(data, SourceSpec) else site.source(data)
    mapping = load_mapping(mapping_path, schema) if mapping_path else default_mapping(schema)
    flow = Flow(exclusion_reasons(mapping))
    holder["phase"] = "records"
    tabulate(source, mapping, bundle, scorer, flow, analyses, chunk_rows, pair, progress)
    check_something_analysed(flow, mapping, site.policy.min_cell_size)
    holder["phase"] = "disclosure"
    counts = collect_counts(flow, analyses, site.policy)
    primary = primary_counts(counts, analyses, bundle)
    domains = {f.name: f.to_dict() for f in schema.features}
    # the recipient knows the models: the audit follows their scores over the features they read
    scores = {"score": describe_bundle(bundle, scorer)}
    if pair is not None:
        scores["score.compare"] = describe_bundle(*pair)
    # where a model cannot be followed exactly (ONNX), the records' combinations of features and scores
    occupied = combinations(site, source, mapping, bundle, scorer, pair, chunk_rows, scores, domains)
    protected = protect(
        counts, site.policy, earlier, bundle.sha256, request.request_id, primary, domains, scores, occupied
    )
    holder.update(counts=counts, protected=protected)
    results = {a.name: a.render(protected.released, protected.derived) for a in analyses}
    flow_part = flow.render(protected.released, protected.derived)
    annotate(flow_part, results, protected.rules)
    release = Release(
        study_id=request.study_id,
        request_id=request.request_id,
        bundle_sha256=bundle.sha256,
        site_id=site.site_id,
        created_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
        policy=site.policy.release_statement(),
        flow=flow_part,
        confusion=tuple(ConfusionTable.from_dict(t, "release.results.confusion") for t in results.pop("confusion", [])),
        extra=results,
        cut_back=protected.cut_back,
    )
    return release, protected.facts(counts)


def primary_counts(counts: CountSet, analyses: list[Any], bundle: Bundle) -> frozenset[str]:
    """The primary table's counts: the participant flow and the 2x2 table at the bundle's threshold."""
    names = {n for n in counts.values if n.startswith("flow.")}
    threshold = bundle.manifest.thresholds[0]
    for analysis in analyses:
        if analysis.name == "confusion" and threshold in analysis.thresholds:
            i = analysis.thresholds.index(threshold)
            names |= {f"confusion[{i}].{c}" for c in ("tp", "fp", "fn", "tn")}
    return frozenset(names)
