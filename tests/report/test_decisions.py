"""The report's threshold-choice and net-benefit section on a real study store (the demo consortium answering a
request for the 2×2 at four thresholds through the real site path): the cautions are there, and every site's
net benefit in the section's data equals TP/n − FP/n × pt/(1 − pt) computed directly from the released
tables (Vickers & Elkin 2006, from memory)."""

from __future__ import annotations

import base64
import csv
import io
import json
import re
import uuid
from datetime import UTC, datetime
from pathlib import Path

import pytest

from federation.decisions import DECISION_TABLES, decision_analysis, decision_rows, threshold_tables
from federation.protocol import AnalysisSpec, Request, load_private_key
from federation.store import Store
from simulations.demo import prepare_study
from site_agent.config import load_site
from site_agent.runner import run_request
from tests.report.studies import federation

THRESHOLDS = (0.2, 0.35, 0.5, 0.65)


@pytest.fixture(scope="module")
def thresholds_store(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("thresholds") / "study"
    study = prepare_study(root, study_id="thresholds-1")
    bundle_sha256 = json.loads(study.request_bytes)["bundle_sha256"]
    issued = datetime.now(UTC).replace(microsecond=0).isoformat()
    request = Request("thresholds-1", uuid.uuid4().hex, bundle_sha256, (AnalysisSpec("confusion", THRESHOLDS),), issued)
    document = request.signed_bytes(load_private_key(root / "coordinator" / "coordinator.key"))
    store = Store(study.store_path)
    store.add_request(Request.from_bytes(document, None, "request"), document)
    releases = []
    for site_dir in study.site_dirs:
        site = load_site(site_dir)
        releases.append((run_request(site, document, study.bundle_bytes).release_bytes, site.site_id))
    store.ingest(releases)
    store.close()
    return study.store_path


def _csv_from_link(html: str, filename: str) -> list[dict[str, str]]:
    match = re.search(rf'download="{re.escape(filename)}" href="data:text/csv;charset=utf-8;base64,([^"]+)"', html)
    assert match, filename
    return list(csv.DictReader(io.StringIO(base64.b64decode(match.group(1)).decode("utf-8"))))


def test_report_has_the_section_with_its_cautions_and_direct_net_benefit(
    thresholds_store: Path, tmp_path: Path
) -> None:
    out = tmp_path / "report.html"
    result = federation("report", "--store", str(thresholds_store), "--out", str(out))
    assert result.returncode in (0, 3), result.stderr
    html = out.read_text()
    section = html[html.index('<section id="threshold-choice">') :]
    section = section[: section.index("</section>")]
    assert "policy decision" in section and "clinicians" in section and "optimistic" in section
    assert "does not make it" in section
    for threshold in THRESHOLDS:
        assert f'<th scope="row">{threshold:g}</th>' in section
    rows = _csv_from_link(html, "thresholds-1-net-benefit-sites.csv")
    store = Store(thresholds_store)
    try:
        releases = store.releases("thresholds-1")
    finally:
        store.close()
    checked = 0
    for release in (stored.release for stored in releases):
        for table in release.confusion:
            cells = table.cells
            if cells["tp"] is None or cells["fp"] is None:
                continue
            n = release.flow["analysed"]
            pt = table.threshold
            expected = cells["tp"] / n - cells["fp"] / n * pt / (1 - pt)
            row = next(r for r in rows if r["site_id"] == release.site_id and float(r["threshold_probability"]) == pt)
            assert float(row["net_benefit_model"]) == pytest.approx(expected, abs=1e-12)
            prevalence = release.flow["analysed_positive"] / n
            assert float(row["net_benefit_screen_all"]) == pytest.approx(prevalence - (1 - prevalence) * pt / (1 - pt))
            checked += 1
    assert checked >= 3 * len(THRESHOLDS)


def test_tidy_rows_follow_the_analysis(thresholds_store: Path) -> None:
    store = Store(thresholds_store)
    try:
        releases = store.releases("thresholds-1")
    finally:
        store.close()
    tables, source = threshold_tables(releases)
    assert source == "confusion" and sorted(tables) == list(THRESHOLDS)
    result = decision_analysis(releases, "probability", bootstrap=4)
    rows = decision_rows(result)
    assert [r["threshold"] for r in rows["threshold_accuracy"]] == list(THRESHOLDS)
    sensitivities = [r["sensitivity"] for r in rows["threshold_accuracy"] if r["sensitivity"] is not None]
    assert sensitivities == sorted(sensitivities, reverse=True)
    assert rows["threshold_choice"][0]["criterion"] == "youden"
    assert rows["threshold_choice"][0]["threshold"] in THRESHOLDS
    assert {r["threshold_probability"] for r in rows["net_benefit_pooled"]} == set(THRESHOLDS)
    for name, table in rows.items():  # every column named in the codebook, in file order
        assert list(table[0]) == [column for column, _ in DECISION_TABLES[name][1]]
    points = decision_analysis(releases, "points", bootstrap=0)["net_benefit"]
    assert points["status"].startswith("not estimable: net benefit needs the model's score to be a predicted risk")


def test_report_takes_the_coordinators_target_and_range(thresholds_store: Path, tmp_path: Path) -> None:
    out = tmp_path / "report.html"
    result = federation(
        "report", "--store", str(thresholds_store), "--out", str(out), "--target-sensitivity", "0.6",
        "--threshold-probabilities", "0.3:0.6", "--bootstrap", "3",
    )  # fmt: skip
    assert result.returncode in (0, 3), result.stderr
    html = out.read_text()
    assert "the highest threshold whose pooled sensitivity reaches 0.6" in html
    rows = _csv_from_link(html, "thresholds-1-net-benefit-pooled.csv")
    assert sorted(float(r["threshold_probability"]) for r in rows) == [0.35, 0.5]
    choice = _csv_from_link(html, "thresholds-1-threshold-choice.csv")[0]
    assert choice["criterion"] == "target_sensitivity" and float(choice["sensitivity"]) >= 0.6
    bad = federation(
        "report", "--store", str(thresholds_store), "--out", str(out), "--threshold-probabilities", "0.6:0.2"
    )
    assert bad.returncode == 1 and len(bad.stderr.strip().splitlines()) == 1 and "LOW:HIGH" in bad.stderr


def test_export_writes_the_decision_tables(thresholds_store: Path, tmp_path: Path) -> None:
    import pandas as pd

    out = tmp_path / "results"
    result = federation("export", "--store", str(thresholds_store), "--out-dir", str(out), "--bootstrap", "3")
    assert result.returncode in (0, 3), result.stderr
    accuracy = pd.read_csv(out / "threshold_accuracy.csv")
    assert accuracy["threshold"].tolist() == list(THRESHOLDS)
    assert (accuracy["sensitivity_ci_low"] <= accuracy["sensitivity"]).all()
    choice = pd.read_csv(out / "threshold_choice.csv")
    assert choice.loc[0, "criterion"] == "youden" and choice.loc[0, "threshold"] in THRESHOLDS
    sites = pd.read_csv(out / "net_benefit_sites.csv")
    store = Store(thresholds_store)
    try:
        releases = store.releases("thresholds-1")
    finally:
        store.close()
    for release in (stored.release for stored in releases):
        n = release.flow["analysed"]
        for table in release.confusion:
            row = sites[(sites["site_id"] == release.site_id) & (sites["threshold_probability"] == table.threshold)]
            cells, pt = table.cells, table.threshold
            if cells["tp"] is None or cells["fp"] is None:
                assert row["net_benefit_model"].isna().all()  # withheld: NA, never a number
                continue
            # Net benefit = TP/n - FP/n * pt/(1 - pt) (Vickers & Elkin 2006, from memory), from the release itself.
            expected = cells["tp"] / n - cells["fp"] / n * pt / (1 - pt)
            assert row["net_benefit_model"].iloc[0] == pytest.approx(expected, abs=1e-12)
    codebook = pd.read_csv(out / "codebook.csv")
    for name in DECISION_TABLES:
        assert f"{name}.csv" in set(codebook["file"])
    assert json.loads((out / "decisions.json").read_text())["caution"].startswith("A threshold chosen")


def test_a_threshold_probability_without_a_pooled_value_is_shown_as_not_defined() -> None:
    # At a threshold where fewer than two sites released TP and FP the pooled net benefit is None: the table
    # says "—" and the curve skips the point (no exception, no number made up).
    from federation.report.decisions import _net_benefit_part

    point = {
        "threshold_probability": 0.2,
        "sites": [{"site_id": "a"}],
        "model": None,
        "screen_all": None,
        "advantage_over_all": None,
        "sites_not_pooled": [{"site_id": "a", "reason": "counts needed for net benefit withheld"}],
    }
    empty = {"threshold_accuracy": [], "threshold_choice": [], "net_benefit_sites": [], "net_benefit_pooled": []}
    html = _net_benefit_part({"net_benefit": {"points": [point]}}, empty, "s")
    assert '<th scope="row">0.2</th><td class=n>—</td>' in html
