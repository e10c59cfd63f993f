"""Crash safety: real `site-agent run` and `federation ingest` processes killed with SIGKILL at injected
points (MSV_CRASH_AT, federation/protocol/crashpoints.py; inert when unset, as in every other test). After a
restart nothing is lost, nothing is computed or disclosed twice, the coordinator stores each release once,
and the ledger and the store say what happened."""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
from pathlib import Path

import pytest

from federation.store import Store
from site_agent import ledger
from site_agent.config import load_site
from site_agent.runner import run_request

from .conftest import SITE, Coordinator, store_copy

BIN = Path(sys.executable).parent
STUDY = "tallowmere-validation-1"


def run(command: list[str], crash_at: str | None = None) -> subprocess.CompletedProcess:
    env = {k: v for k, v in os.environ.items() if k != "MSV_CRASH_AT"}
    if crash_at:
        env["MSV_CRASH_AT"] = crash_at
    return subprocess.run(command, capture_output=True, text=True, env=env, timeout=120)


def events(folder: Path) -> list[str]:
    return [e["event"] for e in ledger.read_entries(folder / "ledger.jsonl")]


@pytest.mark.parametrize(
    ("point", "copy_written", "out_written"),
    [
        ("site:after-ledger-release", False, False),
        ("site:before-send", True, False),
        ("site:after-send", True, True),
    ],
)
def test_site_killed_during_a_release_recovers_without_a_second_disclosure(
    coordinator: Coordinator, tmp_path: Path, point: str, copy_written: bool, out_written: bool
) -> None:
    folder = Path(shutil.copytree(coordinator.demo.site_dirs[SITE], tmp_path / "site"))
    files = coordinator.demo.root / "coordinator"
    out = tmp_path / "release.json"
    command = [str(BIN / "site-agent"), "run", "--site-dir", str(folder), "--request", str(files / "request.json")]
    command += ["--bundle", str(files / "model.bundle"), "--out", str(out)]

    killed = run(command, crash_at=point)
    assert killed.returncode == -signal.SIGKILL
    # the demo site approved the model when it was set up; the ledger then says what was about to leave
    assert events(folder) == ["model_approval", "request_received", "release"]
    assert len(ledger.unsent(folder / "ledger.jsonl")) == 1  # ... and that it was not sent
    assert any((folder / "releases").glob("*.json")) == copy_written
    assert out.exists() == out_written
    recorded = ledger.releases_for_study(folder / "ledger.jsonl", STUDY)[0]["release"].encode()
    if out_written:
        assert out.read_bytes() == recorded  # whole, not torn (written atomically)

    again = run(command)  # the restart: the same request, handed over from the ledger, not recomputed
    assert again.returncode == 0, again.stderr
    assert out.read_bytes() == recorded
    assert events(folder) == ["model_approval", "request_received", "release", "request_received", "sent"]
    assert ledger.unsent(folder / "ledger.jsonl") == []
    assert list((folder / "releases").glob("*.json"))[0].read_bytes() == recorded
    site = load_site(folder)
    assert ledger.verify_ledger(site.ledger_path, site.public_key()) == 5  # chain and signatures intact

    store = Store(store_copy(coordinator, tmp_path / "coordinator"))
    store.ingest([(out.read_bytes(), str(out))])
    assert len(store.releases(STUDY)) == 1
    store.close()


def test_coordinator_killed_during_ingest_stores_all_or_nothing(coordinator: Coordinator, tmp_path: Path) -> None:
    store_path = store_copy(coordinator, tmp_path / "coordinator")
    paths = []
    for index in (SITE, SITE + 1):
        folder = Path(shutil.copytree(coordinator.demo.site_dirs[index], tmp_path / f"site-{index}"))
        outcome = run_request(load_site(folder), coordinator.demo.request_bytes, coordinator.demo.bundle_bytes)
        path = tmp_path / f"release-{index}.json"
        path.write_bytes(outcome.release_bytes)
        paths.append(str(path))
    command = [str(BIN / "federation"), "ingest", "--store", str(store_path), *paths]

    killed = run(command, crash_at="coordinator:mid-ingest")
    assert killed.returncode == -signal.SIGKILL
    store = Store(store_path)
    assert store.releases(STUDY) == []  # the open transaction was rolled back: nothing half-stored
    store.close()

    assert run(command).returncode == 0
    store = Store(store_path)
    assert sorted(r.release.site_id for r in store.releases(STUDY)) == sorted(
        json.loads(Path(p).read_text())["site_id"] for p in paths
    )
    store.close()
    twice = run(command)
    assert twice.returncode == 2 and "already ingested" in twice.stderr
    store = Store(store_path)
    assert len(store.releases(STUDY)) == 2  # stored once
    store.close()
