"""A curious or malicious coordinator: it holds the key the sites pinned, so everything it sends is validly
signed. These tests play its moves against the real site agent (signed requests, real records, the real
ledger) and check that only counts the site's policy allows ever leave."""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from federation.protocol import AnalysisSpec, PolicyViolation, Release
from federation.protocol.documents import SubgroupSpec
from site_agent import ledger
from site_agent.runner import run_request

from .conftest import Coordinator, count_leaves, make_site

K = 10  # the default min_cell_size (common practice: 5, 10 or 11)


def released_counts(release_bytes: bytes) -> list[tuple[str, int | None]]:
    doc = json.loads(release_bytes)
    return count_leaves(doc["flow"], "flow") + count_leaves(doc["results"], "results")


def assert_only_safe_counts(release_bytes: bytes, k: int = K) -> None:
    """Every count the release shows is null (suppressed), 0, or at least k."""
    counts = released_counts(release_bytes)
    assert counts, "a release with no counts at all cannot show the rule holds"
    unsafe = [(name, value) for name, value in counts if value is not None and 0 < value < k]
    assert unsafe == []


def refusals(site_dir: Path) -> list[str]:
    return [e["details"]["reason"] for e in ledger.read_entries(site_dir / "ledger.jsonl") if e["event"] == "refusal"]


# --- ever finer subgroups and bands ------------------------------------------------------------------------


def test_age_bands_finer_than_the_policy_allows_are_refused(coordinator: Coordinator, tmp_path: Path) -> None:
    site = make_site(coordinator, tmp_path, min_band_width={"age_months": 12})
    bundle = coordinator.demo.bundle_bytes
    wide = AnalysisSpec("subgroups", subgroups=(SubgroupSpec("age_months", (0.0, 24.0, 48.0, 96.0)),))
    outcome = run_request(site, coordinator.request(wide, AnalysisSpec("confusion")), bundle)
    assert_only_safe_counts(outcome.release_bytes)
    for width in (6.0, 3.0, 1.0):  # the coordinator narrows the bands, step by step
        edges = tuple(24.0 + width * i for i in range(4))
        fine = AnalysisSpec("subgroups", subgroups=(SubgroupSpec("age_months", edges),))
        with pytest.raises(PolicyViolation, match="narrower than this site's min_band_width"):
            run_request(site, coordinator.request(fine, AnalysisSpec("confusion")), bundle)
    assert len(refusals(site.root)) == 3
    events = [e["event"] for e in ledger.read_entries(site.ledger_path)]
    assert events.count("release") == 1  # nothing left for the narrow requests


def test_a_subgroup_variable_outside_the_policy_is_refused(coordinator: Coordinator, tmp_path: Path) -> None:
    site = make_site(coordinator, tmp_path)  # allowed_subgroups: age_months, sex
    item = AnalysisSpec("subgroups", subgroups=(SubgroupSpec("item_03", (1.0, 2.0, 3.0)),))
    with pytest.raises(PolicyViolation, match="not allowed by this site's policy"):
        run_request(site, coordinator.request(item), coordinator.demo.bundle_bytes)


def test_hundred_narrow_score_bands_are_merged_until_every_band_is_safe(
    coordinator: Coordinator, tmp_path: Path
) -> None:
    site = make_site(coordinator, tmp_path)
    edges = tuple(round(0.01 * i, 2) for i in range(1, 100))  # 99 edges: 100 bands of width 0.01
    outcome = run_request(
        site,
        coordinator.request(AnalysisSpec("roc", bands=edges), AnalysisSpec("calibration", bands=edges)),
        coordinator.demo.bundle_bytes,
    )
    assert_only_safe_counts(outcome.release_bytes)
    roc = json.loads(outcome.release_bytes)["results"]["roc"]
    assert len(roc["bands"]) < 50  # merged: far fewer bands than asked for
    assert sum(b["positive"] for b in roc["bands"]) == roc["positive"]  # merged, not dropped


def test_ever_finer_age_subgroups_across_requests_keep_every_count_safe(
    coordinator: Coordinator, tmp_path: Path
) -> None:
    """Without a min_band_width, shifted age bands (the differencing attack) are answered only as far as the
    audit over every release of the study allows; every count shown is still 0 or >= k."""
    site = make_site(coordinator, tmp_path)
    bundle = coordinator.demo.bundle_bytes
    answered = 0
    for shift in (0.0, 1.0, 2.0, 3.0):
        edges = tuple(12.0 + shift + 12.0 * i for i in range(5))
        spec = AnalysisSpec("subgroups", subgroups=(SubgroupSpec("age_months", edges),))
        try:
            outcome = run_request(site, coordinator.request(spec, AnalysisSpec("confusion"), study="ages"), bundle)
        except PolicyViolation as refused:
            assert "already" not in str(refused)
            continue
        answered += 1
        assert_only_safe_counts(outcome.release_bytes)
    assert answered >= 1
    facts = ledger.facts_for_study(site.ledger_path, "ages")
    assert len(facts) == answered


# --- many thresholds whose differences isolate a few records -----------------------------------------------


def test_many_close_thresholds_never_isolate_fewer_than_k_records(coordinator: Coordinator, tmp_path: Path) -> None:
    """tp(t1) - tp(t2) counts the diseased scoring in [t1, t2). Fifty close thresholds, then fifty more
    between them in a second request: every difference the coordinator can take between shown counts is
    0 or >= k (or the later request is refused)."""
    site = make_site(coordinator, tmp_path)
    bundle = coordinator.demo.bundle_bytes
    first = tuple(round(0.30 + 0.008 * i, 4) for i in range(50))
    second = tuple(round(t + 0.004, 4) for t in first)
    shown: list[dict[str, int | None]] = []
    for thresholds in (first, second):
        try:
            outcome = run_request(site, coordinator.request(AnalysisSpec("confusion", thresholds), study="cut"), bundle)
        except PolicyViolation:
            continue
        assert_only_safe_counts(outcome.release_bytes)
        shown += [dict(t.cells) for t in Release.from_bytes(outcome.release_bytes).confusion]
    assert shown
    for cell in ("tp", "fp", "fn", "tn"):
        values = sorted({s[cell] for s in shown if s[cell] is not None})
        small = [(a, b) for a in values for b in values if 0 < b - a < K]
        assert small == [], cell


# --- the same study under new request ids; a new study id -------------------------------------------------


def test_same_study_under_new_request_ids_stops_at_max_requests(coordinator: Coordinator, tmp_path: Path) -> None:
    site = make_site(coordinator, tmp_path, max_requests_per_study=3)
    bundle = coordinator.demo.bundle_bytes
    for threshold in (0.3, 0.5, 0.7):
        run_request(site, coordinator.request(AnalysisSpec("confusion", (threshold,)), study="again"), bundle)
    with pytest.raises(PolicyViolation, match="maximum number of requests for this study"):
        run_request(site, coordinator.request(AnalysisSpec("confusion", (0.4,)), study="again"), bundle)


def test_a_new_study_id_is_audited_with_every_earlier_release(coordinator: Coordinator, tmp_path: Path) -> None:
    """The request cap is per study, so the same question under a NEW study id is answered again; the audit
    takes every release of the site together, so the answer is the same one (nothing new can be
    differenced; tests/adversarial/test_recipient_knowledge.py plays a differencing pair across studies)."""
    site = make_site(coordinator, tmp_path, max_requests_per_study=1)
    bundle = coordinator.demo.bundle_bytes
    spec = AnalysisSpec("confusion", (0.5,))
    first = run_request(site, coordinator.request(spec, study="study-one"), bundle)
    with pytest.raises(PolicyViolation, match="maximum number"):
        run_request(site, coordinator.request(spec, study="study-one"), bundle)
    second = run_request(site, coordinator.request(spec, study="study-two"), bundle)
    assert Release.from_bytes(second.release_bytes).confusion == Release.from_bytes(first.release_bytes).confusion
    assert ledger.facts_for_study(site.ledger_path, "study-two")[0] is not None
    assert len(ledger.facts_for_study(site.ledger_path, "study-one")) == 1
    assert len(ledger.facts_for_site(site.ledger_path)) == 2  # the audit's scope: every study


def test_new_study_ids_stop_at_the_site_wide_study_cap(coordinator: Coordinator, tmp_path: Path) -> None:
    """max_studies bounds how many separate audit scopes a coordinator can open by renaming the study."""
    site = make_site(coordinator, tmp_path, max_studies=2)
    bundle = coordinator.demo.bundle_bytes
    spec = AnalysisSpec("confusion", (0.5,))
    run_request(site, coordinator.request(spec, study="study-one"), bundle)
    run_request(site, coordinator.request(spec, study="study-two"), bundle)
    run_request(site, coordinator.request(AnalysisSpec("confusion", (0.4,)), study="study-two"), bundle)  # same study
    with pytest.raises(PolicyViolation, match="maximum number of studies"):
        run_request(site, coordinator.request(spec, study="study-three"), bundle)
    releases = [e for e in ledger.read_entries(site.ledger_path) if e["event"] == "release"]
    assert len(releases) == 3 and ledger.read_entries(site.ledger_path)[-1]["event"] == "refusal"


def test_require_approval_holds_every_release_until_a_person_decides(coordinator: Coordinator, tmp_path: Path) -> None:
    from site_agent.approval import AwaitingApproval

    site = make_site(coordinator, tmp_path, require_approval=True)
    with pytest.raises(AwaitingApproval):
        run_request(site, coordinator.request(study="watched"), coordinator.demo.bundle_bytes)
    assert not any(site.releases_dir.glob("*.json"))
    events = [e["event"] for e in ledger.read_entries(site.ledger_path)]
    assert "release" not in events and "sent" not in events and events[-1] == "held"
