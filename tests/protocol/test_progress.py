"""Progress for people at a terminal: the records-read callback counts every record, and nothing is drawn
when stderr is not a terminal (pipes, logs, ``--json``)."""

from __future__ import annotations

import io
import json

from rich.console import Console

from federation.protocol.progress import SiteTable, records_progress
from simulations.demo import prepare_study
from site_agent.config import load_site
from site_agent.runner import preview_request, run_request


def test_progress_counts_every_record_read(tmp_path):
    study = prepare_study(tmp_path / "demo")
    site = load_site(study.site_dirs[0])
    seen: list[int] = []
    preview = preview_request(site, study.request_bytes, study.bundle_bytes, chunk_rows=700, progress=seen.append)
    assert len(seen) >= 2 and max(seen) <= 700  # one call per chunk, of at most chunk_rows records
    assert sum(seen) == preview.release.flow["read"]
    seen.clear()
    outcome = run_request(site, study.request_bytes, study.bundle_bytes, chunk_rows=700, progress=seen.append)
    assert sum(seen) == json.loads(outcome.release_bytes)["flow"]["read"]


def test_nothing_is_drawn_off_a_terminal():
    with records_progress() as progress:  # pytest captures stderr: not a terminal
        assert progress is None


def test_site_table_shows_each_site_and_the_count_answered():
    table = SiteTable("study s")
    out = io.StringIO()
    table.console = Console(file=out, width=100, force_terminal=False)
    with table:
        table.update({"a": {"status": "waiting", "reason": ""}, "b": {"status": "waiting", "reason": ""}})
        table.update({"a": {"status": "released", "reason": ""}, "b": {"status": "refused", "reason": "policy: no"}})
    text = out.getvalue()
    assert "sites answered 2/2" in text and "policy: no" in text and "released" in text
