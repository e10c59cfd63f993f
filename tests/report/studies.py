"""Study stores the report tests read, made by the demo consortium's real code path (no mocks).

- ``demo``: the demo study as `make demo` runs it offline: eight sites, one of which (skarrow-specialist)
  releases only suppressed cells; the model gives probabilities.
- ``one_site``: the same preparation, but only one site answers.
- ``extended``: a request that also asks for ROC, calibration, margin, subgroups by sex and agreement;
  one site (northvale-community) maps a second reference standard.
"""

from __future__ import annotations

import contextlib
import functools
import io
import json
import subprocess
import sys
import uuid
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from federation.cli import main as cli_main
from federation.protocol import AnalysisSpec, Request, load_private_key
from federation.protocol.documents import SubgroupSpec
from federation.store import Store
from simulations.demo import DemoStudy, prepare_study, run_offline
from site_agent.config import load_site
from site_agent.runner import run_request

SECOND_REFERENCE_SITE = "northvale-community"


def federation_process(*args: str) -> subprocess.CompletedProcess[str]:
    """Run the real `federation` command line in a child process (as site IT would)."""
    return subprocess.run([sys.executable, "-m", "federation.cli", *args], capture_output=True, text=True, timeout=300)


def federation(*args: str) -> subprocess.CompletedProcess[str]:
    """Run `federation` through its real entry point (``federation.cli.main``) in this process.

    Same parser, handlers and error-to-exit-code path as the installed command, without paying for a new
    interpreter and its imports on every call.
    """
    out, err = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(out), contextlib.redirect_stderr(err):
        code = cli_main(list(args))
    return subprocess.CompletedProcess(["federation", *args], code, out.getvalue(), err.getvalue())


@functools.cache
def analyze_json(store: Path, study_id: str | None = None) -> dict[str, Any]:
    """What `federation analyze --json` prints for ``store`` (run once per store: the stores do not change)."""
    args = ["analyze", "--store", str(store), "--json"] + (["--study-id", study_id] if study_id else [])
    result = federation(*args)
    # 3: done, but some enrolled sites sent nothing (named on stderr under --json)
    assert result.returncode == (3 if "no release yet from" in result.stderr else 0), result.stderr
    return json.loads(result.stdout)


def demo_store(root: Path) -> Path:
    study = prepare_study(root)
    run_offline(study)
    return study.store_path


def one_site_store(root: Path) -> Path:
    study = prepare_study(root)
    site = load_site(study.site_dirs[0])
    result = run_request(site, study.request_bytes, study.bundle_bytes)
    store = Store(study.store_path)
    store.ingest([(result.release_bytes, site.site_id)])
    store.close()
    return study.store_path


def _add_second_reference(study: DemoStudy, site_id: str) -> None:
    """Give one site a second reference standard: the first, with about 8% of verdicts changed (invented)."""
    site = next(s for s in study.consortium.sites if s.site_id == site_id)
    frame = pd.read_csv(site.data_path, dtype=str, keep_default_na=False)
    mapping = site.mapping_path.read_text()
    outcome = mapping.split("[outcome]", 1)[1]
    column = outcome.split('column = "', 1)[1].split('"', 1)[0]
    positive = outcome.split('positive = ["', 1)[1].split('"', 1)[0]
    negative = outcome.split('negative = ["', 1)[1].split('"', 1)[0]
    flip = np.random.default_rng(7).random(len(frame)) < 0.08
    swapped = frame[column].map({positive: negative, negative: positive}).fillna("")
    frame["second_reference"] = frame[column].where(~flip, swapped)
    frame.to_csv(site.data_path, index=False)
    site.mapping_path.write_text(
        mapping + f'\n[reference2]\ncolumn = "second_reference"\npositive = ["{positive}"]\nnegative = ["{negative}"]\n'
    )


def extended_store(root: Path) -> Path:
    study = prepare_study(root, study_id="extended-1")
    _add_second_reference(study, SECOND_REFERENCE_SITE)
    analyses = (
        AnalysisSpec("confusion"),
        AnalysisSpec("roc"),
        AnalysisSpec("calibration"),
        AnalysisSpec("margin"),
        AnalysisSpec("subgroups", subgroups=(SubgroupSpec("sex"),)),
        AnalysisSpec("agreement"),
    )
    bundle_sha256 = json.loads(study.request_bytes)["bundle_sha256"]
    issued = datetime.now(UTC).replace(microsecond=0).isoformat()
    request = Request("extended-1", uuid.uuid4().hex, bundle_sha256, analyses, issued)
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
