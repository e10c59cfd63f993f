"""The three role guides work as written: their offline blocks run with bash, in order, on the demo's data.

Each guide marks the blocks a new user can run from the project folder with ``<!-- guide-offline ... -->``
(as README's ``offline-sequence``); blocks that need a running SuperLink are not marked and not run here
(the guides say so). What each guide's sequence produced is then checked against the project's own
readers: the store, the release files, the site ledger.
"""

from __future__ import annotations

import json
import re
import subprocess
from pathlib import Path

import pytest

from federation.store import Store
from simulations.demo import run_demo

ROOT = Path(__file__).resolve().parents[1]
GUIDES = ("coordinator", "site-it", "ethics-board")


def guide_blocks(name: str) -> list[str]:
    """The bash blocks of ``docs/NAME.md`` that follow a ``<!-- guide-offline`` marker, in order."""
    text = (ROOT / "docs" / f"{name}.md").read_text()
    blocks = re.findall(r"<!-- guide-offline[^>]*-->\s*```bash\n(.*?)```", text, re.S)
    return blocks


def every_bash_block(name: str) -> list[str]:
    text = (ROOT / "docs" / f"{name}.md").read_text()
    return re.findall(r"```bash\n(.*?)```", text, re.S)


@pytest.fixture(scope="module")
def demo(tmp_path_factory: pytest.TempPathFactory) -> Path:
    root = tmp_path_factory.mktemp("guides") / "demo"
    run_demo(root, engine="offline")  # exactly what `federation demo --engine offline` leaves behind
    return root


def run_guide(name: str, demo: Path, work: Path) -> subprocess.CompletedProcess:
    script = f"set -euo pipefail\nexport D={demo} W={work}\ncd {ROOT}\n" + "\n".join(guide_blocks(name))
    return subprocess.run(["bash", "-c", script], capture_output=True, text=True, timeout=300)


@pytest.mark.parametrize("name", GUIDES)
def test_every_bash_block_is_marked(name):
    """A ```bash block is a promise that it runs; blocks needing servers are ```sh and say so."""
    blocks = guide_blocks(name)
    assert len(blocks) >= 3
    assert len(blocks) == len(every_bash_block(name))


def test_coordinator_guide(demo, tmp_path):
    result = run_guide("coordinator", demo, tmp_path)
    assert result.returncode == 0, result.stderr
    analysis = json.loads((tmp_path / "analysis.json").read_text())
    sites = ["amberlow-referral", "northvale-community", "ostermead-primary"]
    assert [s["site_id"] for s in analysis["sites"]] == sites
    store = Store(tmp_path / "study.db")
    try:
        assert len(store.releases("guide-study-1")) == 3
    finally:
        store.close()
    report = json.loads((tmp_path / "report.json").read_text())
    assert report["study_id"] == "guide-study-1"
    html = (tmp_path / "report.html").read_text()
    assert "<svg" in html and "guide-study-1" in html
    assert "pooled" in result.stdout


def test_site_it_guide(demo, tmp_path):
    result = run_guide("site-it", demo, tmp_path)
    assert result.returncode == 0, result.stderr
    # map suggest marked its guesses, and the guide's `grep -c CONFIRM` counted them (one line, a number)
    counted = re.search(r"CONFIRM before using it\.\n(?:  to do: .*\n)*(\d+)\n", result.stdout)
    assert counted and int(counted.group(1)) >= 13  # outcome, id and the demo schema's 12 inputs: all guesses
    check = json.loads((tmp_path / "check.json").read_text())
    release = json.loads((tmp_path / "release.json").read_text())
    # check shows exactly the counts run then signs: the demo site's table (cells from the release file)
    assert release["site_id"] == "northvale-community"
    cells = release["results"]["confusion"][0]["cells"]
    assert json.dumps(cells, sort_keys=True) in json.dumps(check, sort_keys=True)
    assert "chain and signatures intact" in result.stdout
    app = json.loads(re.search(r"^\{\n  \"sha256\".*?^\}$", result.stdout, re.S | re.M).group(0))
    assert re.fullmatch(r"[0-9a-f]{64}", app["sha256"]) and app["allowed"] is False


def test_ethics_board_guide(demo, tmp_path):
    result = run_guide("ethics-board", demo, tmp_path)
    assert result.returncode == 0, result.stderr
    assert "held for approval" in result.stdout
    assert "approved by Board member A" in result.stdout
    release = json.loads((tmp_path / "release.json").read_text())
    assert release["policy"]["require_approval"] is True and release["site_id"] == "amberlow-referral"
    events = [json.loads(line)["event"] for line in (tmp_path / "site" / "ledger.jsonl").read_text().splitlines()]
    assert events == ["model_approval", "request_received", "held", "approval", "request_received", "release", "sent"]
    verify = json.loads((tmp_path / "verify.json").read_text())
    assert verify["entries"] == 7 and verify["intact"] is True
    assert (tmp_path / "review.html").read_text().count(release["request_id"]) >= 1
    # the tampered copy failed, naming the ledger file and a line
    assert "tampered/ledger.jsonl" in result.stderr and "line 4" in result.stderr
    # the copy cut short by one entry verifies as a chain, but not against the head hash noted before
    assert "cut/ledger.jsonl: no entry has the head hash" in result.stderr
    assert "entries were cut off the end" in result.stderr
