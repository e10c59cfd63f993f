"""Disclosure audit: one release of 20 confusion tables and 20 ROC bands against 10 earlier releases.

Eleven requests to one site on the same 20,000 generated records, each asking for confusion tables at 20
thresholds and an ROC table over 20 score bands, the cuts moved a little from one request to the next (so
the releases overlap and differencing is possible). The first ten are protected and recorded as earlier
releases; the eleventh is measured: the LP audit alone (its last evaluation) and the whole protect step
(primary and secondary suppression, audit, repairs). Baseline: the same release protected with no earlier
releases, so the ratio is what the study's history costs. Target: protect step < 2 s.
"""

from __future__ import annotations

import time
from pathlib import Path
from typing import Any

from .common import say
from .site_path import prepare, write_files

RECORDS = 20_000
EARLIER = 10


def _cuts(release: int) -> tuple[tuple[float, ...], tuple[float, ...]]:
    shift = 0.004 * release
    thresholds = tuple(round(0.04 + 0.045 * j + shift, 4) for j in range(20))
    edges = tuple(round(0.0 + 0.05 * j + (shift if 0 < j < 20 else 0.0), 4) for j in range(21))
    return thresholds, edges


def run(work: Path, repeats: int = 3) -> dict[str, Any]:
    from federation.protocol import AnalysisSpec, KeyRing, key_id, load_bundle, load_private_key, make_scorer
    from site_agent.analyses import Flow, build_analyses, collect_counts, tabulate
    from site_agent.audit import ReleaseFacts
    from site_agent.config import Policy
    from site_agent.data import exclusion_reasons
    from site_agent.disclosure import protect
    from site_agent.mapping import default_mapping
    from site_agent.sources import SourceSpec

    prepare(work)
    csv_path, _ = write_files(work, RECORDS)
    public = load_private_key(work / "coordinator" / "coordinator.key").public_key()
    bundle = load_bundle((work / "model.bundle").read_bytes(), KeyRing({key_id(public): public}), "bundle")
    mapping, scorer, policy = default_mapping(bundle.schema), make_scorer(bundle), Policy()

    def counts_for(release: int) -> Any:
        thresholds, edges = _cuts(release)
        specs = (AnalysisSpec("confusion", thresholds), AnalysisSpec("roc", (), edges))
        flow = Flow(exclusion_reasons(mapping))
        analyses = build_analyses(specs, bundle)
        tabulate(SourceSpec(path=csv_path), mapping, bundle, scorer, flow, analyses)
        return collect_counts(flow, analyses, policy)

    say(f"audit: building {EARLIER} earlier releases ...")
    earlier: list[ReleaseFacts] = []
    for release in range(EARLIER):
        counts = counts_for(release)
        protected = protect(counts, policy, earlier, bundle.sha256, f"release {release + 1}")
        earlier.append(ReleaseFacts.from_dict(f"release {release + 1}", protected.facts(counts), bundle.sha256))
    counts = counts_for(EARLIER)
    with_history, alone, audits = [], [], []
    for _ in range(repeats):
        started = time.perf_counter()
        protect(counts, policy, (), bundle.sha256, "alone")
        alone.append(time.perf_counter() - started)
        started = time.perf_counter()
        protected = protect(counts, policy, earlier, bundle.sha256, f"release {EARLIER + 1}")
        with_history.append(time.perf_counter() - started)
        audits.append(protected.audit.seconds if protected.audit is not None else float("nan"))
    result = {
        "counts_in_release": len(counts.values),
        "earlier_releases": EARLIER,
        "suppressed": len(protected.suppressed),
        "atoms": protected.audit.atoms if protected.audit is not None else None,
        "constraints": protected.audit.constraints if protected.audit is not None else None,
        "audit_s": round(min(audits), 3),
        "protect_s": round(min(with_history), 3),
        "protect_alone_s": round(min(alone), 3),
        "target_s": 2.0,
        "repeats": repeats,
    }
    result["ratio_to_alone"] = round(result["protect_s"] / result["protect_alone_s"], 2)
    result["ratio_to_target"] = round(result["protect_s"] / 2.0, 2)
    say(
        f"  audit {result['audit_s']:.2f} s, protect {result['protect_s']:.2f} s = "
        f"{result['ratio_to_alone']:.1f}x the same release alone, {result['ratio_to_target']:.2f} of the 2 s target"
    )
    return result


HISTORY = 200


def _mixed_specs(release: int) -> tuple[Any, ...]:
    """The request of earlier release ``release``: four kinds in turn, their cuts moved a little each time."""
    from federation.protocol import AnalysisSpec
    from federation.protocol.documents import SubgroupSpec

    shift = 0.002 * (release // 4)
    kind = release % 4
    if kind == 0:
        return (AnalysisSpec("confusion", (round(0.3 + shift, 4), round(0.5 + shift, 4))),)
    if kind == 1:
        edges = tuple(round(0.1 * j + shift, 4) for j in range(1, 10))
        return (AnalysisSpec("confusion"), AnalysisSpec("roc", (), edges))
    if kind == 2:
        edges = (24.0 + release // 4, 60.0 + release // 4)
        return (AnalysisSpec("confusion"), AnalysisSpec("subgroups", subgroups=(SubgroupSpec("age_months", edges),)))
    return (AnalysisSpec("confusion"), AnalysisSpec("subgroups", subgroups=(SubgroupSpec("sex", ()),)))


def run_history(work: Path, releases: int = HISTORY, repeats: int = 2) -> dict[str, Any]:
    """A new release audited against ``releases`` earlier releases of mixed analyses on the same records,
    as a ratio to the same release with no history. Earlier releases are protected by minimum cell size and
    secondary suppression only (building each with a full audit against all before it would take hours);
    their facts are what the ledger would hold. Target: < 10 s."""
    from federation.protocol import KeyRing, PolicyViolation, key_id, load_bundle, load_private_key, make_scorer
    from site_agent.analyses import Flow, build_analyses, collect_counts, tabulate
    from site_agent.audit import ReleaseFacts
    from site_agent.config import Policy
    from site_agent.data import exclusion_reasons
    from site_agent.disclosure import Protected, protect, suppress
    from site_agent.mapping import default_mapping
    from site_agent.sources import SourceSpec

    prepare(work)
    csv_path, _ = write_files(work, RECORDS)
    public = load_private_key(work / "coordinator" / "coordinator.key").public_key()
    bundle = load_bundle((work / "model.bundle").read_bytes(), KeyRing({key_id(public): public}), "bundle")
    mapping, scorer, policy = default_mapping(bundle.schema), make_scorer(bundle), Policy()
    domains = {f.name: f.to_dict() for f in bundle.schema.features}

    def counts_for(specs: tuple[Any, ...]) -> Any:
        flow = Flow(exclusion_reasons(mapping))
        analyses = build_analyses(specs, bundle)
        tabulate(SourceSpec(path=csv_path), mapping, bundle, scorer, flow, analyses)
        return collect_counts(flow, analyses, policy)

    say(f"audit: {releases} earlier releases of mixed analyses ...")
    earlier: list[ReleaseFacts] = []
    cache: dict[int, Any] = {}
    for release in range(releases):
        kind = release % 4
        counts = cache.get(kind) if kind == 3 else None
        counts = counts or counts_for(_mixed_specs(release))
        cache[kind] = counts
        released, hidden = suppress(counts.values, counts.relations, policy.min_cell_size, policy.allow_zero)
        reasons = {n: "primary" if 0 < counts.values[n] < policy.min_cell_size else "secondary" for n in hidden}
        done = Protected(released, hidden, {}, reasons, None, bundle.sha256, (), policy.min_cell_size, True, domains)
        earlier.append(ReleaseFacts.from_dict(f"release {release + 1}", done.facts(counts), bundle.sha256))
    counts = counts_for(_mixed_specs(releases + 1))
    with_history, alone = [], []
    for _ in range(repeats):
        started = time.perf_counter()
        protect(counts, policy, (), bundle.sha256, "alone", domains=domains)
        alone.append(time.perf_counter() - started)
        started = time.perf_counter()
        try:  # the earlier releases were not audited together, so the audit may find them exposed already
            protected = protect(counts, policy, earlier, bundle.sha256, "new", domains=domains)
            outcome = "released"
        except PolicyViolation:
            protected, outcome = None, "refused"
        with_history.append(time.perf_counter() - started)
    result = {
        "earlier_releases": releases,
        "counts_in_release": len(counts.values),
        "outcome": outcome,
        "atoms": protected.audit.atoms if protected is not None and protected.audit is not None else None,
        "protect_s": round(min(with_history), 3),
        "protect_alone_s": round(min(alone), 3),
        "target_s": 10.0,
    }
    result["ratio_to_alone"] = round(result["protect_s"] / max(result["protect_alone_s"], 1e-9), 1)
    say(
        f"  {releases} earlier releases: protect {result['protect_s']:.2f} s = {result['ratio_to_alone']:.0f}x the "
        f"release alone ({result['protect_alone_s']:.3f} s); target < 10 s"
    )
    return result
