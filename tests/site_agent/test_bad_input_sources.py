"""Bad input at the site's data door: each case is one clear line and a non-zero exit, or a counted
exclusion; never a traceback, and never a record's value in the message."""

from __future__ import annotations

import json
import shutil
from pathlib import Path

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from federation.modelpack import pack_model
from federation.protocol import (
    AnalysisSpec,
    DataValidationError,
    Request,
    Schema,
    load_private_key,
    sha256_hex,
    write_keypair,
)
from simulations.consortium import SCHEMA_TOML, write_consortium
from site_agent.cli import main as site_agent
from site_agent.sources import SourceSpec, check_select, read_chunks

from .conftest import Cancer, make_site, request_bytes

SECRET = "zz-secret-4711"  # a record value that must never appear in any message


@pytest.fixture
def site(cancer: Cancer, tmp_path: Path) -> tuple[Path, Path, Path]:
    folder = make_site(tmp_path, cancer.pub).root
    request = tmp_path / "request.json"
    request.write_bytes(request_bytes(cancer, AnalysisSpec("confusion"), AnalysisSpec("roc")))
    bundle = tmp_path / "model.bundle"
    bundle.write_bytes(cancer.bundle)
    return folder, request, bundle


def check(site: tuple[Path, Path, Path], data: str, mapping: Path | None, *extra: str) -> list[str]:
    folder, request, bundle = site
    args = ["check", "--site-dir", str(folder), "--request", str(request), "--bundle", str(bundle), "--data", data]
    return args + (["--mapping", str(mapping)] if mapping else []) + list(extra)


def refused(capsys: pytest.CaptureFixture[str], args: list[str], needle: str) -> str:
    code = site_agent(args)
    captured = capsys.readouterr()
    lines = captured.err.strip().splitlines()
    assert code != 0, captured.out
    assert len(lines) == 1, lines
    assert lines[0].startswith("site-agent: error: ") and "Traceback" not in lines[0]
    assert needle in lines[0], lines[0]
    assert SECRET not in captured.err + captured.out
    return lines[0]


def test_empty_file(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    (tmp_path / "empty.csv").write_bytes(b"")
    refused(capsys, check(site, str(tmp_path / "empty.csv"), cancer.mapping), "the file is empty")


def test_header_only(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    header = cancer.csv.read_text().splitlines()[0]
    (tmp_path / "header.csv").write_text(header + "\n")
    refused(capsys, check(site, str(tmp_path / "header.csv"), cancer.mapping), "header but no records")


def test_wrong_delimiter(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    cancer.frame.to_csv(tmp_path / "semicolons.csv", sep=";", index=False)
    refused(capsys, check(site, str(tmp_path / "semicolons.csv"), cancer.mapping), "must be comma-separated")


def test_non_utf8_bytes(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    text = cancer.csv.read_bytes().replace(b"R0100,", b"R0100\xff\xfe" + SECRET.encode() + b",", 1)
    (tmp_path / "latin.csv").write_bytes(text)
    refused(capsys, check(site, str(tmp_path / "latin.csv"), cancer.mapping), "not UTF-8")


def test_row_with_extra_field_is_not_quoted(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    lines = cancer.csv.read_text().splitlines()
    lines[50] += f",{SECRET}"
    (tmp_path / "ragged.csv").write_text("\n".join(lines) + "\n")
    refused(capsys, check(site, str(tmp_path / "ragged.csv"), cancer.mapping), "different number of fields")


def test_text_in_a_numeric_column(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    frame = cancer.frame.copy()
    frame["mean radius"] = frame["mean radius"].astype(object)
    frame.loc[17, "mean radius"] = SECRET  # mixed types: numbers and text
    frame.to_csv(tmp_path / "mixed.csv", index=False)
    message = refused(capsys, check(site, str(tmp_path / "mixed.csv"), cancer.mapping), "not a number")
    assert "'mean radius'" in message  # names the column, not the value


def test_unlisted_outcome_code(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    frame = cancer.frame.copy()
    frame.loc[3, "diagnosis"] = SECRET
    frame.to_csv(tmp_path / "outcome.csv", index=False)
    refused(capsys, check(site, str(tmp_path / "outcome.csv"), cancer.mapping), "neither positive nor negative")


def test_garbage_named_parquet(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    shutil.copy(cancer.csv, tmp_path / "records.parquet")
    refused(capsys, check(site, str(tmp_path / "records.parquet"), cancer.mapping), "not a readable Parquet file")


def test_column_of_all_missing_values_stops_before_anything_is_signed(
    site, cancer: Cancer, tmp_path: Path, capsys
) -> None:
    """An input exported empty excludes every record: nothing could be released, so `check` (and `run`) stop
    and name the mapping rule behind the exclusions (issue: the site side is hard to get wrong)."""
    frame = cancer.frame.copy()
    frame["mean texture"] = ""
    frame.to_csv(tmp_path / "blank.csv", index=False)
    message = refused(
        capsys,
        check(site, str(tmp_path / "blank.csv"), cancer.mapping, "--json"),
        "most were excluded as missing_feature, by the rule [features.mean_texture] (column 'mean texture'): a "
        "required input's column is empty",
    )
    assert "fewer records were analysed than the minimum cell size" in message and "569" not in message


def test_sql_url_that_cannot_connect(site, cancer: Cancer, capsys) -> None:
    args = check(site, "postgresql+psycopg://reader:pw@127.0.0.1:1/clinic", cancer.mapping, "--table", "records")
    message = refused(capsys, args, "cannot connect")
    assert "pw@" not in message  # the password is never shown
    args = check(site, "sqlite:////nonexistent/records.db", cancer.mapping, "--table", "records")
    refused(capsys, args, "cannot connect")
    args = check(site, "mysql://reader@127.0.0.1/clinic", cancer.mapping, "--table", "records")
    refused(capsys, args, "not supported")


@pytest.mark.parametrize(
    "query",
    [
        "DELETE FROM records",
        "SELECT * FROM records; DROP TABLE records",
        "WITH gone AS (DELETE FROM records RETURNING *) SELECT * FROM gone",
        "SELECT * INTO copied FROM records",
        "UPDATE records SET diagnosis = 'B'",
        "SELECT $$x$$ AS y",
        "SELECT * FROM records /* unterminated",
        "   ",
    ],
)
def test_select_that_is_not_read_only(site, cancer: Cancer, capsys, query: str) -> None:
    args = check(site, f"sqlite:///{cancer.sqlite}", cancer.mapping, "--query", query)
    refused(capsys, args, "query")


def test_lexical_check_ignores_words_inside_literals_and_comments() -> None:
    query = "SELECT \"delete\", 'drop table x; insert' AS note -- update\nFROM records;"
    assert check_select(query) == query.strip().rstrip(";")


def test_read_only_connection_refuses_a_writing_function(cancer: Cancer, postgres, site, capsys) -> None:
    # nextval() writes (it advances a sequence) and passes a lexical check; the read-only session refuses it.
    args = check(site, postgres.url, cancer.mapping, "--query", "SELECT nextval('counter') AS n, * FROM records")
    refused(capsys, args, "read-only")
    sqlite_query = "SELECT * FROM records WHERE 1 = 1"
    assert (
        sum(b.num_rows for b in read_chunks(SourceSpec(url=f"sqlite:///{cancer.sqlite}", query=sqlite_query), None))
        == 569
    )


def test_missing_table_and_column(cancer: Cancer, postgres, site, capsys) -> None:
    refused(capsys, check(site, postgres.url, cancer.mapping, "--table", "nothing_here"), "table does not exist")
    query = "SELECT record_id, diagnosis FROM records"
    refused(capsys, check(site, postgres.url, cancer.mapping, "--query", query), "not in the query result")


@pytest.fixture(scope="module")
def demo_site_data(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, Path]:
    """One site of the invented demo consortium (it has ages in months): data and mapping."""
    consortium = write_consortium(tmp_path_factory.mktemp("demo"), seed=2026)
    site = next(s for s in consortium.sites if s.site_id == "northvale-community")
    return site.data_path, site.mapping_path


def test_negative_age_is_a_counted_exclusion(demo_site_data, tmp_path: Path, capsys) -> None:
    data_path, mapping_path = demo_site_data
    key_path, pub = write_keypair(tmp_path / "coordinator", "coordinator")
    key = load_private_key(key_path)
    scorecard = json.dumps({"format": "scorecard", "kind": "points", "points": {"item_01": {"1": 1, "2": 2, "3": 3}}})
    bundle = pack_model(scorecard.encode(), "scorecard", Schema.from_toml(SCHEMA_TOML, "schema"), key, [2.0])
    request = Request("demo", "r1", sha256_hex(bundle), (AnalysisSpec("confusion"),), "2026-01-01T00:00:00+00:00")
    (tmp_path / "request.json").write_bytes(request.signed_bytes(key))
    (tmp_path / "model.bundle").write_bytes(bundle)
    folder = make_site(tmp_path, pub).root
    frame = pd.read_csv(data_path, dtype=str, keep_default_na=False)
    valid = (frame["age_m"].str.fullmatch(r"\d+")) & frame["gender"].isin(["F", "M"]) & frame["dx"].isin(["yes", "no"])
    valid &= np.all([frame[f"Q{j}"].isin(["0", "1", "2", "3"]) for j in range(1, 11)], axis=0)
    row = int(np.flatnonzero(valid.to_numpy())[0])

    def flow_of(path: Path) -> dict:
        args = ["check", "--site-dir", str(folder), "--request", str(tmp_path / "request.json")]
        args += ["--bundle", str(tmp_path / "model.bundle"), "--data", str(path), "--mapping", str(mapping_path)]
        assert site_agent([*args, "--json"]) == 0
        return json.loads(capsys.readouterr().out)["flow"]

    before = flow_of(data_path)
    frame.loc[row, "age_m"] = "-3"
    frame.to_csv(tmp_path / "negative-age.csv", index=False)
    after = flow_of(tmp_path / "negative-age.csv")
    assert after["excluded"]["out_of_range"] == before["excluded"]["out_of_range"] + 1
    assert after["analysed"] == before["analysed"] - 1
    assert after["read"] == before["read"] == len(frame)


def test_sources_refuse_what_is_not_a_source(tmp_path: Path) -> None:
    with pytest.raises(DataValidationError, match="not both or neither"):
        SourceSpec()
    with pytest.raises(DataValidationError, match="exactly one of table or query"):
        SourceSpec(url="sqlite:///x.db")
    with pytest.raises(DataValidationError, match="data file not found"):
        list(read_chunks(SourceSpec(path=tmp_path / "absent.csv"), None))


def test_a_repeated_column_name_is_named_with_its_positions(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    """Issue: "the header names a column twice" did not say which. A column's name is the export's header, not a
    record's value, so the site's terminal names it (a data refusal travels as its category alone)."""
    frame = cancer.frame.copy()  # scikit-learn's breast-cancer data, the site's own column names (conftest)
    names = list(frame.columns)
    names[names.index("worst texture")] = "mean texture"  # an export that labelled two columns alike
    frame.columns = names
    positions = [number for number, name in enumerate(names, start=1) if name == "mean texture"]
    assert positions == [3, 23]  # record_id, then the 30 features in scikit-learn's order
    path = tmp_path / "repeated.csv"
    frame.to_csv(path, index=False)
    message = refused(capsys, check(site, str(path), cancer.mapping), "column names must be unique")
    assert f"{path}: the header names column 'mean texture' twice (columns 3 and 23)" in message
    # Parquet: the columns the mapping reads (reading one of two alike would hand over both)
    table = pa.Table.from_arrays([pa.array(frame.iloc[:, i]) for i in range(len(names))], names=names)
    pq.write_table(table, tmp_path / "repeated.parquet")
    message = refused(capsys, check(site, str(tmp_path / "repeated.parquet"), cancer.mapping), "must be unique")
    assert "the file names column 'mean texture' twice (columns 3 and 23)" in message
    # a query that returns a column twice
    query = "SELECT *, diagnosis FROM records"
    message = refused(capsys, check(site, f"sqlite:///{cancer.sqlite}", cancer.mapping, "--query", query), "twice")
    assert "the query returns column 'diagnosis' twice (columns 32 and 34)" in message


def test_every_mapped_column_missing_from_the_header_is_named(site, cancer: Cancer, tmp_path: Path, capsys) -> None:
    frame = cancer.frame.drop(columns=["mean radius", "diagnosis"])  # scikit-learn's breast-cancer data (conftest)
    path = tmp_path / "short.csv"
    frame.to_csv(path, index=False)
    message = refused(capsys, check(site, str(path), cancer.mapping), "are not in the file's header")
    assert f"{path}: columns " in message
    assert "'mean radius'" in message and "'diagnosis'" in message
