"""Studies that stress the report: suppressed sites, a second reference, a probability model, one site,
a tampered store, bad input; and any analysis JSON at all renders without an error."""

from __future__ import annotations

import csv
import io
import json
import sqlite3
from base64 import b64decode
from pathlib import Path

from hypothesis import given, settings
from hypothesis import strategies as st

from federation.report.analyses import render_json

from .dom import parse
from .studies import SECOND_REFERENCE_SITE, analyze_json, federation


def _csv_from_link(href: str) -> list[dict[str, str]]:
    assert href.startswith("data:text/csv;charset=utf-8;base64,")
    return list(csv.DictReader(io.StringIO(b64decode(href.split(",", 1)[1]).decode("utf-8"))))


def test_one_site_explains_instead_of_a_diamond(one_site_store: Path, tmp_path: Path) -> None:
    out = tmp_path / "one.html"
    result = federation("report", "--store", str(one_site_store), "--out", str(out), "--json")
    # Seven enrolled sites sent nothing: the report is written, and the exit code says results are partial.
    assert result.returncode == 3, result.stderr
    info = json.loads(result.stdout)
    analysis = analyze_json(one_site_store)
    assert len(info["sites"]) == 1 and len(info["enrolled_without_release"]) == 7
    # nothing was pooled, so no site is named as pooled (the analysis lists the site fit for pooling, too few)
    assert info["sites_pooled"] == [] and analysis["pooled"]["sensitivity"] is None
    assert len(analysis["pooled"]["sites_pooled"]) == 1

    dom = parse(out.read_text(encoding="utf-8"))
    note = dom.find_id("no-pooled-estimate")
    assert note is not None
    assert analysis["pooled"]["note"] in note.text()
    assert analysis["pooled"]["note"] == (
        "not estimable: 1 usable site(s); the bivariate random-effects model needs at least 4"
    )
    assert "too few to pool" in dom.find_id("summary").text()
    # the note does not contradict its own reason (it said "at least two sites" under "needs at least 4")
    assert "at least two sites" not in note.text()
    assert dom.find_id("pooled-sensitivity") is None  # no headline card for a pooled value
    figure = dom.find_id("fig-forest-sensitivity")
    assert figure is not None
    svg_text = "".join(t.text() for t in figure.iter("text"))
    assert "not pooled" in svg_text and "Pooled (random effects)" not in svg_text
    link = next(a for a in figure.iter("a") if a.attrs.get("download") == "forest-sensitivity.csv")
    rows = _csv_from_link(link.attrs["href"])
    assert [r["site"] for r in rows] == info["sites"]  # site rows only: no pooled row


def test_withheld_site_is_shown_as_withheld(demo_store: Path, demo_report: Path) -> None:
    analysis = analyze_json(demo_store)
    suppressed = [s["site_id"] for s in analysis["sites"] if s["suppressed"]]
    assert suppressed == ["skarrow-specialist"]
    dom = parse(demo_report.read_text(encoding="utf-8"))
    card = next(n for n in dom.iter("div") if n.attrs.get("data-site") == "skarrow-specialist")
    assert "withheld" in card.text() and "·" in card.text() and "suppressed" not in card.text()
    figure = dom.find_id("fig-forest-sensitivity")
    link = next(a for a in figure.iter("a") if a.attrs.get("download") == "forest-sensitivity.csv")
    rows = {r["site"]: r for r in _csv_from_link(link.attrs["href"])}
    # No estimate of its own, but the headline pools it (its withheld cells censored).
    assert rows["skarrow-specialist"]["estimate"] == "" and rows["skarrow-specialist"]["pooled"] == "True"
    pooled = analysis["pooled"]["sensitivity"]
    assert float(rows["pooled"]["estimate"]) == pooled["estimate"]
    for site in analysis["sites"]:
        if site["sensitivity"]:
            assert float(rows[site["site_id"]]["estimate"]) == site["sensitivity"]["estimate"]
    summary = dom.find_id("summary")
    assert "skarrow-specialist" in summary.text()


def test_second_reference_and_probability_model_sections(extended_report: tuple[Path, dict]) -> None:
    out, _ = extended_report
    dom = parse(out.read_text(encoding="utf-8"))
    agreement = dom.find_id("analysis-agreement")
    assert agreement is not None
    rows = [r for r in agreement.iter("tr") if r.children and SECOND_REFERENCE_SITE in r.text()]
    assert rows, "the site with a second reference has a row in the agreement table"
    calibration = dom.find_id("analysis-calibration")
    assert calibration is not None and "calibration" in calibration.text().lower()
    # The methods name what ran: the model's score is a probability and every asked analysis is listed.
    methods = " ".join(dom.find_id("methods").text().split())
    assert "score: probability" in methods
    assert "roc, calibration, margin, subgroups, agreement" in methods


def test_tampered_release_is_refused_with_exit_2(demo_store: Path, tmp_path: Path) -> None:
    copy = tmp_path / "tampered.db"
    copy.write_bytes(demo_store.read_bytes())
    db = sqlite3.connect(copy)
    key, document = db.execute("SELECT release_sha256, document FROM releases LIMIT 1").fetchone()
    altered = document.replace(b'"read": ', b'"read": 1', 1)  # a changed count, signature left as it was
    assert altered != document
    db.execute("UPDATE releases SET document = ? WHERE release_sha256 = ?", (altered, key))
    db.commit()
    db.close()
    out = tmp_path / "never.html"
    result = federation("report", "--store", str(copy), "--out", str(out))
    assert result.returncode == 2
    assert "signature does not verify" in result.stderr and len(result.stderr.strip().splitlines()) == 1
    assert not out.exists()
    # analyze and export refuse the same store (found by following the coordinator's guide: they printed and
    # wrote the altered count)
    for command in (("analyze", "--json"), ("export", "--out-dir", str(tmp_path / "never"))):
        result = federation(*command[:1], "--store", str(copy), *command[1:])
        assert result.returncode == 2, command
        assert "the store was altered after ingest" in result.stderr and not result.stdout.strip(), command
    assert not (tmp_path / "never").exists()


def test_bad_input_is_one_line_and_exit_1(demo_store: Path, tmp_path: Path) -> None:
    missing = federation("report", "--store", str(tmp_path / "absent.db"), "--out", str(tmp_path / "r.html"))
    assert missing.returncode == 1 and "study store not found" in missing.stderr
    # analyze says the same, and leaves no empty store behind (it used to make one and say it held 0 studies)
    missing = federation("analyze", "--store", str(tmp_path / "absent.db"))
    assert missing.returncode == 1 and "study store not found" in missing.stderr
    assert not (tmp_path / "absent.db").exists()
    assert not (tmp_path / "absent.db").exists()  # the report does not create an empty store
    unknown = federation("report", "--store", str(demo_store), "--study-id", "nope", "--out", str(tmp_path / "r.html"))
    assert unknown.returncode == 1 and "no study 'nope'" in unknown.stderr
    for result in (missing, unknown):
        assert len(result.stderr.strip().splitlines()) == 1 and "Traceback" not in result.stderr


JSON = st.recursive(
    st.none() | st.booleans() | st.integers(-(10**9), 10**9) | st.floats(allow_nan=True) | st.text(max_size=12),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=30,
)


@settings(max_examples=150, deadline=None)
@given(JSON)
def test_any_analysis_json_renders_as_escaped_html(value: object) -> None:
    html = render_json(value, "Some analysis <b>", "some-analysis")
    assert "<b>" not in html  # text from the JSON is escaped, never markup
    tree = parse(f"<div>{html}</div>")
    assert tree.children  # parses as HTML


def test_every_section_has_a_title_in_words_and_the_summary_gives_the_spread(
    demo_store: Path, demo_report: Path
) -> None:
    """Found by following the coordinator's guide: the headline model's own keys (model, tau_logit_sensitivity,
    correlation, sensitivity_analyses ...) and the sites' cut-backs each got a section headed by the bare key,
    saying only "Results the analysis holds under this name". They are shown where they belong; the between-site
    SDs and the correlation, with their intervals, are now in the summary."""
    dom = parse(demo_report.read_text(encoding="utf-8"))
    titles = [" ".join(h.text().split()) for h in dom.iter("h2")]
    assert titles and all(t[0].isupper() for t in titles), titles
    assert "Results the analysis holds under this name" not in dom.text()
    pooled = analyze_json(demo_store)["pooled"]
    summary = " ".join(dom.find_id("summary").text().split())
    for name in ("tau_logit_sensitivity", "tau_logit_specificity", "correlation"):
        entry = pooled[name]
        words = [f"{entry[k]:.3f}".replace("-", "−") for k in ("estimate", "ci_low", "ci_high")]
        assert f"{words[0]} on the log-odds scale (95% CI {words[1]} to {words[2]}" in summary or (
            name == "correlation" and f"correlation of {words[0]} (95% CI {words[1]} to {words[2]}" in summary
        ), name


def test_the_threshold_section_says_what_was_released_and_why_nothing_was_pooled(
    demo_store: Path, demo_report: Path
) -> None:
    """Found by following the coordinator's guide: with ROC bands released at every site the section still said
    the sites released the 2x2 "at one threshold only". It now counts what was released (the request's
    thresholds, or failing two of them the ROC band edges: federation.decisions.threshold_tables) and gives the
    analysis's own reason."""
    from federation.decisions import threshold_tables
    from federation.store import Store

    store = Store(demo_store)
    study = analyze_json(demo_store)["study_id"]
    tables, source = threshold_tables(store.releases(study))
    store.close()
    dom = parse(demo_report.read_text(encoding="utf-8"))
    text = " ".join(dom.find_id("threshold-choice").text().split())
    assert "at one threshold only" not in text
    where = "the edges of their ROC bands" if source == "roc_bands" else "their 2×2 tables"
    assert f"The sites released {len(tables)} threshold(s) between them ({where})" in text
    assert "no comparison of thresholds could be pooled: not estimable: fewer than 2 thresholds" in text
