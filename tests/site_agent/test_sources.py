"""The same records from CSV, Parquet, SQLite and PostgreSQL give the same tables, whatever the chunk size,
and the tables equal scikit-learn's metrics on the pooled records (breast-cancer data shipped with
scikit-learn; scores straight from onnxruntime)."""

from __future__ import annotations

import numpy as np
import pytest
from sklearn.metrics import cohen_kappa_score, confusion_matrix, roc_auc_score

from federation.protocol import AnalysisSpec
from federation.protocol.documents import SubgroupSpec
from site_agent.runner import preview_request
from site_agent.sources import SourceSpec

from .conftest import Cancer, make_site, request_bytes

ANALYSES = (
    AnalysisSpec("confusion", (0.3, 0.5)),
    AnalysisSpec("roc"),
    AnalysisSpec("calibration"),
    AnalysisSpec("margin"),
    AnalysisSpec("agreement"),
    AnalysisSpec("subgroups", subgroups=(SubgroupSpec("mean_radius", (12.0, 15.0)),)),
)


def tables(cancer: Cancer, tmp_path, source: SourceSpec, chunk_rows: int = 10_000, paired: bool = False) -> dict:
    """What the release would carry (flow and results), computed by the site's real path without signing."""
    site = make_site(tmp_path, cancer.pub, allowed_subgroups=["mean_radius"])
    analyses = ANALYSES + (
        (AnalysisSpec("paired", compare_bundle_sha256=_sha(cancer.compare_bundle)),) if paired else ()
    )
    preview = preview_request(
        site,
        request_bytes(cancer, *analyses),
        cancer.bundle,
        source,
        cancer.mapping,
        chunk_rows,
        compare_bundle_bytes=cancer.compare_bundle if paired else None,
    )
    body = preview.release.body()
    return {"flow": body["flow"], "results": body["results"]}


def _sha(data: bytes) -> str:
    from federation.protocol import sha256_hex

    return sha256_hex(data)


@pytest.fixture(scope="module")
def from_csv(cancer: Cancer, tmp_path_factory: pytest.TempPathFactory) -> dict:
    return tables(cancer, tmp_path_factory.mktemp("csv"), SourceSpec(path=cancer.csv))


def test_csv_tables_equal_scikit_learn(cancer: Cancer, from_csv: dict) -> None:
    flow = from_csv["flow"]
    assert flow["read"] == flow["analysed"] == 569  # load_breast_cancer: 569 records
    assert (flow["analysed_positive"], flow["analysed_negative"]) == (212, 357)  # 212 malignant, 357 benign
    assert flow["excluded"] == {r: 0 for r in flow["excluded"]} and "duplicate_id" in flow["excluded"]
    results = from_csv["results"]
    for table in results["confusion"]:
        called = (cancer.scores >= table["threshold"]).astype(int)
        tn, fp, fn, tp = confusion_matrix(cancer.outcome, called, labels=[0, 1]).ravel()  # scikit-learn
        assert table["cells"] == {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
    bands = results["roc"]["bands"]
    # the AUC of the released bands (records in one band tied): scikit-learn on the band of each record
    band_of = np.searchsorted([np.inf if b["high"] is None else b["high"] for b in bands], cancer.scores, side="right")
    assert results["roc"]["auc"] == pytest.approx(roc_auc_score(cancer.outcome, band_of), abs=1e-12)
    assert sum(b["positive"] for b in bands) == 212 and sum(b["negative"] for b in bands) == 357
    for band in bands:  # each band's counts, recounted with numpy from onnxruntime's scores
        low = -np.inf if band["low"] is None else band["low"]
        high = np.inf if band["high"] is None else band["high"]
        inside = (cancer.scores >= low) & (cancer.scores < high)
        assert band["positive"] == int(np.sum(inside & (cancer.outcome == 1)))
        assert band["negative"] == int(np.sum(inside & (cancer.outcome == 0)))
    calibration = results["calibration"]
    assert calibration["observed"] == 212
    middle = [((b["low"] or 0.0) + (1.0 if b["high"] is None else b["high"])) / 2 for b in calibration["bands"]]
    expected = sum(b["n"] * m for b, m in zip(calibration["bands"], middle, strict=True))  # each bin at its midpoint
    assert calibration["expected"] == pytest.approx(expected, rel=1e-12)
    table = results["agreement"]["tables"][0]
    agreement = table["pairs"]
    called = (cancer.scores >= table["threshold"]).astype(int)
    assert agreement["model_reference"]["kappa"] == pytest.approx(cohen_kappa_score(called, cancer.outcome), abs=1e-12)
    assert agreement["reference_reference2"]["kappa"] == pytest.approx(
        cohen_kappa_score(cancer.outcome, cancer.second), abs=1e-12
    )
    levels = results["subgroups"]["variables"][0]["levels"]
    radius = cancer.features[:, 0]
    for level, (low, high) in zip(levels, [(-np.inf, 12), (12, 15), (15, np.inf)], strict=True):
        inside = (radius >= low) & (radius < high)
        assert level["analysed_positive"] == int(np.sum(inside & (cancer.outcome == 1)))
        called = (cancer.scores[inside] >= 0.5).astype(int)
        tn, fp, fn, tp = confusion_matrix(cancer.outcome[inside], called, labels=[0, 1]).ravel()
        assert level["confusion"][1]["cells"] == {"tp": tp, "fp": fp, "fn": fn, "tn": tn}


@pytest.mark.parametrize("kind", ["parquet", "sqlite-table", "sqlite-query", "postgres-table", "postgres-query"])
def test_every_source_gives_the_same_tables(cancer: Cancer, from_csv: dict, postgres, tmp_path, kind: str) -> None:
    sources = {
        "parquet": SourceSpec(path=cancer.parquet),
        "sqlite-table": SourceSpec(url=f"sqlite:///{cancer.sqlite}", table="records"),
        "sqlite-query": SourceSpec(url=f"sqlite:///{cancer.sqlite}", query="SELECT * FROM records -- all of them\n;"),
        "postgres-table": SourceSpec(url=postgres.url, table="records"),
        "postgres-query": SourceSpec(
            url=postgres.url, query="SELECT * FROM records WHERE diagnosis LIKE '%' ORDER BY record_id"
        ),
    }
    assert tables(cancer, tmp_path, sources[kind]) == from_csv


@pytest.mark.parametrize("chunk_rows", [1, 7, 10_000])
def test_chunk_size_does_not_change_the_tables(cancer: Cancer, from_csv: dict, tmp_path, chunk_rows: int) -> None:
    assert tables(cancer, tmp_path, SourceSpec(path=cancer.csv), chunk_rows) == from_csv


def test_chunk_size_does_not_change_parquet_or_postgres(cancer: Cancer, from_csv: dict, postgres, tmp_path) -> None:
    assert tables(cancer, tmp_path, SourceSpec(path=cancer.parquet), 7) == from_csv
    assert tables(cancer, tmp_path, SourceSpec(url=postgres.url, table="records"), 7) == from_csv


def test_paired_tables_are_the_same_from_parquet_and_postgres(cancer: Cancer, postgres, tmp_path) -> None:
    first = tables(cancer, tmp_path, SourceSpec(path=cancer.parquet), paired=True)
    second = tables(cancer, tmp_path, SourceSpec(url=postgres.url, table="records"), 13, paired=True)
    assert first == second
    paired = first["results"]["paired"]
    model = cancer.scores >= 0.5
    other = cancer.compare_scores >= 0.5
    diseased = cancer.outcome == 1
    for a, own in ((1, model), (0, ~model)):
        for b, theirs in ((1, other), (0, ~other)):
            assert paired["diseased"][f"model{a}_compare{b}"] == int(np.sum(own & theirs & diseased))
            assert paired["non_diseased"][f"model{a}_compare{b}"] == int(np.sum(own & theirs & ~diseased))
    # the comparison model's AUC is that of its released bands: scikit-learn on each record's band
    bands = paired["compare_bands"]
    assert all(b["positive"] is not None and b["negative"] is not None for b in bands)
    band_of = np.searchsorted([b["low"] for b in bands[1:]], cancer.compare_scores, side="right")
    assert paired["auc_compare"] == pytest.approx(roc_auc_score(cancer.outcome, band_of), abs=1e-12)


def test_site_toml_can_point_at_a_database(cancer: Cancer, tmp_path) -> None:
    """`site-agent run` with no --data reads [data] url + table from site.toml (SQLite, read-only)."""
    from federation.protocol import Release
    from site_agent.cli import main as site_agent
    from site_agent.config import load_site

    site = make_site(tmp_path, cancer.pub)
    config = site.root / "site.toml"
    text = config.read_text().replace('# url = "postgresql', 'url = "postgresql').replace("# table = ", "table = ")
    text = text.replace("postgresql+psycopg://reader@dbhost/clinic", f"sqlite:///{cancer.sqlite}")
    text = text.replace('table = "screening_export"', 'table = "records"')
    config.write_text(text.replace('# mapping = "mapping.toml"', f'mapping = "{cancer.mapping}"'))
    assert load_site(site.root).source().describe() == f"sqlite:///{cancer.sqlite} table records"
    (tmp_path / "request.json").write_bytes(request_bytes(cancer, AnalysisSpec("confusion")))
    (tmp_path / "model.bundle").write_bytes(cancer.bundle)
    args = ["run", "--site-dir", str(site.root), "--request", str(tmp_path / "request.json")]
    args += ["--bundle", str(tmp_path / "model.bundle"), "--out", str(tmp_path / "release.json")]
    assert site_agent(args) == 0
    release = Release.from_bytes((tmp_path / "release.json").read_bytes())
    tn, fp, fn, tp = confusion_matrix(cancer.outcome, (cancer.scores >= 0.5).astype(int)).ravel()  # scikit-learn
    assert release.confusion[0].cells == {"tp": tp, "fp": fp, "fn": fn, "tn": tn}
    config.write_text(config.read_text().replace("# query = ", "query = "))  # table and query: which one?
    from federation.protocol import DocumentError

    with pytest.raises(DocumentError, match="exactly one of table or query"):
        load_site(site.root)
