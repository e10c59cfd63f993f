"""The static check of an ONNX model is made once per model and kept in the site folder: a request after the
model's approval runs without importing the ``onnx`` package, and gives the same release as a fresh check.

Model: logistic regression on scikit-learn's bundled breast-cancer data (Wolberg et al., UCI), exported with
skl2onnx, as in test_model_approval.py. The reference for "same result" is the same site answering the same
request with no kept check (the checker runs in that process).
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

from federation.protocol import Bundle, load_bundle, sha256_hex
from federation.protocol.model_check import check_onnx
from site_agent.checked_models import checker_fingerprint, remembered
from site_agent.cli import main as site_agent
from site_agent.config import load_site

from .test_model_approval import request_for, world  # noqa: F401 - the fixture

# Answers one request in a fresh interpreter and says whether the onnx package was imported on the way.
ANSWER = """
import json, sys
from pathlib import Path
from site_agent.config import load_site
from site_agent.runner import run_request
site_dir, request, bundle, data = (Path(a) for a in sys.argv[1:5])
outcome = run_request(load_site(site_dir), request.read_bytes(), bundle.read_bytes(), data)
print(json.dumps({"onnx_imported": "onnx" in sys.modules, "results": json.loads(outcome.release_bytes)["results"]}))
"""


def _answer(world: dict, request: Path) -> dict:  # noqa: F811
    argv = [sys.executable, "-c", ANSWER, str(world["site"]), str(request), str(world["onnx"])]
    done = subprocess.run([*argv, str(world["root"] / "records.csv")], capture_output=True, text=True, check=False)
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def _bundle(world: dict) -> Bundle:  # noqa: F811
    return load_bundle(world["onnx"].read_bytes(), load_site(world["site"]).trusted)


def _entry(world: dict) -> tuple[Path, Path]:  # noqa: F811
    model = _bundle(world).model_bytes
    folder, stem = world["site"] / "models", sha256_hex(model)[:16]  # the names docs/site-it.md gives
    return folder / f"{stem}.checked.json", folder / f"{stem}.checked.onnx"


def test_approval_keeps_the_check_and_a_round_then_skips_the_onnx_import(
    world: dict,  # noqa: F811
    capsys: pytest.CaptureFixture,
) -> None:
    facts_path, graph_path = _entry(world)
    assert not facts_path.exists()
    approve = ["model", "approve", str(world["onnx"]), "--site-dir", str(world["site"]), "--by", "Board"]
    assert site_agent(approve) == 0
    capsys.readouterr()
    facts = json.loads(facts_path.read_text())
    bundle = _bundle(world)
    fresh = check_onnx(bundle.model_bytes, len(bundle.schema.features))
    # What is kept is exactly what the checker makes for these bytes (pruned graph, output, operators).
    assert graph_path.read_bytes() == fresh.model_bytes
    assert facts == {
        "model_sha256": sha256_hex(bundle.model_bytes),
        "checker": checker_fingerprint(),
        "output": fresh.output,
        "operators": list(fresh.operators),
        "pruned_sha256": sha256_hex(fresh.model_bytes),
    }

    kept = _answer(world, request_for(world, world["onnx"]))
    assert kept["onnx_imported"] is False

    # The reference: no kept check, so this process runs the checker (and imports onnx) itself.
    facts_path.unlink()
    checked_here = _answer(world, request_for(world, world["onnx"]))
    assert checked_here["onnx_imported"] is True
    assert kept["results"] == checked_here["results"]
    assert facts_path.exists()  # kept again by the run that checked


def test_a_kept_check_is_used_only_for_the_same_bytes_and_checker(world: dict) -> None:  # noqa: F811
    site = load_site(world["site"])
    bundle = _bundle(world)
    assert site_agent(["model", "review", str(world["onnx"]), "--site-dir", str(world["site"])]) == 0
    assert remembered(site, bundle.model_bytes) is not None
    facts_path, graph_path = _entry(world)
    original_graph, original_facts = graph_path.read_bytes(), facts_path.read_text()

    graph_path.write_bytes(original_graph + b"\0")  # the pruned graph changed after it was checked
    assert remembered(site, bundle.model_bytes) is None
    graph_path.write_bytes(original_graph)
    assert remembered(site, bundle.model_bytes) is not None

    stale = json.loads(original_facts) | {"checker": "0" * 64}  # kept by another version of the checker
    facts_path.write_text(json.dumps(stale))
    assert remembered(site, bundle.model_bytes) is None
    facts_path.write_text(original_facts)

    other = bundle.model_bytes + b"\0"  # other model bytes never match this entry
    assert remembered(site, other) is None
