"""Requests that name analyses: the document's closed vocabulary, the coordinator's flags, the site's
policy, `site-agent check`, and a paired request over the Flower adapters."""

from __future__ import annotations

import json
import re
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from federation.cli import main as federation
from federation.flower_server import RoundConfig, make_server_app
from federation.protocol import AnalysisSpec, DocumentError, Request, sha256_hex
from federation.protocol.documents import SubgroupSpec
from federation.protocol.words import CALIBRATION_INTERCEPT, OBSERVED_EXPECTED
from federation.store import Store
from simulations.inprocess import run_inprocess
from site_agent.cli import main as site_agent
from site_agent.flower_client import make_client_app

from .conftest import Cancer, make_site, request_bytes


def test_first_version_requests_stay_valid(cancer: Cancer) -> None:
    old = json.loads(request_bytes(cancer, AnalysisSpec("confusion", (0.4, 0.6))))
    assert old["analyses"] == [{"name": "confusion", "thresholds": [0.4, 0.6]}]  # unchanged canonical form
    parsed = Request.from_bytes(json.dumps(old).encode(), None)
    assert parsed.analyses == (AnalysisSpec("confusion", (0.4, 0.6)),) and parsed.compare_bundle_sha256 == ""


def test_new_specs_round_trip(cancer: Cancer) -> None:
    specs = (
        AnalysisSpec("roc", bands=(0.1, 0.5, 0.9)),
        AnalysisSpec("subgroups", subgroups=(SubgroupSpec("sex"), SubgroupSpec("age_months", (24.0, 36.0)))),
        AnalysisSpec("paired", thresholds=(0.5, 0.4), compare_bundle_sha256="b" * 64),
    )
    parsed = Request.from_bytes(request_bytes(cancer, *specs), None)
    assert parsed.analyses == specs
    assert parsed.compare_bundle_sha256 == "b" * 64


@pytest.mark.parametrize(
    "raw, message",
    [
        ({"name": "roc", "thresholds": [0.5]}, "roc takes no field 'thresholds'"),
        ({"name": "roc", "bands": [0.5, 0.2]}, "strictly increasing"),
        ({"name": "roc", "bands": [0.1] * 0 + list(range(101))}, "at most 100 numbers"),
        ({"name": "calibration", "bands": [1e400]}, "finite numbers"),
        ({"name": "margin", "bands": [-0.1, 0.1]}, "must be positive"),
        ({"name": "subgroups"}, "missing field 'variables'"),
        ({"name": "subgroups", "variables": []}, "between 1 and 10"),
        ({"name": "subgroups", "variables": [{"name": "a b"}]}, "schema feature name"),
        ({"name": "subgroups", "variables": [{"name": "sex"}, {"name": "sex"}]}, "named twice"),
        ({"name": "subgroups", "variables": [{"name": "age", "edges": [3, 3]}]}, "strictly increasing"),
        ({"name": "paired"}, "missing field 'compare_bundle_sha256'"),
        ({"name": "paired", "compare_bundle_sha256": "xyz"}, "malformed identifier"),
        ({"name": "paired", "compare_bundle_sha256": "a" * 64, "thresholds": [1, 2, 3]}, "at most two"),
    ],
)
def test_bad_specs_are_refused_on_parse(raw: dict, message: str) -> None:
    with pytest.raises(DocumentError, match=message):
        AnalysisSpec.from_dict(raw, "request.analyses[0]")


def test_an_analysis_named_twice_is_refused(cancer: Cancer) -> None:
    document = request_bytes(cancer, AnalysisSpec("roc"), AnalysisSpec("roc", bands=(0.5,)))
    with pytest.raises(DocumentError, match="named twice"):
        Request.from_bytes(document, None)


@pytest.fixture
def coordinator(cancer: Cancer, tmp_path: Path) -> dict[str, Path]:
    paths = {"bundle": tmp_path / "model.bundle", "compare": tmp_path / "compare.bundle", "store": tmp_path / "s.db"}
    paths["bundle"].write_bytes(cancer.bundle)
    paths["compare"].write_bytes(cancer.compare_bundle)
    paths["key"] = cancer.root / "coordinator" / "coordinator.key"
    return paths


def new_request(paths: dict[str, Path], out: Path, *flags: str) -> int:
    args = ["request", "new", "--store", str(paths["store"]), "--study-id", "bc", "--bundle", str(paths["bundle"])]
    return federation([*args, "--sign", str(paths["key"]), "--out", str(out), *flags])


def test_request_new_flags(coordinator: dict[str, Path], tmp_path: Path, capsys) -> None:
    out = tmp_path / "request.json"
    flags = ["--analyses", "confusion,roc,margin", "--subgroup", "mean_radius=12,15", "--roc-bands", "0.2,0.5,0.8"]
    flags += ["--thresholds", "0.4", "--margin-bands", "0.1,0.2", "--compare", str(coordinator["compare"])]
    assert new_request(coordinator, out, *flags) == 0
    request = Request.from_bytes(out.read_bytes(), None)
    specs = {a.name: a for a in request.analyses}
    assert list(specs) == ["confusion", "roc", "margin", "subgroups", "paired"]
    assert specs["roc"].bands == (0.2, 0.5, 0.8) and specs["margin"].bands == (0.1, 0.2)
    assert specs["confusion"].thresholds == (0.4,) and specs["margin"].thresholds == (0.4,)
    assert specs["subgroups"].subgroups == (SubgroupSpec("mean_radius", (12.0, 15.0)),)
    assert request.compare_bundle_sha256 == sha256_hex(coordinator["compare"].read_bytes())
    capsys.readouterr()
    assert new_request(coordinator, tmp_path / "r2.json", "--analyses", "everything") != 0
    assert "unknown analysis 'everything'" in capsys.readouterr().err
    assert new_request(coordinator, tmp_path / "r3.json", "--subgroup", "mean_radius") != 0
    assert "needs edges" in capsys.readouterr().err
    assert new_request(coordinator, tmp_path / "r4.json", "--analyses", "paired") != 0
    assert "--compare" in capsys.readouterr().err


def test_site_refuses_a_subgroup_its_policy_does_not_allow(cancer: Cancer, tmp_path: Path, capsys) -> None:
    folder = make_site(tmp_path, cancer.pub).root  # default allowed_subgroups: age_months, sex
    request = tmp_path / "request.json"
    spec = AnalysisSpec("subgroups", subgroups=(SubgroupSpec("mean_radius", (12.0,)),))
    request.write_bytes(request_bytes(cancer, AnalysisSpec("confusion"), spec))
    (tmp_path / "model.bundle").write_bytes(cancer.bundle)
    args = ["check", "--site-dir", str(folder), "--request", str(request), "--bundle", str(tmp_path / "model.bundle")]
    assert site_agent([*args, "--data", str(cancer.csv), "--mapping", str(cancer.mapping)]) == 2
    err = capsys.readouterr().err
    assert "subgroup variable 'mean_radius' is not allowed by this site's policy" in err


def test_check_shows_what_would_leave_and_records_nothing(cancer: Cancer, tmp_path: Path, capsys) -> None:
    folder = make_site(tmp_path, cancer.pub, min_cell_size=10).root
    request = tmp_path / "request.json"
    request.write_bytes(
        request_bytes(cancer, AnalysisSpec("confusion"), AnalysisSpec("roc"), AnalysisSpec("calibration"))
    )
    (tmp_path / "model.bundle").write_bytes(cancer.bundle)
    ledger_before = (folder / "ledger.jsonl").read_bytes()
    args = ["check", "--site-dir", str(folder), "--request", str(request), "--bundle", str(tmp_path / "model.bundle")]
    args += ["--data", str(cancer.csv), "--mapping", str(cancer.mapping)]
    assert site_agent(args) == 0
    text = capsys.readouterr().out
    assert "nothing was signed, sent or recorded" in text
    assert "records read                569" in text
    assert "Withheld by the site's rules (minimum cell size 10)" in text
    assert site_agent([*args, "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert report["signed"] is False and report["flow"]["read"] == 569
    release = report["release_unsigned"]
    assert "signature" not in release and release["results"]["roc"]["auc"] is not None
    tp_fn = release["results"]["confusion"][0]["cells"]
    for name in report["suppressed"]:  # every suppressed count really is hidden in the release
        if name.startswith("confusion[0]."):
            assert tp_fn[name.split(".")[1]] is None
    for band in release["results"]["roc"]["bands"]:
        assert all(v is None or v == 0 or v >= 10 for v in (band["positive"], band["negative"]))
    # statistics to the decimals of the coordinator's terminal summary (federation/summary.py): AUC and its SE 3,
    # O:E and calibration intercept 2; nothing to four decimals
    roc, calibration = release["results"]["roc"], release["results"]["calibration"]
    assert f"AUC {roc['auc']:.3f} (SE {roc['auc_se']:.3f})" in text
    assert f"{OBSERVED_EXPECTED} {calibration['observed_expected_ratio']:.2f}, " in text
    assert f"{CALIBRATION_INTERCEPT} {calibration['calibration_intercept']:.2f}, " in text
    assert not re.search(r"\d\.\d{4}", text), re.search(r"\S*\d\.\d{4}\S*", text).group(0)
    assert (folder / "ledger.jsonl").read_bytes() == ledger_before
    assert not any((folder / "releases").iterdir())


def test_paired_request_travels_over_flower_with_both_bundles(cancer: Cancer, coordinator, tmp_path: Path) -> None:
    out = tmp_path / "request.json"
    assert new_request(coordinator, out, "--analyses", "confusion,roc", "--compare", str(coordinator["compare"])) == 0
    site = make_site(tmp_path, cancer.pub)
    config = site.root / "site.toml"
    text = config.read_text().replace('# path = "data.csv"                 #', f'path = "{cancer.parquet}"  #')
    config.write_text(text.replace('# mapping = "mapping.toml"', f'mapping = "{cancer.mapping}"'))
    store = Store(coordinator["store"])
    store.enrol("site-a", (site.root / "site.pub").read_bytes(), "site.pub")
    store.close()
    # Without the second bundle the site refuses, and says why.
    outcomes: list = []
    alone = RoundConfig(coordinator["store"], out.read_bytes(), cancer.bundle, wait_for_sites_s=5, deadline_s=60)
    run_inprocess(make_server_app(alone, outcomes.extend), make_client_app(), [site.root])
    assert outcomes[0].status == "refused" and "comparison bundle is missing" in outcomes[0].reason
    outcomes.clear()
    both = RoundConfig(
        store_path=coordinator["store"],
        request_bytes=out.read_bytes(),
        bundle_bytes=cancer.bundle,
        compare_bundle_bytes=cancer.compare_bundle,
        wait_for_sites_s=5,
        deadline_s=120,
    )
    run_inprocess(make_server_app(both, outcomes.extend), make_client_app(), [site.root])
    assert [o.status for o in outcomes] == ["released"], outcomes
    store = Store(coordinator["store"])
    (stored,) = store.releases("bc")
    store.close()
    paired = stored.release.extra["paired"]
    # Each AUC is that of the model's released bands: scikit-learn on each record's band (ties within a band),
    # near the AUC of the individual scores.
    for key, scores in (("model", cancer.scores), ("compare", cancer.compare_scores)):
        bands = paired[f"{key}_bands"]
        assert all(b["positive"] is not None and b["negative"] is not None for b in bands)
        band_of = np.searchsorted([b["low"] for b in bands[1:]], scores, side="right")
        assert paired[f"auc_{key}"] == pytest.approx(roc_auc_score(cancer.outcome, band_of), abs=1e-12)
        assert paired[f"auc_{key}"] == pytest.approx(roc_auc_score(cancer.outcome, scores), abs=0.02)
    assert paired["compare_bundle_sha256"] == Request.from_bytes(out.read_bytes(), None).compare_bundle_sha256
