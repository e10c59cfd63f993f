"""``make bench``'s history stage on a short history: what it records and prints.

The stage is the evidence for the audit's cost figures in README.md and DEVELOPERS.md, so its accounting is
checked here on a history of four releases (seconds, not minutes): the rows' sizes and ratios, and a request
the site refuses against the whole history (timed and counted, then the next request timed in the rows).
"""

from __future__ import annotations

from pathlib import Path

import pytest

from federation.protocol import PolicyViolation
from simulations.bench import __main__ as bench_main
from simulations.bench import audit as bench_audit


def test_the_history_stage_times_a_refused_request_and_the_release_after_it(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    real = bench_audit._protect
    asked: list[str] = []

    def refuse_the_first_new(site, counts, earlier, label):  # noqa: ANN001, ANN202
        # the site's own protect step throughout; the first request after the history is refused as the audit
        # refuses one (a PolicyViolation), so that the stage's handling of a refusal runs
        asked.append(label)
        if label == "new" and asked.count("new") == 1:
            raise PolicyViolation("release withheld by the site's disclosure audit")
        return real(site, counts, earlier, label)

    monkeypatch.setattr(bench_audit, "_protect", refuse_the_first_new)
    result = bench_audit.run_history(tmp_path, sizes=(0, 4), repeats=1)

    assert result["history_requests"] == 4 and result["history_refused"] == 0
    assert [row["earlier_releases"] for row in result["rows"]] == [0, 4]
    assert all(row["outcome"].startswith("released") for row in result["rows"])
    base = result["rows"][0]["seconds"]
    assert result["rows"][1]["ratio_to_no_history"] == round(result["rows"][1]["seconds"] / max(base, 1e-3), 1)
    # request 5 refused (timed, counted), request 6 timed in the rows
    assert [r["request"] for r in result["refused"]] == [5] and result["refused"][0]["seconds"] >= 0
    assert result["new_release"].startswith("request 6 ")
    table = bench_main._table({"audit_history": result})
    assert "request 5 (" in table and "(refused)" in table
    assert table.count("disclosure audit, site history") == 3
