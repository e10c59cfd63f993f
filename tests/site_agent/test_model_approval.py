"""The site's approval of each model bundle before its first use (policy ``require_model_approval``), played
through the command line: a scorecard and an ONNX model trained on scikit-learn's bundled breast-cancer
data (Wolberg et al., UCI)."""

from __future__ import annotations

import json
import uuid
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer
from sklearn.linear_model import LogisticRegression

from federation.modelpack import bundle_from_sklearn, pack_model
from federation.protocol import AnalysisSpec, Request, Schema, key_id, load_private_key, sha256_hex, write_keypair
from site_agent import ledger
from site_agent.cli import main as site_agent

NAMES = ("mean_radius", "mean_texture", "mean_perimeter")
SCHEMA = Schema.from_dict({"features": [{"name": n, "type": "float", "min": 0, "max": 500} for n in NAMES]})


@pytest.fixture()
def world(tmp_path: Path) -> dict:
    key_path, pub = write_keypair(tmp_path / "coordinator", "coordinator")
    key = load_private_key(key_path)
    data = load_breast_cancer()
    x, y = data.data[:, :3], 1 - data.target  # the condition screened for: malignancy (scikit-learn codes it 0)
    frame = pd.DataFrame(x, columns=NAMES)
    frame["outcome"] = y
    frame.to_csv(tmp_path / "records.csv", index=False)
    model = LogisticRegression(max_iter=5000).fit(x.astype(np.float32), y)
    onnx_bundle = tmp_path / "logistic.bundle"
    onnx_bundle.write_bytes(bundle_from_sklearn(model, SCHEMA, key, 0.5, name="radius-texture"))
    card = {"format": "scorecard", "kind": "points", "intercept": -3, "weights": {"mean_radius": 0.25}}
    card_bundle = tmp_path / "card.bundle"
    card_bundle.write_bytes(pack_model(json.dumps(card).encode(), "scorecard", SCHEMA, key, [1.0], "radius-points"))
    site = tmp_path / "site"
    assert site_agent(["init", "--site-id", "clinic-m", "--trust", str(pub), "--site-dir", str(site)]) == 0
    return {"root": tmp_path, "key": key, "site": site, "onnx": onnx_bundle, "card": card_bundle}


def request_for(world: dict, bundle: Path) -> Path:
    document = Request(
        study_id="study-m",
        request_id=uuid.uuid4().hex[:12],
        bundle_sha256=sha256_hex(bundle.read_bytes()),
        analyses=(AnalysisSpec("confusion"),),
        issued_at=datetime.now(UTC).replace(microsecond=0).isoformat(),
    ).signed_bytes(world["key"])
    path = world["root"] / f"request-{uuid.uuid4().hex[:6]}.json"
    path.write_bytes(document)
    return path


def run(world: dict, request: Path, bundle: Path) -> int:
    out = world["root"] / "release.json"
    return site_agent(
        ["run", "--site-dir", str(world["site"]), "--request", str(request), "--bundle", str(bundle)]
        + ["--data", str(world["root"] / "records.csv"), "--out", str(out)]
    )


def test_init_writes_model_approval_on(world: dict) -> None:
    text = (world["site"] / "site.toml").read_text()
    assert "\nrequire_model_approval = true\n" in text


def test_an_unapproved_model_is_refused_before_any_record_then_runs_once_approved(
    world: dict, capsys: pytest.CaptureFixture
) -> None:
    request = request_for(world, world["card"])
    assert run(world, request, world["card"]) == 2
    err = capsys.readouterr().err.strip()
    model_id = sha256_hex(world["card"].read_bytes())[:16]
    assert len(err.splitlines()) == 1
    assert f"model {model_id} is not approved by this site yet" in err
    assert f"site-agent model review {model_id} --site-dir {world['site']}" in err
    assert (world["site"] / "models" / f"{model_id}.bundle").read_bytes() == world["card"].read_bytes()
    refusal = [e for e in ledger.read_entries(world["site"] / "ledger.jsonl") if e["event"] == "refusal"][-1]
    assert refusal["details"]["reason"].startswith("model not approved by the site")
    assert refusal["details"]["error"] == "ModelNotApproved"

    # The review shows what the model is: inputs, kind, the scorecard's weights, threshold, signer.
    assert site_agent(["model", "review", "--site-dir", str(world["site"]), "--json"]) == 0
    (view,) = json.loads(capsys.readouterr().out)
    assert view["id"] == model_id and view["state"] == "not reviewed" and view["name"] == "radius-points"
    assert view["format"] == "scorecard" and view["thresholds"] == [1.0]
    assert view["scorecard"] == {"kind": "points", "intercept": -3, "weights": {"mean_radius": 0.25}, "points": {}}
    assert [i["name"] for i in view["inputs"]] == list(NAMES)
    assert view["score_range"] == [-3.0, -3.0 + 0.25 * 500]  # intercept + weight x [min, max] of mean_radius
    assert view["signed_by"] == key_id(world["key"].public_key())

    assert site_agent(["model", "approve", model_id, "--site-dir", str(world["site"]), "--by", "Dr. Reviewer"]) == 0
    capsys.readouterr()
    assert run(world, request, world["card"]) == 0  # the same request bytes, now answered
    release = json.loads((world["root"] / "release.json").read_bytes())
    cells = release["results"]["confusion"][0]["cells"]
    # By hand: score = -3 + 0.25 * mean_radius >= 1  <=>  mean_radius >= 16 (scikit-learn's data, counted here).
    data = load_breast_cancer()
    positive = data.data[:, 0] >= 16
    malignant = data.target == 0
    assert cells["tp"] == int((positive & malignant).sum()) == 135
    assert cells["fn"] == int((~positive & malignant).sum())
    # fp = 6 < the minimum cell size 10: withheld, and tn with it (fp + tn is the released negatives' total)
    assert int((positive & ~malignant).sum()) == 6 and cells["fp"] is None and cells["tn"] is None
    events = [e["event"] for e in ledger.read_entries(world["site"] / "ledger.jsonl")]
    assert events.count("model_approval") == 1 and events.count("release") == 1
    counted = ledger.counted_requests(world["site"] / "ledger.jsonl", "study-m")
    assert len(counted) == 1  # the refusal and the answer of the same request bytes count once


def test_an_onnx_model_is_reviewed_by_its_operators_and_a_rejected_model_never_runs(
    world: dict, capsys: pytest.CaptureFixture
) -> None:
    assert site_agent(["model", "review", str(world["onnx"]), "--site-dir", str(world["site"])]) == 0
    text = capsys.readouterr().out
    assert "radius-texture" in text and "not reviewed" in text
    assert "operators:      ai.onnx.ml:LinearClassifier" in text
    assert "mean_texture         float in [0, 500]" in text
    reject = ["model", "reject", str(world["onnx"]), "--site-dir", str(world["site"]), "--by", "Board"]
    assert site_agent([*reject, "--reason", "not the model in the protocol"]) == 0
    capsys.readouterr()
    request = request_for(world, world["onnx"])
    assert run(world, request, world["onnx"]) == 2
    err = capsys.readouterr().err
    assert "was rejected by this site; it will not be run" in err
    # the words to pass on say what the ledger says: rejected, not "not approved yet"
    assert "(tell the coordinator only: model not approved by the site: it rejected this model bundle)" in err
    refusal = [e for e in ledger.read_entries(world["site"] / "ledger.jsonl") if e["event"] == "refusal"][-1]
    assert refusal["details"]["reason"] == "model not approved by the site: it rejected this model bundle"
    summaries = [ledger.summary(e) for e in ledger.read_entries(world["site"] / "ledger.jsonl")]
    assert any(s.startswith("model ") and "rejected by Board" in s for s in summaries)
    # A rejection is for good, as the guides say (found by following the site-IT guide: a later approval of the
    # same bytes went through and the model ran).
    approve = ["model", "approve", str(world["onnx"]), "--site-dir", str(world["site"]), "--by", "IT"]
    assert site_agent(approve) == 1
    assert "a rejection is final" in capsys.readouterr().err
    assert run(world, request, world["onnx"]) == 2


def test_approval_needs_a_name_and_a_rejection_a_reason(world: dict, capsys: pytest.CaptureFixture) -> None:
    assert site_agent(["model", "approve", str(world["card"]), "--site-dir", str(world["site"]), "--by", " "]) == 1
    assert "--by: name the person who decides" in capsys.readouterr().err
    assert site_agent(["model", "approve", "abcdef", "--site-dir", str(world["site"]), "--by", "X"]) == 1
    assert "no kept model with this id" in capsys.readouterr().err


def test_a_held_release_shows_the_model_that_computed_it(world: dict, capsys: pytest.CaptureFixture) -> None:
    """The ethics board's review page of a held release shows what the model is, next to what would leave."""
    config = world["site"] / "site.toml"
    config.write_text(config.read_text().replace("require_approval = false", "require_approval = true"))
    assert site_agent(["model", "approve", str(world["card"]), "--site-dir", str(world["site"]), "--by", "Chair"]) == 0
    assert run(world, request_for(world, world["card"]), world["card"]) == 3  # held for approval
    capsys.readouterr()
    assert site_agent(["review", "--site-dir", str(world["site"])]) == 0
    text = capsys.readouterr().out
    assert "What the model is (site-agent model review)" in text
    assert "radius-points  (approved)" in text and "weight mean_radius   0.25" in text
    page = world["root"] / "review.html"
    assert site_agent(["review", "--site-dir", str(world["site"]), "--html", str(page)]) == 0
    assert "<summary>What the model is</summary>" in page.read_text() and "intercept -3" in page.read_text()
