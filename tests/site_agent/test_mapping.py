"""Mapping files: codes, unit conversion, duplicate ids, the schema's missing-answer policy, suggestions."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import confusion_matrix

from federation.modelpack import bundle_from_sklearn
from federation.protocol import AnalysisSpec, DocumentError, Request, Schema, sha256_hex
from simulations.consortium import write_consortium
from site_agent.cli import main as site_agent
from site_agent.mapping import load_mapping, suggest_mapping
from site_agent.preview import sample_values
from site_agent.runner import preview_request
from site_agent.sources import SourceSpec

from .conftest import Cancer, make_site, onnx_scores, request_bytes, schema_names


def preview(cancer: Cancer, tmp_path: Path, data: Path, chunk_rows: int = 10_000, bundle: bytes | None = None):
    site = make_site(tmp_path, cancer.pub)
    bundle = bundle or cancer.bundle
    request = Request("bc", "r1", sha256_hex(bundle), (AnalysisSpec("confusion"), AnalysisSpec("roc")), "2026")
    return preview_request(
        site, request.signed_bytes(cancer.key), bundle, SourceSpec(path=data), cancer.mapping, chunk_rows
    )


@pytest.mark.parametrize("chunk_rows", [1, 7, 10_000])
def test_duplicate_ids_are_excluded_after_the_first(cancer: Cancer, tmp_path: Path, chunk_rows: int) -> None:
    repeats = cancer.frame.iloc[[3, 3, 40, 200]].copy()
    repeats.loc[:, "diagnosis"] = "B"  # a later copy may even disagree: it is still a duplicate
    blank_ids = cancer.frame.iloc[[5, 6]].copy()
    blank_ids.loc[:, "record_id"] = ""  # a missing id is never a duplicate
    frame = pd.concat([cancer.frame, repeats, blank_ids], ignore_index=True)
    frame.to_csv(tmp_path / "duplicates.csv", index=False)
    result = preview(cancer, tmp_path, tmp_path / "duplicates.csv", chunk_rows).release
    assert result.flow["read"] == 575
    assert result.flow["excluded"]["duplicate_id"] == 4
    assert result.flow["analysed"] == 571
    assert result.flow["analysed_positive"] == 212 + int(cancer.outcome[[5, 6]].sum())


@pytest.mark.parametrize("policy", ["exclude", "score as 0"])
def test_missing_answer_policy_from_the_schema(cancer: Cancer, tmp_path: Path, policy: str) -> None:
    blanks = np.arange(0, 569, 37)  # 16 records without a "mean texture"
    frame = cancer.frame.copy()
    frame["mean texture"] = frame["mean texture"].astype(object)
    frame.loc[blanks, "mean texture"] = "NA"
    frame.to_csv(tmp_path / "blanks.csv", index=False)
    names = schema_names()
    schema_text = cancer.schema_text
    if policy == "score as 0":
        schema_text = schema_text.replace(
            f'name = "{names[1]}"\ntype = "float"\nmin = 0\n',
            f'name = "{names[1]}"\ntype = "float"\nmin = 0\nmissing = 0\n',
        )
    bundle = bundle_from_sklearn(cancer.model, Schema.from_toml(schema_text, "schema"), cancer.key, 0.5)
    result = preview(cancer, tmp_path, tmp_path / "blanks.csv", bundle=bundle).release
    if policy == "exclude":
        assert result.flow["excluded"]["missing_feature"] == len(blanks)
        keep = np.setdiff1d(np.arange(569), blanks)
        x, y = cancer.features[keep], cancer.outcome[keep]
    else:
        assert result.flow["excluded"]["missing_feature"] == 0
        x, y = cancer.features.copy(), cancer.outcome
        x[blanks, 1] = 0.0  # what the schema says a missing answer counts as
    scores = onnx_scores(cancer.model, x)
    tn, fp, fn, tp = confusion_matrix(y, (scores >= 0.5).astype(int)).ravel()  # scikit-learn
    assert result.confusion[0].cells == {"tp": tp, "fp": fp, "fn": fn, "tn": tn}


@pytest.fixture(scope="module")
def consortium(tmp_path_factory: pytest.TempPathFactory):
    return write_consortium(tmp_path_factory.mktemp("demo"), seed=2026)


def test_codes_and_unit_conversion_mean_what_they_say(consortium, tmp_path: Path) -> None:
    """A site in years with sex coded 2/1 gives the same records as the same site written in months and words."""
    schema = Schema.from_toml(consortium.schema_path.read_text(), "schema")
    site = next(s for s in consortium.sites if s.site_id == "quillbrook-community")
    mapping = load_mapping(site.mapping_path, schema)
    assert mapping.features["age_months"].multiply == 12.0
    assert mapping.features["sex"].codes == {"2": "female", "1": "male"}
    frame = pd.read_csv(site.data_path, dtype=str, keep_default_na=False)
    years = pd.to_numeric(frame["age_years"], errors="coerce")
    frame["age_years"] = np.where(years.notna(), (years * 12).round().astype("Int64").astype(str), frame["age_years"])
    frame["sex"] = frame["sex"].map({"2": "female", "1": "male"}).fillna(frame["sex"])
    frame.to_csv(tmp_path / "months.csv", index=False)
    plain = site.mapping_path.read_text().replace("multiply = 12\n", "")
    plain = plain.replace('codes = { "2" = "female", "1" = "male" }', "")
    (tmp_path / "plain.toml").write_text(plain)
    from site_agent.analyses import Flow
    from site_agent.data import IdTracker, prepare_chunk
    from site_agent.sources import read_chunks

    def analysed(data: Path, mapping_path: Path) -> tuple[np.ndarray, dict]:
        mapping = load_mapping(mapping_path, schema)
        chunks = [
            prepare_chunk(batch, schema, mapping, str(data), IdTracker())
            for batch in read_chunks(SourceSpec(path=data), mapping.columns_needed(), 97)
        ]
        flow = Flow()
        for piece in chunks:
            flow.add(piece, np.zeros(len(piece)))
        return np.concatenate([c.inputs for c in chunks]), dict(flow.excluded)

    first, second = (
        analysed(site.data_path, site.mapping_path),
        analysed(tmp_path / "months.csv", tmp_path / "plain.toml"),
    )
    assert np.array_equal(first[0], second[0])
    assert first[1] == second[1]


def test_mapping_file_errors_name_the_entry(cancer: Cancer, tmp_path: Path) -> None:
    schema = Schema.from_toml(cancer.schema_text, "schema")
    bad = {
        '[outcome]\ncolumn = "d"\npositive = ["M"]\nnegative = ["M"]\n': "both positive and negative",
        '[reference2]\ncolumn = "r"\nwhatever = 1\n': "unknown entry",
        "[id]\n": "column must be a column name",
        '[features.nothing]\ncolumn = "x"\n': "not a feature of the model's schema",
        '[features.mean_radius]\ncodes = { "a" = "b" }\n': "must map to numbers",
        '[features.mean_radius]\nmultiply = "twelve"\n': "finite number",
        "surprise = 1\n": "unknown top-level entry",
        # found by following the site-IT guide: both were taken silently, the first reading every "no" as missing
        'missing = ["", "no"]\n[outcome]\ncolumn = "d"\npositive = ["yes"]\nnegative = ["no"]\n': (
            r"\[outcome\]: a value listed under positive or negative is also listed under missing"
        ),
        '[features.mean_radius]\ncodes = { "1" = "1", "1 " = "2" }\n': "the same once leading and trailing spaces",
    }
    for text, message in bad.items():
        (tmp_path / "m.toml").write_text(text)
        with pytest.raises(DocumentError, match=message):
            load_mapping(tmp_path / "m.toml", schema)


def test_suggestions_find_every_demo_site_column(consortium) -> None:
    """Against the consortium's own mapping files: columns, units and reference standard are all found."""
    schema = Schema.from_toml(consortium.schema_path.read_text(), "schema")
    for site in consortium.sites:
        text, _ = suggest_mapping(sample_values(SourceSpec(path=site.data_path), 5000), schema)
        suggested, truth = tomllib.loads(text), tomllib.loads(site.mapping_path.read_text())
        assert suggested["outcome"]["column"] == truth["outcome"]["column"], site.site_id
        for name in schema.names:
            expected = truth.get("features", {}).get(name, {})
            assert suggested["features"][name]["column"] == expected.get("column", name), (site.site_id, name)
            assert suggested["features"][name].get("multiply") == expected.get("multiply"), (site.site_id, name)
        codes = suggested["features"]["sex"].get("codes")
        if codes:  # letters are matched; numeric codes are never guessed
            assert all(truth["features"]["sex"]["codes"][k] == v for k, v in codes.items())
        if set(suggested["outcome"]["positive"]) <= set(truth["outcome"]["positive"]) and suggested["outcome"][
            "positive"
        ] != ["1"]:
            assert suggested["outcome"]["negative"] == truth["outcome"]["negative"]


def test_map_suggest_command_writes_a_file_that_runs_once_confirmed(cancer: Cancer, tmp_path: Path, capsys) -> None:
    schema_path = tmp_path / "schema.toml"
    schema_path.write_text(cancer.schema_text)
    out = tmp_path / "suggested.toml"
    args = ["map", "suggest", "--data", str(cancer.parquet), "--schema", str(schema_path), "--out", str(out)]
    assert site_agent(args) == 0
    assert "reference standard 'diagnosis'" in capsys.readouterr().out  # M/B are not guessed: a person says
    suggested = tomllib.loads(out.read_text())
    for name, column in zip(schema_names(), cancer.frame.columns[1:31], strict=True):
        assert suggested["features"][name]["column"] == column
    assert site_agent(args) != 0  # never overwrites
    assert "refusing to overwrite" in capsys.readouterr().err
    confirmed = (
        out.read_text().replace('positive = ["1"]', 'positive = ["M"]').replace('negative = ["0"]', 'negative = ["B"]')
    )
    out.write_text(confirmed)
    mapping = load_mapping(out, Schema.from_toml(cancer.schema_text, "schema"))
    assert mapping.outcome_column == "diagnosis" and mapping.id_column == "record_id"
    site = make_site(tmp_path, cancer.pub)
    result = preview_request(
        site, request_bytes(cancer, AnalysisSpec("confusion")), cancer.bundle, SourceSpec(path=cancer.csv), out
    ).release
    assert result.flow["analysed"] == 569
