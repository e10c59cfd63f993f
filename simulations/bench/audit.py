"""Disclosure audit: one release of 20 confusion tables and 20 ROC bands against 10 earlier releases.

Eleven requests to one site on the same 20,000 generated records, each asking for confusion tables at 20
thresholds and an ROC table over 20 score bands, the cuts moved a little from one request to the next (so
the releases overlap and differencing is possible). The first ten are protected and recorded as earlier
releases (one the audit refuses is left out, as a site's ledger would not hold it, and counted); the eleventh
(or the next request the site releases) is measured: the LP audit alone (its last evaluation) and the whole
protect step (primary and secondary suppression, audit, repairs). Baseline: the same release protected with
no earlier releases, so the ratio is what the study's history costs. Target: protect step < 2 s.
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


def _site(work: Path) -> Any:
    """The bench's site: 20,000 generated records, the bundle, its mapping and policy, and what the site's
    runner passes the audit too: the schema's domains, the model's description (the recipient knows the model;
    its ONNX graph reads the age and sex that subgroups name) and the records' combinations of features and
    scores (site_agent.occupancy)."""
    from types import SimpleNamespace

    from federation.protocol import KeyRing, key_id, load_bundle, load_private_key, make_scorer
    from site_agent.audit.model import describe_bundle
    from site_agent.config import Policy
    from site_agent.mapping import default_mapping
    from site_agent.occupancy import combinations
    from site_agent.sources import SourceSpec

    prepare(work)
    csv_path, _ = write_files(work, RECORDS)
    public = load_private_key(work / "coordinator" / "coordinator.key").public_key()
    bundle = load_bundle((work / "model.bundle").read_bytes(), KeyRing({key_id(public): public}), "bundle")
    mapping, scorer = default_mapping(bundle.schema), make_scorer(bundle)
    domains = {f.name: f.to_dict() for f in bundle.schema.features}
    source = SourceSpec(path=csv_path)
    models = {"score": describe_bundle(bundle, scorer)}
    occupied = combinations(None, source, mapping, bundle, scorer, None, 200_000, models, domains)
    return SimpleNamespace(
        bundle=bundle,
        mapping=mapping,
        scorer=scorer,
        policy=Policy(),
        source=source,
        domains=domains,
        models=models,
        occupied=occupied,
    )


def _counts(site: Any, specs: tuple[Any, ...]) -> Any:
    """One request's counts on the bench's records."""
    from site_agent.analyses import Flow, build_analyses, collect_counts, tabulate
    from site_agent.data import exclusion_reasons

    flow = Flow(exclusion_reasons(site.mapping))
    analyses = build_analyses(specs, site.bundle)
    tabulate(site.source, site.mapping, site.bundle, site.scorer, flow, analyses)
    return collect_counts(flow, analyses, site.policy)


def _protect(site: Any, counts: Any, earlier: Any, label: str) -> Any:
    """The site's protect step, as its runner calls it (domains, the model's description, the combinations)."""
    from site_agent.disclosure import protect

    return protect(
        counts,
        site.policy,
        earlier,
        site.bundle.sha256,
        label,
        domains=site.domains,
        models=site.models,
        occupied=site.occupied,
    )


def run(work: Path, repeats: int = 3) -> dict[str, Any]:
    from federation.protocol import AnalysisSpec, PolicyViolation
    from site_agent.audit import ReleaseFacts

    site = _site(work)
    bundle = site.bundle

    def counts_for(release: int) -> Any:
        thresholds, edges = _cuts(release)
        return _counts(site, (AnalysisSpec("confusion", thresholds), AnalysisSpec("roc", (), edges)))

    say(f"audit: building {EARLIER} earlier releases ...")
    earlier: list[ReleaseFacts] = []
    refused = 0
    for release in range(EARLIER):
        counts = counts_for(release)
        try:
            protected = _protect(site, counts, earlier, f"release {release + 1}")
        except PolicyViolation:
            refused += 1  # not in the history, as a site's ledger would not hold it
            continue
        earlier.append(ReleaseFacts.from_dict(f"release {release + 1}", protected.facts(counts), bundle.sha256))
    # the next request the site releases (at most eight tried), as a coordinator whose request was refused would
    # ask again with other cuts: the row times an audit that releases
    for request in range(EARLIER, EARLIER + 8):
        counts = counts_for(request)
        try:
            _protect(site, counts, earlier, f"release {EARLIER + 1}")
            break
        except PolicyViolation:
            refused += 1
    else:
        raise RuntimeError("audit: eight requests after the history refused in turn; nothing to time")
    with_history, alone, audits = [], [], []
    for _ in range(repeats):
        started = time.perf_counter()
        _protect(site, counts, (), "alone")
        alone.append(time.perf_counter() - started)
        started = time.perf_counter()
        protected = _protect(site, counts, earlier, f"release {EARLIER + 1}")
        with_history.append(time.perf_counter() - started)
        audits.append(protected.audit.seconds if protected.audit is not None else float("nan"))
    result = {
        "counts_in_release": len(counts.values),
        "earlier_releases": len(earlier),
        "refused_requests": refused,
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


HISTORY = (0, 50, 200)


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


def run_history(work: Path, sizes: tuple[int, ...] = HISTORY, repeats: int = 2) -> dict[str, Any]:
    """A new release audited against 0, 50 and 200 earlier releases of mixed analyses on the same records, as a
    ratio to the same release with no history. Target: released, in < 10 s at 200.

    The earlier releases are what a site's ledger would hold: the generator's requests in turn (four kinds,
    their cuts moved a little each time: :func:`_mixed_specs`), each protected and audited against those before
    it (a release the audit refuses is not in the history); the time that took is reported too.

    The new release is the generator's next request that the site releases against the whole history: the
    requests after the history are tried in turn (at most eight; those refused are counted and timed once, as
    ``refused``: repair rounds before the refusal multiply the cost), as a coordinator whose request was refused
    would ask for another analysis. So the rows time an audit that releases, not one that ends in a refusal.
    (With this generator's 200 releases the next request, 2x2 tables at two moved thresholds, is refused:
    together with the history it would let a count the policy hides be worked out. The one after it, the 2x2
    table and ROC bands, is released.) The same release is then timed with
    no history and with the first 50 and the first 200 earlier releases.
    """
    from federation.protocol import PolicyViolation
    from site_agent.audit import ReleaseFacts

    site = _site(work)
    bundle = site.bundle

    largest = max(sizes)
    say(f"audit: a history of {largest} earlier releases of mixed analyses, each audited against those before ...")
    earlier: list[ReleaseFacts] = []
    built, refused, request = time.perf_counter(), 0, 0
    while len(earlier) < largest and request < 3 * largest:
        counts = _counts(site, _mixed_specs(request))
        try:
            done = _protect(site, counts, earlier, f"release {request + 1}")
            earlier.append(ReleaseFacts.from_dict(f"release {request + 1}", done.facts(counts), bundle.sha256))
        except PolicyViolation:
            refused += 1
        request += 1
    built = time.perf_counter() - built
    history_requests = request
    new_refused: list[dict[str, Any]] = []
    for request in range(history_requests, history_requests + 8):  # the next request the site releases
        counts = _counts(site, _mixed_specs(request))
        started = time.perf_counter()
        try:
            _protect(site, counts, earlier, "new")
            break
        except PolicyViolation:
            seconds = time.perf_counter() - started
            new_refused.append({"request": request + 1, "analyses": _kind(request), "seconds": round(seconds, 3)})
            say(
                f"  request {request + 1} ({_kind(request)}) refused against the whole history after {seconds:.2f} s;"
                " the next one"
            )
    rows = []
    for size in sizes:
        seconds, outcome, grouped, atoms, constraints = [], "released", None, None, None
        for _ in range(repeats):
            started = time.perf_counter()
            try:
                protected = _protect(site, counts, earlier[:size], "new")
                outcome = f"released, {len(protected.suppressed)} withheld"
                if protected.audit is not None:
                    grouped, atoms = protected.audit.grouped, protected.audit.atoms
                    constraints = protected.audit.constraints
            except PolicyViolation:
                outcome = "refused"
            seconds.append(time.perf_counter() - started)
        rows.append(
            {
                "earlier_releases": min(size, len(earlier)),
                "seconds": round(min(seconds), 3),
                "outcome": outcome,
                "grouped_model": grouped,
                "atoms": atoms,
                "constraints": constraints,
            }
        )
    alone = rows[0]["seconds"] if sizes[0] == 0 else None
    for row in rows:
        row["ratio_to_no_history"] = round(row["seconds"] / max(alone, 1e-3), 1) if alone is not None else None
        say(
            f"  {row['earlier_releases']} earlier releases: {row['seconds']:.2f} s"
            + (f" = {row['ratio_to_no_history']:.0f}x the release alone" if alone is not None else "")
            + f" ({row['outcome']}; {row['atoms']} atoms)"
        )
    return {
        "counts_in_release": len(counts.values),
        "new_release": f"request {request + 1} of the generator ({_kind(request)})",
        "refused": new_refused,
        "rows": rows,
        "history_requests": history_requests,
        "history_refused": refused,
        "history_build_s": round(built, 1),
        "target_s": 10.0,
    }


def _kind(request: int) -> str:
    kinds = ("2x2 tables at two thresholds", "the 2x2 table and ROC bands", "the 2x2 table and subgroups by age band")
    return (*kinds, "the 2x2 table and subgroups by sex")[request % 4]
