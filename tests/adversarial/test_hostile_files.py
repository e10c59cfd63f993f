"""Hostile files from the coordinator: a model crafted to carry a record out, oversized or deeply nested
requests, ONNX graphs with custom or unknown operators, archives (zip bombs, path traversal) in place of a
bundle or an app bundle. Every one is signed with the pinned key unless said otherwise: the coordinator is
the attacker here."""

from __future__ import annotations

import io
import json
import subprocess
import sys
import time
import zipfile
from pathlib import Path

import onnx
import pytest
from onnx import TensorProto, helper

from federation.protocol import (
    AnalysisSpec,
    BundleError,
    DocumentError,
    PolicyViolation,
    Request,
    Schema,
    load_bundle,
    pack_bundle,
)
from federation.protocol.bundle import MAGIC
from site_agent import ledger
from site_agent.runner import run_request

from .conftest import Coordinator, make_site
from .test_curious_coordinator import K, assert_only_safe_counts


def demo_schema(coordinator: Coordinator) -> Schema:
    path = coordinator.demo.consortium.schema_path
    return Schema.from_toml(path.read_text(), str(path))


def age_as_score_onnx(n_features: int, age_column: int) -> bytes:
    """An ONNX graph whose 'probability' is the age input itself, in hundreds of months (so that it lies in
    [0, 1] and passes the range check): probabilities = [age/100, age/100]."""
    graph = helper.make_graph(
        [
            helper.make_node(
                "Constant", [], ["index"], value=helper.make_tensor("i", TensorProto.INT64, [1], [age_column])
            ),
            helper.make_node("Constant", [], ["scale"], value=helper.make_tensor("s", TensorProto.FLOAT, [], [0.01])),
            helper.make_node("Gather", ["input", "index"], ["age"], axis=1),
            helper.make_node("Mul", ["age", "scale"], ["share"]),
            helper.make_node("Concat", ["share", "share"], ["probabilities"], axis=1),
        ],
        "leak",
        [helper.make_tensor_value_info("input", TensorProto.FLOAT, [None, n_features])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, [None, 2])],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    return model.SerializeToString()


def custom_op_onnx(n_features: int, domain: str, op: str) -> bytes:
    graph = helper.make_graph(
        [helper.make_node(op, ["input"], ["probabilities"], domain=domain)],
        "custom",
        [helper.make_tensor_value_info("input", TensorProto.FLOAT, [None, n_features])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, [None, 2])],
    )
    imports = [helper.make_opsetid("", 17)] + ([helper.make_opsetid(domain, 1)] if domain else [])
    return helper.make_model(graph, opset_imports=imports).SerializeToString()


# --- a model crafted to encode a record -------------------------------------------------------------------


def test_scorecard_whose_score_is_the_age_releases_only_safe_counts(coordinator: Coordinator, tmp_path: Path) -> None:
    """score = age in months; thresholds at every month and ROC bands at every month would, unprotected,
    give the age histogram by outcome, record by record. The release shows only counts that are 0 or >= k."""
    schema = demo_schema(coordinator)
    card = json.dumps({"format": "scorecard", "kind": "points", "intercept": 0, "weights": {"age_months": 1}})
    bundle = pack_bundle(
        model_bytes=card.encode(),
        model_format="scorecard",
        schema=schema,
        score_kind="points",
        thresholds=[36.0],
        private_key=coordinator.key,
    )
    site = make_site(coordinator, tmp_path)
    months = tuple(float(m) for m in range(0, 50))
    request = coordinator.request(
        AnalysisSpec("confusion", months),
        AnalysisSpec("roc", bands=tuple(float(m) for m in range(1, 100))),
        bundle_sha256=load_bundle(bundle, site.trusted).sha256,
    )
    outcome = run_request(site, request, bundle)
    assert_only_safe_counts(outcome.release_bytes)
    doc = json.loads(outcome.release_bytes)
    hidden = [c for t in doc["results"]["confusion"] for c in t["cells"].values() if c is None]
    assert len(hidden) > 20  # month-level differences were hidden, not shown
    assert set(doc["results"]) == {"confusion", "roc"}  # nothing but what was asked, in the closed vocabulary
    bands = doc["results"]["roc"]["bands"]
    assert all(b["positive"] in (None, 0) or b["positive"] >= K for b in bands)


def test_onnx_graph_whose_probability_is_the_age_releases_only_safe_counts(
    coordinator: Coordinator, tmp_path: Path
) -> None:
    schema = demo_schema(coordinator)
    model = age_as_score_onnx(len(schema.features), schema.names.index("age_months"))
    bundle = pack_bundle(
        model_bytes=model,
        model_format="onnx",
        schema=schema,
        score_kind="probability",
        thresholds=[0.5],
        private_key=coordinator.key,
    )
    site = make_site(coordinator, tmp_path)
    request = coordinator.request(
        AnalysisSpec("confusion", tuple(m / 100 for m in range(1, 50))),
        AnalysisSpec("roc", bands=tuple(m / 100 for m in range(1, 100))),
        bundle_sha256=load_bundle(bundle, site.trusted).sha256,
    )
    outcome = run_request(site, request, bundle)
    assert_only_safe_counts(outcome.release_bytes)
    hidden = [c for t in json.loads(outcome.release_bytes)["results"]["confusion"] for c in t["cells"].values()]
    assert hidden.count(None) > 20  # month-level differences were hidden, not shown


# --- oversized and deeply nested requests -----------------------------------------------------------------


def test_oversized_request_is_refused_before_parsing(coordinator: Coordinator, tmp_path: Path) -> None:
    site = make_site(coordinator, tmp_path)
    huge = b'{"kind": "request", "pad": "' + b"x" * (9 * 1024 * 1024) + b'"}'
    start = time.perf_counter()
    with pytest.raises(DocumentError, match="larger than 8 MiB"):
        run_request(site, huge, coordinator.demo.bundle_bytes)
    assert time.perf_counter() - start < 2.0
    reason = ledger.read_entries(site.ledger_path)[-1]["details"]["reason"]
    assert reason == "request not accepted: request: larger than 8 MiB"


@pytest.mark.parametrize("depth", [1_000, 100_000])
def test_deeply_nested_request_is_one_clear_refusal(depth: int) -> None:
    nested = b"[" * depth + b"]" * depth
    with pytest.raises(DocumentError, match="request: (JSON nested too deeply|must be a JSON object)"):
        Request.from_bytes(b'{"kind": "request", "x": ' + nested + b"}", None)


def test_requests_past_the_list_limits_are_refused(coordinator: Coordinator) -> None:
    doc = json.loads(coordinator.request())
    doc["analyses"] = [{"name": "confusion", "thresholds": [0.5] * 51}]
    with pytest.raises(DocumentError, match="at most 50 numbers"):
        Request.from_bytes(json.dumps(doc).encode(), None)
    doc["analyses"] = [{"name": "roc", "bands": [i / 200 for i in range(1, 102)]}]
    with pytest.raises(DocumentError, match="at most 100 numbers"):
        Request.from_bytes(json.dumps(doc).encode(), None)
    doc["analyses"] = [{"name": "confusion"}] * 51
    with pytest.raises(DocumentError, match="between 1 and 50 analyses"):
        Request.from_bytes(json.dumps(doc).encode(), None)


# --- ONNX models with unsupported or custom operators -----------------------------------------------------


@pytest.mark.parametrize(
    ("domain", "op", "message"),
    [
        ("com.example.exfiltrate", "Send", "unsupported operator domain 'com.example.exfiltrate'"),
        ("com.microsoft", "Gelu", "unsupported operator domain 'com.microsoft'"),
        ("", "NotAnOnnxOperator", "'NotAnOnnxOperator' is not on the site's list of operators"),
    ],
)
def test_onnx_with_custom_or_unknown_operators_is_refused(
    coordinator: Coordinator, tmp_path: Path, domain: str, op: str, message: str
) -> None:
    schema = demo_schema(coordinator)
    bundle = pack_bundle(
        model_bytes=custom_op_onnx(len(schema.features), domain, op),
        model_format="onnx",
        schema=schema,
        score_kind="probability",
        thresholds=[0.5],
        private_key=coordinator.key,
    )
    site = make_site(coordinator, tmp_path)
    request = coordinator.request(bundle_sha256=load_bundle(bundle, site.trusted).sha256)
    with pytest.raises(BundleError, match=message):
        run_request(site, request, bundle)
    events = [e["event"] for e in ledger.read_entries(site.ledger_path)]
    assert events == ["request_received", "refusal"]


# --- archives in place of a bundle; the app-bundle launcher -----------------------------------------------


def hostile_zip(escape: Path) -> bytes:
    """A zip bomb (200 MiB of zeros in ~200 KiB) with a path-traversal member name."""
    buffer = io.BytesIO()
    with zipfile.ZipFile(buffer, "w", zipfile.ZIP_DEFLATED) as archive:
        archive.writestr("../../../../" + str(escape).lstrip("/"), b"escaped")
        with archive.open("bomb.bin", "w", force_zip64=True) as member:
            block = b"\0" * (1024 * 1024)
            for _ in range(200):
                member.write(block)
    return buffer.getvalue()


def test_archive_given_as_a_bundle_is_refused_at_the_frame(coordinator: Coordinator, tmp_path: Path) -> None:
    escape = tmp_path / "escaped.txt"
    archive = hostile_zip(escape)
    assert len(archive) < 1024 * 1024
    site = make_site(coordinator, tmp_path)
    for data in (archive, MAGIC + b"\n0123456789abcdef\nAAAA\n" + archive):
        start = time.perf_counter()
        with pytest.raises((BundleError, PolicyViolation)) as refused:
            run_request(site, coordinator.request(), data)
        assert time.perf_counter() - start < 2.0  # nothing was inflated
        assert "not a model bundle" in str(refused.value) or "not pinned here" in str(refused.value)
    assert not escape.exists()
    reasons = [e["details"]["reason"] for e in ledger.read_entries(site.ledger_path) if e["event"] == "refusal"]
    assert reasons[0] == "bundle not accepted: bundle: not a model bundle (expected the line MSV-BUNDLE/1)"


def test_launcher_refuses_an_unlisted_app_bundle_before_flower_unpacks_it(
    coordinator: Coordinator, tmp_path: Path
) -> None:
    """The real launcher wraps Flower's installer; the hostile archive reaches it and is refused by hash
    before a byte is unpacked (run in a child process: the launcher patches Flower's module)."""
    site = make_site(coordinator, tmp_path)
    escape = tmp_path / "escaped-by-fab.txt"
    fab = tmp_path / "hostile.fab"
    fab.write_bytes(hostile_zip(escape))
    script = f"""
import importlib, sys
from site_agent import launcher
try:
    launcher.main(["--site-dir", {str(site.root)!r}, "--no-such-flower-option"])
except SystemExit:
    pass
runtime = importlib.import_module("flwr.supernode.runtime.run_clientapp")
try:
    runtime.install_from_fab(open({str(fab)!r}, "rb").read(), None)
except launcher.AppBundleRefused as exc:
    print("REFUSED", exc)
"""
    done = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, timeout=60)
    assert "REFUSED site" in done.stdout, done.stderr[-2000:]
    assert "is not in this site's allowlist" in done.stdout
    assert not escape.exists()
    last = ledger.read_entries(site.ledger_path)[-1]
    assert last["event"] == "refusal" and last["details"]["error"] == "AppBundleRefused"


def test_scores_never_leave_only_counts(coordinator: Coordinator, tmp_path: Path) -> None:
    """No per-record value appears in a release: the demo records' ages are not in it as a list of numbers."""
    site = make_site(coordinator, tmp_path)
    outcome = run_request(
        site, coordinator.request(AnalysisSpec("roc"), AnalysisSpec("confusion")), coordinator.demo.bundle_bytes
    )
    doc = json.loads(outcome.release_bytes)
    text = outcome.release_bytes.decode()
    assert len(text) < 20_000  # a few kilobytes of counts and summaries, whatever the number of records
    assert doc["flow"]["read"] == coordinator.demo.consortium.sites[2].n_records
    # the grid the site's score histogram is rounded to past 250,000 distinct scores depends on the spread of
    # the records' scores and no released figure uses it: it stays at the site (it used to travel)
    assert set(doc["results"]["roc"]) == {
        "rule",
        "edges",
        "suppressed_by",
        "bands",
        "positive",
        "negative",
        "auc",
        "auc_se",
        "method",
        "suppressed",
    }
