"""Bad input at every door: one clear line, a non-zero exit, nothing half-written, no record value leaked."""

from __future__ import annotations

import json
import sqlite3
from pathlib import Path

import pandas as pd
import pytest

from federation.cli import main as federation
from federation.protocol import load_private_key, write_keypair
from federation.protocol.bundle import pack_bundle
from federation.protocol.schema import Schema
from site_agent.cli import main as site_agent

from . import breast_cancer
from .test_offline_path import offline_round

SECRET = "zz-secret-value-4711"  # a record value that must never appear in any message


@pytest.fixture
def study(tmp_path: Path) -> breast_cancer.Study:
    return breast_cancer.build(tmp_path / "study")


@pytest.fixture
def ready(study, tmp_path):
    """A request, a site folder and the coordinator store, before any site has run."""
    store = tmp_path / "study.db"
    request = tmp_path / "request.json"
    args = ["request", "new", "--store", str(store), "--study-id", "bc-bad", "--bundle", str(study.bundle_path)]
    assert federation([*args, "--sign", str(study.coordinator_key), "--out", str(request)]) == 0
    site_dir = tmp_path / "site"
    assert (
        site_agent(["init", "--site-id", "site-a", "--trust", str(study.coordinator_pub), "--site-dir", str(site_dir)])
        == 0
    )
    assert site_agent(["model", "approve", str(study.bundle_path), "--site-dir", str(site_dir), "--by", "site IT"]) == 0
    return store, request, site_dir


def one_error_line(capsys: pytest.CaptureFixture[str], prog: str) -> str:
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1, err
    assert err[0].startswith(f"{prog}: error: ")
    assert "Traceback" not in err[0]
    return err[0]


def run_site(study, request, site_dir, data, out, mapping=None, bundle=None) -> int:
    args = ["run", "--site-dir", str(site_dir), "--request", str(request), "--bundle", str(bundle or study.bundle_path)]
    args += ["--data", str(data), "--out", str(out)]
    if mapping:
        args += ["--mapping", str(mapping)]
    return site_agent(args)


def ledger_events(site_dir: Path) -> list[dict]:
    return [json.loads(line) for line in (site_dir / "ledger.jsonl").read_text().splitlines()]


def test_tampered_bundle_byte_is_refused(study, ready, tmp_path, capsys):
    _, request, site_dir = ready
    data = bytearray(study.bundle_path.read_bytes())
    data[-20] ^= 0x01  # one bit in the signed body
    tampered = tmp_path / "tampered.bundle"
    tampered.write_bytes(bytes(data))
    out = tmp_path / "release.json"
    assert run_site(study, request, site_dir, study.site_csvs[0], out, bundle=tampered) == 2
    assert "signature does not verify" in one_error_line(capsys, "site-agent")
    assert not out.exists()
    events = ledger_events(site_dir)
    assert [e["event"] for e in events] == ["model_approval", "request_received", "refusal"]
    assert site_agent(["ledger", "verify", "--site-dir", str(site_dir)]) == 0


def test_bundle_signed_by_unpinned_key_is_refused(study, ready, tmp_path, capsys):
    _, request, site_dir = ready
    key, _ = write_keypair(tmp_path / "intruder", "coordinator")
    schema = Schema.from_toml(study.schema_path.read_text(), "schema")
    original = study.bundle_path.read_bytes()
    model = json.loads(original.split(b"\n", 3)[3])
    import base64

    forged = pack_bundle(
        model_bytes=base64.b64decode(model["model_b64"]),
        model_format="onnx",
        schema=schema,
        score_kind="probability",
        thresholds=[0.5],
        private_key=load_private_key(key),
    )
    path = tmp_path / "forged.bundle"
    path.write_bytes(forged)
    out = tmp_path / "release.json"
    assert run_site(study, request, site_dir, study.site_csvs[0], out, bundle=path) == 2
    assert "not pinned here" in one_error_line(capsys, "site-agent")
    assert not out.exists()


def test_release_from_unenrolled_site_and_duplicate_ingest(study, tmp_path, capsys):
    store, releases = offline_round(study, tmp_path, min_cell_size=10)
    before = sqlite3.connect(store).execute("SELECT COUNT(*) FROM releases").fetchone()[0]
    # The same release again: refused, store unchanged.
    capsys.readouterr()
    assert federation(["ingest", "--store", str(store), str(releases[0])]) == 2
    assert "already answered" in one_error_line(capsys, "federation")
    # A site that was never enrolled signs a release: refused.
    stranger = tmp_path / "stranger"
    assert (
        site_agent(
            ["init", "--site-id", "stranger", "--trust", str(study.coordinator_pub), "--site-dir", str(stranger)]
        )
        == 0
    )
    assert site_agent(["model", "approve", str(study.bundle_path), "--site-dir", str(stranger), "--by", "site IT"]) == 0
    out = tmp_path / "stranger.json"
    assert run_site(study, tmp_path / "request.json", stranger, study.site_csvs[0], out) == 0
    capsys.readouterr()
    assert federation(["ingest", "--store", str(store), str(out)]) == 2
    assert "not enrolled" in one_error_line(capsys, "federation")
    # A release claiming an enrolled site but signed with another key: refused.
    doc = json.loads(out.read_text())
    doc["site_id"] = "site-0"
    forged = tmp_path / "forged.json"
    forged.write_text(json.dumps(doc))
    assert federation(["ingest", "--store", str(store), str(forged)]) == 2
    assert "not the key enrolled for site 'site-0'" in one_error_line(capsys, "federation")
    # ... and naming the enrolled key's id does not help: the signature itself fails.
    doc["site_key_id"] = json.loads(releases[0].read_text())["site_key_id"]
    forged.write_text(json.dumps(doc))
    assert federation(["ingest", "--store", str(store), str(forged)]) == 2
    assert "signature does not verify" in one_error_line(capsys, "federation")
    # A batch with one bad file ingests nothing (all or none).
    assert federation(["ingest", "--store", str(store), str(out), str(releases[1])]) == 2
    one_error_line(capsys, "federation")
    after = sqlite3.connect(store).execute("SELECT COUNT(*) FROM releases").fetchone()[0]
    assert after == before == breast_cancer.N_SITES


def write_site_csv(study, tmp_path, change) -> Path:
    frame = pd.read_csv(study.site_csvs[0], dtype=str)
    change(frame)
    path = tmp_path / "bad.csv"
    frame.to_csv(path, index=False)
    return path


@pytest.mark.parametrize(
    "case, change, expected",
    [
        ("missing mapped column", lambda f: f.pop("mean_radius"), "not in the file's header"),
        (
            "non-numeric answer",
            lambda f: f.__setitem__("mean_texture", f["mean_texture"].where(f.index != 3, SECRET)),
            "not a number",
        ),
        (
            "outcome neither positive nor negative",
            lambda f: f.__setitem__("outcome", f["outcome"].where(f.index != 5, SECRET)),
            "neither positive nor negative",
        ),
    ],
)
def test_bad_data_is_one_line_and_leaks_no_value(study, ready, tmp_path, capsys, case, change, expected):
    _, request, site_dir = ready
    data = write_site_csv(study, tmp_path, change)
    out = tmp_path / "release.json"
    capsys.readouterr()
    assert run_site(study, request, site_dir, data, out) == 1, case
    line = one_error_line(capsys, "site-agent")
    assert expected in line
    assert SECRET not in line
    assert not out.exists()
    refusal = ledger_events(site_dir)[-1]
    assert refusal["event"] == "refusal"
    assert SECRET not in json.dumps(refusal)
    assert not list((site_dir / "releases").iterdir())


def test_out_of_range_values_are_excluded_and_counted(study, ready, tmp_path, capsys):
    _, request, site_dir = ready
    data = write_site_csv(
        study, tmp_path, lambda f: f.__setitem__("mean_area", f["mean_area"].where(f.index >= 12, "-3"))
    )
    out = tmp_path / "release.json"
    assert run_site(study, request, site_dir, data, out) == 0
    flow = json.loads(out.read_text())["flow"]
    assert flow["excluded"]["out_of_range"] == 12
    assert flow["read"] == flow["analysed"] + 12


def test_mapping_maps_local_names_and_codes(study, ready, tmp_path):
    _, request, site_dir = ready
    frame = pd.read_csv(study.site_csvs[0])
    frame = frame.rename(columns={"mean_radius": "RADIUS", "outcome": "dx"})
    frame["dx"] = frame["dx"].map({1: "malignant", 0: "benign"})
    data = tmp_path / "local.csv"
    frame.to_csv(data, index=False)
    mapping = tmp_path / "mapping.toml"
    mapping.write_text(
        '[outcome]\ncolumn = "dx"\npositive = ["malignant"]\nnegative = ["benign"]\n\n'
        '[features.mean_radius]\ncolumn = "RADIUS"\n'
    )
    out_mapped, out_plain = tmp_path / "mapped.json", tmp_path / "plain.json"
    assert run_site(study, request, site_dir, data, out_mapped, mapping=mapping) == 0
    other = tmp_path / "site2"
    assert (
        site_agent(["init", "--site-id", "site-b", "--trust", str(study.coordinator_pub), "--site-dir", str(other)])
        == 0
    )
    assert site_agent(["model", "approve", str(study.bundle_path), "--site-dir", str(other), "--by", "site IT"]) == 0
    assert run_site(study, request, other, study.site_csvs[0], out_plain) == 0
    mapped = json.loads(out_mapped.read_text())["results"]["confusion"]
    plain = json.loads(out_plain.read_text())["results"]["confusion"]
    assert mapped == plain


def test_second_answer_to_the_same_request_is_refused_by_the_site(study, ready, tmp_path, capsys):
    """The identical request again (a lost reply) gets the recorded release back, computed once; a different
    request reusing the request id is refused."""
    from dataclasses import replace

    from federation.protocol import Request

    _, request, site_dir = ready
    assert run_site(study, request, site_dir, study.site_csvs[0], tmp_path / "r1.json") == 0
    # Other data on the second run: if anything were recomputed, the release would differ.
    assert run_site(study, request, site_dir, study.site_csvs[1], tmp_path / "r2.json") == 0
    assert (tmp_path / "r2.json").read_bytes() == (tmp_path / "r1.json").read_bytes()
    said = capsys.readouterr().err
    assert "this request was answered before" in said and "the data and mapping given now were not used" in said
    events = [e["event"] for e in ledger_events(site_dir)]
    assert events == ["model_approval", "request_received", "release", "sent", "request_received", "sent"]
    check = ["check", "--site-dir", str(site_dir), "--request", str(request), "--bundle", str(study.bundle_path)]
    assert site_agent([*check, "--data", str(study.site_csvs[1])]) == 2
    assert "already answered" in one_error_line(capsys, "site-agent")
    parsed = Request.from_bytes(request.read_bytes(), None)
    key = load_private_key(study.coordinator_key)
    changed = replace(parsed, issued_at="2000-01-01T00:00:00+00:00").signed_bytes(key)
    other = tmp_path / "same-id-other-bytes.json"
    other.write_bytes(changed)
    assert run_site(study, other, site_dir, study.site_csvs[0], tmp_path / "r3.json") == 2
    assert "already answered" in one_error_line(capsys, "site-agent")
    assert not (tmp_path / "r3.json").exists()


def test_a_mapping_that_excludes_everyone_is_refused_before_signing(study, ready, tmp_path, capsys):
    """Issue: a release in which nothing was analysed. `check` and `run` both stop before anything is signed
    and name the mapping rule that excluded everyone, never a count or a value."""
    _, request, site_dir = ready
    frame = pd.read_csv(study.site_csvs[0])
    frame["outcome"] = ""  # the reference standard exported empty: every record lacks it
    data = tmp_path / "blank-outcome.csv"
    frame.to_csv(data, index=False)
    check = ["check", "--site-dir", str(site_dir), "--request", str(request), "--bundle", str(study.bundle_path)]
    assert site_agent([*check, "--data", str(data)]) == 1
    line = one_error_line(capsys, "site-agent")
    assert "excluded as missing_outcome, by the rule [outcome]: the reference-standard column is empty" in line
    assert "nothing could be released" in line
    assert run_site(study, request, site_dir, data, tmp_path / "release.json") == 1
    line = one_error_line(capsys, "site-agent")
    assert "[outcome]" in line and line.endswith("(tell the coordinator only: data could not be read)")
    assert not (tmp_path / "release.json").exists()
    last = ledger_events(site_dir)[-1]
    assert last["event"] == "refusal" and last["details"]["reason"] == "data could not be read"
    assert [e["event"] for e in ledger_events(site_dir)].count("release") == 0

    # A sign flipped in the export (every value below the schema's min): the same stop, naming the range rule.
    frame = pd.read_csv(study.site_csvs[0])
    frame["mean_radius"] = -frame["mean_radius"]  # below the schema's min = 0 for every record
    frame.to_csv(data, index=False)
    assert site_agent([*check, "--data", str(data)]) == 1
    # the rule names the feature and its column (found by following the site-IT guide: it said [features.*])
    assert "excluded as out_of_range, by the rule [features.mean_radius] (column 'mean_radius'): a value lies " in (
        one_error_line(capsys, "site-agent")
    )


def _drop_signature(text: str) -> str:
    doc = json.loads(text)
    del doc["signature"]
    return json.dumps(doc)


def _alter_study_id(text: str) -> str:
    doc = json.loads(text)
    doc["study_id"] = "bc-other"  # a signed field changed after signing
    return json.dumps(doc)


@pytest.mark.parametrize(
    "change, expected",
    [
        (lambda text: text[: len(text) // 2], "request: not a JSON document"),
        (_drop_signature, "request: missing field 'signature'"),
        (_alter_study_id, "request: signature does not verify"),
    ],
    ids=["cut short", "no signature", "altered after signing"],
)
def test_a_bad_request_file_is_named_on_the_terminal_and_not_in_what_travels(
    study, ready, tmp_path, capsys, change, expected
):
    """Issue: a refused request file said "request: ..." without saying which file. The site's terminal names the
    --request path; the line that may travel (the ledger's reason, the "tell the coordinator only" part) does not:
    a folder layout can name people, projects or hosts."""
    _, request, site_dir = ready
    folder = tmp_path / "exports-of-ward-seven"  # a path that must stay at the site
    folder.mkdir()
    bad = folder / "request-from-coordinator.json"
    bad.write_text(change(request.read_text()))  # the request `federation request new` wrote, spoiled here
    capsys.readouterr()
    out = tmp_path / "release.json"
    assert run_site(study, bad, site_dir, study.site_csvs[0], out) != 0
    local, sent = one_error_line(capsys, "site-agent").split(" (tell the coordinator only: ")
    assert f"{bad}: {expected}" in local
    assert sent.startswith("request not accepted: ") and folder.name not in sent
    refusal = ledger_events(site_dir)[-1]
    assert refusal["event"] == "refusal" and refusal["details"]["reason"] == sent.removesuffix(")")
    assert folder.name not in (site_dir / "ledger.jsonl").read_text()
    assert not out.exists()
    check = ["check", "--site-dir", str(site_dir), "--request", str(bad), "--bundle", str(study.bundle_path)]
    assert site_agent([*check, "--data", str(study.site_csvs[0])]) != 0
    assert f"{bad}: {expected}" in one_error_line(capsys, "site-agent")
