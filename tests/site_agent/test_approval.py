"""Releases held for approval (site_agent.approval, site_agent.review) through the real command line and
the real Flower adapters (in-process Grid, no mocks).

Data: scikit-learn's bundled breast-cancer records (Wolberg et al., UCI) split into sites
(tests/breast_cancer.py); the invented demo consortium for the Flower round.
"""

from __future__ import annotations

import json
import re
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path

import pytest

from federation.cli import main as federation
from federation.flower_server import make_server_app
from federation.protocol import sha256_hex
from federation.store import Store
from simulations.demo import prepare_study, round_config
from simulations.inprocess import run_inprocess
from site_agent import ledger
from site_agent.cli import main as site_agent
from site_agent.flower_client import make_client_app

from .. import breast_cancer


def require_approval(site_dir: Path) -> None:
    config = site_dir / "site.toml"
    config.write_text(config.read_text().replace("require_approval = false", "require_approval = true"))


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory) -> breast_cancer.Study:
    return breast_cancer.build(tmp_path_factory.mktemp("approval") / "study")


@pytest.fixture
def held(study: breast_cancer.Study, tmp_path: Path, capsys):  # noqa: ANN001, ANN201
    """A site that requires approval, after one `run`: (site dir, run arguments, held id)."""
    request = tmp_path / "request.json"
    args = ["request", "new", "--store", str(tmp_path / "study.db"), "--study-id", "bc-1"]
    args += ["--bundle", str(study.bundle_path), "--sign", str(study.coordinator_key), "--out", str(request)]
    assert federation(args) == 0
    site_dir = tmp_path / "site"
    assert (
        site_agent(["init", "--site-id", "site-0", "--trust", str(study.coordinator_pub), "--site-dir", str(site_dir)])
        == 0
    )
    assert site_agent(["model", "approve", str(study.bundle_path), "--site-dir", str(site_dir), "--by", "site IT"]) == 0
    require_approval(site_dir)
    run = ["run", "--site-dir", str(site_dir), "--request", str(request), "--bundle", str(study.bundle_path)]
    run += ["--data", str(study.site_csvs[0]), "--out", str(tmp_path / "release.json")]
    capsys.readouterr()
    assert site_agent(run) == 3  # partial: held, nothing written
    out = capsys.readouterr().out
    held_id = re.search(r"held for approval as ([0-9a-f]{16})", out).group(1)
    return site_dir, run, held_id


def events(site_dir: Path) -> list[str]:
    return [e["event"] for e in ledger.read_entries(site_dir / "ledger.jsonl")]


def test_a_held_release_leaves_nothing_until_approved(held, tmp_path: Path, capsys) -> None:  # noqa: ANN001
    site_dir, run, held_id = held
    assert not (tmp_path / "release.json").exists()
    assert events(site_dir) == ["model_approval", "request_received", "held"]
    held_file = site_dir / "held" / f"{held_id}.json"
    assert sha256_hex(held_file.read_bytes()).startswith(held_id)
    # asking again before a decision: still held, no recomputation, still nothing written
    assert site_agent(run) == 3
    assert not (tmp_path / "release.json").exists()
    assert events(site_dir) == ["model_approval", "request_received", "held", "request_received"]


def test_review_shows_exactly_what_would_leave_and_why(held, capsys) -> None:  # noqa: ANN001
    site_dir, _, held_id = held
    capsys.readouterr()
    assert site_agent(["review", "--site-dir", str(site_dir), "--exact"]) == 0
    out = capsys.readouterr().out
    text = (site_dir / "held" / f"{held_id}.json").read_text()
    assert text in out  # the exact text that would leave
    assert f"Release {held_id}" in out and "held: waiting for a decision" in out
    assert "Participant flow" in out and "Withheld, and why" in out and "Disclosure audit" in out
    assert "Passed. The site checked this release" in out
    assert "What the audit did not search:" in out and "Not modelled by any audit" in out
    assert f"site-agent approve {held_id}" in out


def test_the_html_review_page_is_self_contained(held, tmp_path: Path) -> None:  # noqa: ANN001
    site_dir, _, held_id = held
    page = tmp_path / "review.html"
    assert site_agent(["review", "--site-dir", str(site_dir), "--html", str(page)]) == 0
    html_text = page.read_text()

    class Links(HTMLParser):
        def __init__(self) -> None:
            super().__init__()
            self.found: list[str] = []

        def handle_starttag(self, tag: str, attrs: list) -> None:
            if tag in ("script", "link", "img", "iframe"):
                self.found.append(tag)
            self.found += [v for k, v in attrs if k in ("src", "href") and v]

    parser = Links()
    parser.feed(html_text)
    assert parser.found == []  # no scripts, no fetched styles, fonts or images
    assert held_id in html_text
    released = json.loads((site_dir / "held" / f"{held_id}.json").read_text())
    assert f"counts under {released['policy']['min_cell_size']} are withheld (the minimum cell size)" in html_text


def test_approve_then_run_again_writes_the_reviewed_bytes(held, tmp_path: Path, capsys) -> None:  # noqa: ANN001
    site_dir, run, held_id = held
    reviewed = (site_dir / "held" / f"{held_id}.json").read_bytes()
    assert site_agent(["approve", held_id, "--site-dir", str(site_dir), "--by", "A. Reviewer"]) == 0
    assert site_agent(run) == 0
    assert (tmp_path / "release.json").read_bytes() == reviewed
    assert events(site_dir)[-4:] == ["approval", "request_received", "release", "sent"]
    approval = [e for e in ledger.read_entries(site_dir / "ledger.jsonl") if e["event"] == "approval"][0]
    assert approval["details"]["by"] == "A. Reviewer"
    assert approval["details"]["release_sha256"] == sha256_hex(reviewed)
    assert site_agent(["approve", held_id, "--site-dir", str(site_dir), "--by", "B"]) == 1  # decided once
    assert site_agent(["ledger", "verify", "--site-dir", str(site_dir)]) == 0
    # the release command hands over the same bytes again, recorded as sent
    out = tmp_path / "again.json"
    assert site_agent(["release", held_id, "--site-dir", str(site_dir), "--out", str(out)]) == 0
    assert out.read_bytes() == reviewed
    # The release entry says whom it answers, as a direct release's does: the request's bytes, their SHA-256
    # and the coordinator key that signed them (found by following the board's guide: after an approval the
    # entry said none of it, so the ledger did not show to whom a release went).
    request_bytes = Path(run[run.index("--request") + 1]).read_bytes()
    release = [e for e in ledger.read_entries(site_dir / "ledger.jsonl") if e["event"] == "release"][0]["details"]
    assert release["request_sha256"] == sha256_hex(request_bytes)
    assert release["request"] == request_bytes.decode("utf-8")
    assert release["coordinator_key_id"] == json.loads(request_bytes)["coordinator_key_id"]
    assert release["facts"]["counts"] and release["review"]["suppressed"] is not None
    # Asking again says it is the recorded release, and adds no second release entry.
    capsys.readouterr()
    assert site_agent(run) == 0
    assert "this request was answered before" in capsys.readouterr().err
    assert events(site_dir).count("release") == 1
    assert (tmp_path / "release.json").read_bytes() == reviewed
    capsys.readouterr()
    assert site_agent(["ledger", "show", "--site-dir", str(site_dir)]) == 0
    assert f"for coordinator key {release['coordinator_key_id']}" in capsys.readouterr().out


def test_a_rejected_release_never_leaves(held, tmp_path: Path, capsys) -> None:  # noqa: ANN001
    site_dir, run, held_id = held
    assert site_agent(["reject", held_id, "--site-dir", str(site_dir), "--reason", "wait for the board"]) == 0
    capsys.readouterr()
    assert site_agent(run) == 2
    err = capsys.readouterr().err
    assert "rejected" in err and "wait for the board" not in err  # the reviewer's words stay at the site
    assert not (tmp_path / "release.json").exists()
    out = tmp_path / "x.json"
    assert site_agent(["release", held_id, "--site-dir", str(site_dir), "--out", str(out)]) == 2
    assert not out.exists()


def test_a_held_file_changed_after_review_is_not_approved(held, capsys) -> None:  # noqa: ANN001
    site_dir, _, held_id = held
    held_file = site_dir / "held" / f"{held_id}.json"
    held_file.write_text(held_file.read_text().replace('"min_cell_size": 10', '"min_cell_size": 11'))
    capsys.readouterr()
    assert site_agent(["approve", held_id, "--site-dir", str(site_dir), "--by", "A. Reviewer"]) == 1
    assert "changed since it was prepared" in capsys.readouterr().err


def test_a_ledger_edited_behind_the_review_stops_review_approval_and_run(held, capsys) -> None:  # noqa: ANN001
    """Found by following the ethics board's guide: the review page is built from the held entry's facts in the
    ledger, and only the held file's SHA-256 was checked, so an edited ledger showed the board other numbers than
    the bytes it then approved. Every command that reads the ledger for a decision verifies it first (exit 2)."""
    site_dir, run, held_id = held
    path = site_dir / "ledger.jsonl"
    lines = path.read_text().splitlines(keepends=True)
    held_line = next(i for i, line in enumerate(lines) if '"event":"held"' in line)
    entry = json.loads(lines[held_line])
    counts = entry["details"]["facts"]["counts"]
    shown = next(c for c in counts if isinstance(c.get("value"), int) and c["value"] > 0)
    shown["value"] += 1
    lines[held_line] = json.dumps(entry, sort_keys=True, separators=(",", ":")) + "\n"
    path.write_text("".join(lines))
    before = path.read_bytes()
    for command in (
        ["review", "--site-dir", str(site_dir)],
        ["approve", held_id, "--site-dir", str(site_dir), "--by", "A. Reviewer"],
        ["release", held_id, "--site-dir", str(site_dir), "--out", str(site_dir.parent / "out.json")],
        run,
        ["check", *run[1 : run.index("--out")]],  # found by following the site-IT guide: check read on
    ):
        capsys.readouterr()
        assert site_agent(command) == 2, command
        assert f"line {held_line + 1}: entry was edited" in capsys.readouterr().err
    assert path.read_bytes() == before  # nothing appended to a broken ledger
    assert not (site_dir.parent / "out.json").exists()


def test_a_crash_between_recording_and_sending_is_visible(held, capsys) -> None:  # noqa: ANN001
    from site_agent import approval
    from site_agent.config import load_site

    site_dir, _, held_id = held
    assert site_agent(["approve", held_id, "--site-dir", str(site_dir), "--by", "A. Reviewer"]) == 0
    site = load_site(site_dir)
    approval.hand_over(site, approval.find(site, held_id))  # recorded; the process "dies" before handing over
    capsys.readouterr()
    assert site_agent(["ledger", "show", "--site-dir", str(site_dir)]) == 0
    assert "has no 'sent' entry after it" in capsys.readouterr().out


def test_the_online_agent_replies_held_then_released_after_approval(tmp_path: Path) -> None:
    study = prepare_study(tmp_path / "demo")
    study = replace(study, site_dirs=study.site_dirs[:2])
    require_approval(study.site_dirs[0])
    outcomes: list = []
    run_inprocess(make_server_app(round_config(study), outcomes.extend), make_client_app(), study.site_dirs)
    by_site = {o.site_id: o for o in outcomes}
    first, second = (d.name for d in study.site_dirs)
    assert by_site[first].status == "held" and "held for approval" in by_site[first].reason
    assert by_site[second].status == "released"
    store = Store(study.store_path)
    assert {r.release.site_id for r in store.releases("tallowmere-validation-1")} == {second}
    store.close()
    assert events(study.site_dirs[1])[-2:] == ["release", "sent"]  # handed to Flower, recorded
    held_id = next((study.site_dirs[0] / "held").glob("*.review.json")).name.split(".")[0]
    assert site_agent(["approve", held_id, "--site-dir", str(study.site_dirs[0]), "--by", "A. Reviewer"]) == 0
    outcomes.clear()
    only_first = replace(study, site_dirs=study.site_dirs[:1])
    run_inprocess(make_server_app(round_config(only_first), outcomes.extend), make_client_app(), only_first.site_dirs)
    assert [o.status for o in outcomes] == ["released"]
    store = Store(study.store_path)
    stored = {r.release.site_id: r for r in store.releases("tallowmere-validation-1")}
    store.close()
    assert stored[first].document == (study.site_dirs[0] / "held" / f"{held_id}.json").read_bytes()


def test_review_into_a_closed_pipe_ends_quietly(held) -> None:  # noqa: ANN001
    """`site-agent review | head`: the reader goes away first; no broken-pipe error, exit code 0."""
    import subprocess
    import sys

    site_dir, _, _ = held
    argv = [sys.executable, "-m", "site_agent.cli", "review", "--site-dir", str(site_dir)]
    process = subprocess.Popen(argv, stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    process.stdout.close()  # closed before the command has started writing
    stderr = process.stderr.read().decode()
    assert process.wait(timeout=120) == 0
    assert stderr == ""
