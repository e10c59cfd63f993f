"""The offline command sequence end to end, through the real command-line entry points.

External reference: scikit-learn's bundled breast-cancer data and `sklearn.metrics.confusion_matrix`.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import confusion_matrix

from federation.cli import main as federation
from site_agent.cli import main as site_agent

from . import breast_cancer


def set_policy(site_dir: Path, min_cell_size: int) -> None:
    config = site_dir / "site.toml"
    config.write_text(re.sub(r"min_cell_size = \d+", f"min_cell_size = {min_cell_size}", config.read_text()))


@pytest.fixture
def study(tmp_path: Path) -> breast_cancer.Study:
    return breast_cancer.build(tmp_path / "study")


def offline_round(
    study: breast_cancer.Study, tmp: Path, min_cell_size: int, request_options: tuple[str, ...] = ()
) -> tuple[Path, list[Path]]:
    store = tmp / "study.db"
    assert (
        federation(
            [
                "request",
                "new",
                "--store",
                str(store),
                "--study-id",
                "bc-1",
                "--bundle",
                str(study.bundle_path),
                "--sign",
                str(study.coordinator_key),
                "--out",
                str(tmp / "request.json"),
                *request_options,
            ]
        )
        == 0
    )
    releases = []
    for i, csv in enumerate(study.site_csvs):
        site_dir = tmp / f"site{i}"
        assert (
            site_agent(
                ["init", "--site-id", f"site-{i}", "--trust", str(study.coordinator_pub), "--site-dir", str(site_dir)]
            )
            == 0
        )
        approve = ["model", "approve", str(study.bundle_path), "--site-dir", str(site_dir), "--by", "site IT"]
        assert site_agent(approve) == 0
        set_policy(site_dir, min_cell_size)
        out = tmp / f"release{i}.json"
        assert (
            site_agent(
                [
                    "run",
                    "--site-dir",
                    str(site_dir),
                    "--request",
                    str(tmp / "request.json"),
                    "--bundle",
                    str(study.bundle_path),
                    "--data",
                    str(csv),
                    "--out",
                    str(out),
                ]
            )
            == 0
        )
        assert (
            federation(["enrol", "--store", str(store), "--site-id", f"site-{i}", "--key", str(site_dir / "site.pub")])
            == 0
        )
        releases.append(out)
    assert federation(["ingest", "--store", str(store), *map(str, releases)]) == 0
    return store, releases


def analyze_json(store: Path, capsys: pytest.CaptureFixture[str]) -> dict:
    capsys.readouterr()
    assert federation(["analyze", "--store", str(store), "--json"]) == 0
    return json.loads(capsys.readouterr().out)


def test_counts_equal_sklearn_confusion_matrix(study, tmp_path, capsys):
    # Reference: sklearn.metrics.confusion_matrix on the same records pooled, predictions from the same
    # fitted scikit-learn model (score >= 0.5 is screen-positive).
    probabilities = study.model.predict_proba(study.features)[:, 1]
    assert np.min(np.abs(probabilities - 0.5)) > 1e-4, "a record sits on the threshold; float32 could flip it"
    tn, fp, fn, tp = confusion_matrix(study.outcome, (probabilities >= 0.5).astype(int)).ravel()

    store, _ = offline_round(study, tmp_path, min_cell_size=1)  # k = 1: nothing suppressed, so totals compare
    result = analyze_json(store, capsys)
    sites = result["sites"]
    assert len(sites) == breast_cancer.N_SITES
    assert all(site["suppressed"] == [] for site in sites)
    assert sum(s["tp"] for s in sites) == tp
    assert sum(s["fp"] for s in sites) == fp
    assert sum(s["fn"] for s in sites) == fn
    assert sum(s["tn"] for s in sites) == tn
    # And each site's table equals sklearn's on that site's records.
    start = 0
    for site, csv in zip(sites, study.site_csvs, strict=True):
        n = sum(1 for _ in csv.open()) - 1
        ref = confusion_matrix(study.outcome[start : start + n], (probabilities[start : start + n] >= 0.5)).ravel()
        assert [site["tn"], site["fp"], site["fn"], site["tp"]] == ref.tolist()
        start += n
    assert result["pooled"]["sites_pooled"] == ["site-0", "site-1", "site-2"]


def test_default_policy_suppresses_small_cells_and_keeps_the_rest_exact(study, tmp_path, capsys):
    probabilities = study.model.predict_proba(study.features)[:, 1]
    store, releases = offline_round(study, tmp_path, min_cell_size=10)
    result = analyze_json(store, capsys)
    start = 0
    for site, csv in zip(result["sites"], study.site_csvs, strict=True):
        n = sum(1 for _ in csv.open()) - 1
        tn, fp, fn, tp = confusion_matrix(
            study.outcome[start : start + n], probabilities[start : start + n] >= 0.5
        ).ravel()
        truth = {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
        for cell, value in truth.items():
            if site[cell] is None:
                assert cell in site["suppressed"]
            else:
                assert site[cell] == value  # released counts are never altered
                assert value == 0 or value >= 10
        # A lone suppressed cell would be recomputable from the released margins.
        assert len(site["suppressed"]) != 1
        start += n
    assert any(site["suppressed"] for site in result["sites"]), "this split has small error cells at k=10"
    # The univariate sensitivity analysis drops the sites with withheld cells; the headline keeps them, censored.
    withheld = {s["site_id"] for s in result["sites"] if s["suppressed"]}
    univariate = result["pooled"]["sensitivity_analyses"]["univariate"]
    assert {e["site_id"] for e in univariate["sites_not_pooled"]} == withheld
    assert set(result["pooled"]["censored_sites"]) == withheld and not result["pooled"]["sites_not_pooled"]
    for path in releases:
        doc = json.loads(path.read_text())
        assert doc["policy"]["min_cell_size"] == 10


def test_the_primary_threshold_is_the_table_sites_keep_and_the_coordinator_pools(study, tmp_path, capsys):
    # Reference: sklearn.metrics.confusion_matrix at the named primary threshold on each site's records.
    probabilities = study.model.predict_proba(study.features)[:, 1]
    options = ("--thresholds", "0.3,0.5,0.7", "--primary-threshold", "0.7")
    store, releases = offline_round(study, tmp_path, min_cell_size=1, request_options=options)
    request = json.loads((tmp_path / "request.json").read_text())
    confusion = next(a for a in request["analyses"] if a["name"] == "confusion")
    assert confusion["thresholds"] == [0.7, 0.3, 0.5]  # the primary table is listed first
    result = analyze_json(store, capsys)
    start = 0
    for site, path, csv in zip(result["sites"], releases, study.site_csvs, strict=True):
        n = sum(1 for _ in csv.open()) - 1
        assert json.loads(path.read_text())["results"]["confusion"][0]["threshold"] == 0.7
        ref = confusion_matrix(study.outcome[start : start + n], probabilities[start : start + n] >= 0.7).ravel()
        assert [site["tn"], site["fp"], site["fn"], site["tp"]] == ref.tolist()
        start += n


def test_the_bundles_threshold_is_the_primary_table_when_asked_for(study, tmp_path):
    # The breast-cancer bundle's threshold is 0.5 (tests/breast_cancer.py); asked among others, it comes first.
    store = tmp_path / "study.db"
    args = ["request", "new", "--store", str(store), "--study-id", "bc-p", "--bundle", str(study.bundle_path)]
    args += ["--sign", str(study.coordinator_key), "--out", str(tmp_path / "r.json"), "--thresholds", "0.3,0.5,0.7"]
    assert federation(args) == 0
    confusion = next(a for a in json.loads((tmp_path / "r.json").read_text())["analyses"] if a["name"] == "confusion")
    assert confusion["thresholds"] == [0.5, 0.3, 0.7]


def test_ledger_holds_the_full_release_before_the_file(study, tmp_path):
    offline_round(study, tmp_path, min_cell_size=10)
    entries = [json.loads(line) for line in (tmp_path / "site0" / "ledger.jsonl").read_text().splitlines()]
    assert [e["event"] for e in entries] == ["model_approval", "request_received", "release", "sent"]
    assert entries[2]["details"]["release"] == (tmp_path / "release0.json").read_text()
    assert site_agent(["ledger", "verify", "--site-dir", str(tmp_path / "site0")]) == 0
