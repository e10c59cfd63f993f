"""The review page a board member reads (site_agent.review, site_agent.plain), checked in headless Chromium.

Data: scikit-learn's bundled breast-cancer records (Wolberg et al., UCI) as one site (tests/breast_cancer.py),
with a full request (flow, screen result, score bands, calibration, subgroups) and a site policy strict enough
that counts are withheld. Every check reads the page as rendered by a real browser.
"""

from __future__ import annotations

import json
import re
from pathlib import Path

import pytest

from federation.cli import main as federation
from site_agent import plain
from site_agent.cli import main as site_agent
from tests.report.dom import ARTIFACTS, parse, render

from .. import breast_cancer

# An internal count name: an analysis followed by "." or "[" (subgroups.x[1].roc.band[2].positive, flow.read).
INTERNAL = re.compile(r"\b(flow|confusion|roc|calibration|margin|subgroups|agreement|paired)[.\[]")


@pytest.fixture(scope="module")
def held_full(tmp_path_factory: pytest.TempPathFactory) -> tuple[Path, str, Path]:
    """A site that requires approval and withholds counts under 20, after one full request: (site, id, root)."""
    root = tmp_path_factory.mktemp("review-page")
    study = breast_cancer.build(root / "study")
    request = root / "request.json"
    args = ["request", "new", "--store", str(root / "study.db"), "--study-id", "bc-review"]
    args += ["--bundle", str(study.bundle_path), "--sign", str(study.coordinator_key), "--out", str(request)]
    args += ["--analyses", "confusion,roc,calibration,subgroups", "--subgroup", "mean_radius=14"]
    assert federation(args) == 0
    site_dir = root / "site"
    assert (
        site_agent(["init", "--site-id", "s0", "--trust", str(study.coordinator_pub), "--site-dir", str(site_dir)]) == 0
    )
    approve = ["model", "approve", str(study.bundle_path), "--site-dir", str(site_dir), "--by", "site IT"]
    assert site_agent(approve) == 0
    config = site_dir / "site.toml"
    text = config.read_text().replace("require_approval = false", "require_approval = true")
    text = re.sub(r"(?m)^min_cell_size = \d+", "min_cell_size = 20", text)
    text = text.replace('allowed_subgroups = ["age_months", "sex"]', 'allowed_subgroups = ["mean_radius"]')
    config.write_text(text)
    run = ["run", "--site-dir", str(site_dir), "--request", str(request), "--bundle", str(study.bundle_path)]
    run += ["--data", str(study.site_csvs[0]), "--out", str(root / "release.json")]
    assert site_agent(run) == 3
    held_id = next((site_dir / "held").glob("*.review.json")).name.split(".")[0]
    return site_dir, held_id, root


def _visible_text(html_file: Path, screenshot: Path) -> tuple[str, object]:
    """The page's text as Chromium rendered it, without the exact release text (a <pre> inside <details>)."""
    dom = parse(render(html_file, screenshot, height=3000))
    full = parse(render(html_file))
    for node in dom.iter():
        node.children = [c for c in node.children if isinstance(c, str) or c.tag not in ("pre", "style", "title")]
    return " ".join(dom.text().split()), full


def test_the_review_page_reads_in_plain_words(held_full) -> None:  # noqa: ANN001
    site_dir, held_id, root = held_full
    page = root / "review.html"
    assert site_agent(["review", "--site-dir", str(site_dir), "--html", str(page)]) == 0
    text, dom = _visible_text(page, ARTIFACTS / "review-page.png")
    review = json.loads((site_dir / "held" / f"{held_id}.review.json").read_text())
    release = json.loads((site_dir / "held" / f"{held_id}.json").read_text())

    assert not INTERNAL.search(text), INTERNAL.search(text).group(0)  # no internal count names
    assert "regions" not in text and "linear facts" not in text
    # one collapsible part per analysis, in plain words, with the reference-standard split as columns
    summaries = [" ".join(s.text().split()) for s in dom.iter("summary")]
    for title in (
        "Participant flow",
        "Screen result against the reference standard",
        "Scores in bands",
        "Predicted risk against what was observed",
        "The same analyses within subgroups",
    ):
        assert any(s.startswith(title) for s in summaries), title
    assert "with the condition" in text and "without the condition" in text
    # every withheld count has one sentence naming its rule and, from the audit, what can still be told of it
    suppressed = review["suppressed"]
    assert suppressed, "the strict policy must withhold something here"
    sentences = [" ".join(li.text().split()) for li in dom.iter("li")]
    rules = ("minimum cell size", "withheld as well", "disclosure audit", "cut back")
    withheld = [s for s in sentences if any(rule in s for rule in rules) and ":" in s]
    assert len(withheld) == len(suppressed)
    for interval in review["audit"]["intervals"]:
        high = "or more" if interval["high"] is None else f"to {interval['high']}"
        assert re.search(rf"\b{interval['low']} {high}", text), interval
    # the model the release came from, the decision still open, a glossary of what remains abbreviated
    assert release["bundle_sha256"] in text and "“model”" in text
    # Every field of the policy the release states, and who asked (found by following the board's guide: the
    # page showed the cell size and width alone, not which subgroups, how many requests or whose keys).
    policy = release["policy"]
    assert re.search(r"subgroups allowed\s*mean_radius\s*narrowest", text)
    assert f"at most {policy['max_requests_per_study']} per study (refusals count)" in text
    assert f"in at most {policy['max_studies']} studies" in text
    assert all(key in text for key in policy["trusted_coordinator_keys"]) and policy["trusted_coordinator_keys"]
    assert ", ".join(policy["allowed_analyses"]) in text
    request = json.loads((root / "request.json").read_text())
    assert f"the coordinator key {request['coordinator_key_id']} (it signed the request" in text
    assert "Not decided yet" in text and f"site-agent approve {held_id}" in " ".join(dom.text().split())
    glossary = " ".join(" ".join(d.text().split()) for d in dom.iter("dt"))
    assert "AUC" in glossary and "SHA-256" in glossary
    # what the audit's searches did not cover, one line each from the audit's record, and what no audit models
    gaps = review["audit"]["not_searched"]
    assert "What the audit did not search:" in text
    assert sum(s.startswith("Not modelled by any audit") for s in sentences) == 1
    for gap in gaps:
        said = {
            "unions": f"whether {gap.get('size')} or more finest groups together",
            "across_groups": f"Audited in {gap.get('groups')} parts",
            "whole_numbers": f"({gap.get('atoms')} finest groups, beyond the {gap.get('limit')}",
        }[gap["kind"]]
        assert sum(said in s for s in sentences) == 1, said
    assert ("Every search of the audit ran in full." in text) == (not gaps)
    assert ("finest group" in glossary) == bool(gaps)
    # the withheld cells of the screen-result table are marked, never shown as a number or a dash
    for cell in dom.iter("td"):
        if "withheld" in cell.classes():
            assert cell.text().strip() == "withheld"


def test_the_page_says_who_decided_and_why(held_full) -> None:  # noqa: ANN001
    site_dir, held_id, root = held_full
    why = "counts checked against the board's protocol"
    assert site_agent(["approve", held_id, "--site-dir", str(site_dir), "--by", "A. Member", "--reason", why]) == 0
    page = root / "decided.html"
    assert site_agent(["review", "--site-dir", str(site_dir), "--all", "--html", str(page)]) == 0
    text, _ = _visible_text(page, ARTIFACTS / "review-page-decided.png")
    assert "Approved by A. Member on" in text and f"Reason given: {why}" in text


def test_the_review_shows_statistics_as_the_summary_does(held_full, capsys) -> None:  # noqa: ANN001
    # Decimals of the coordinator's terminal summary (federation/summary.py): AUC and its SE 3, O:E and the
    # calibration intercept 2; counts as whole numbers; nothing a person reads to four decimals.
    site_dir, held_id, _ = held_full
    results = json.loads((site_dir / "held" / f"{held_id}.json").read_text())["results"]
    roc, calibration = results["roc"], results["calibration"]
    capsys.readouterr()
    assert site_agent(["review", "--site-dir", str(site_dir), "--all"]) == 0
    out = capsys.readouterr().out
    # The AUC from the released bands and its SE to three decimals, as the summary prints them (until
    # 2026-12-05 this site withheld every band's count with the condition, and no AUC was shown).
    assert roc["auc"] is not None and roc["auc_se"] is not None
    assert f"AUC {roc['auc']:.3f} (standard error {roc['auc_se']:.3f})" in out
    assert not re.search(r"AUC \d\.\d{4}", out) and "standard error 0.000" not in out
    observed, expected = calibration["observed"], calibration["expected"]
    assert f"{observed:g} participants with the condition against {expected:.1f} " in out
    assert float(observed).is_integer() and f"{observed:g}" == str(int(observed))
    assert f"(O:E ratio {calibration['observed_expected_ratio']:.2f})" in out
    assert f"Calibration intercept {calibration['calibration_intercept']:.2f}." in out
    assert not re.search(r"\d\.\d{4}", out), re.search(r"\S*\d\.\d{4}\S*", out).group(0)


def test_the_text_review_is_short_and_plain(held_full, capsys) -> None:  # noqa: ANN001
    site_dir, held_id, _ = held_full
    capsys.readouterr()
    assert site_agent(["review", "--site-dir", str(site_dir), "--all"]) == 0
    out = capsys.readouterr().out
    assert not INTERNAL.search(out)
    assert "Withheld, and why" in out and "Disclosure audit" in out and "with the condition" in out
    assert len(out.splitlines()) < 400
    exact = (site_dir / "held" / f"{held_id}.json").read_text()
    assert exact not in out
    assert site_agent(["review", "--site-dir", str(site_dir), "--all", "--exact"]) == 0
    assert exact in capsys.readouterr().out


def test_every_released_agreement_count_has_its_own_words_on_the_page() -> None:
    """Found by following the ethics board's guide: a second reference standard that is missing, and one that is
    known (0 or 1), were both worded "negative", so the plain table kept the first count of each pair and showed
    the others as withheld while they left the site. Each state has its words now, every released value appears,
    and a paired band's open end is not called "screen +" (only a 2x2 table's threshold is)."""
    from site_agent.plain import analysis_parts, condition_words

    def count(name: str, value: int, outcome: str, state: list[str], call: dict) -> dict:
        where = [
            {"variable": "status", "values": ["analysed"]},
            {"variable": "score", **call},
            {"variable": "outcome", "values": [outcome]},
            {"variable": "reference2", "values": state},
        ]
        return {"name": name, "value": value, "where": where}

    above = {"low": 0.5, "high": None}
    counts = [
        count("agreement[0].model1_reference1_reference2missing", 1369, "1", ["missing"], above),
        count("agreement[0].model1_reference1_reference20", 23, "1", ["0"], above),
        count("agreement[0].model1_reference1_reference21", 93, "1", ["1"], above),
        count("agreement[0].model_reference.11", 1346, "1", ["0", "1"], above),
    ]
    (part,) = analysis_parts({"counts": counts}, {})
    shown = {cell for table in part.tables for row in table.rows for cell in row}
    assert {"1369", "23", "93", "1346"} <= shown, shown
    assert condition_words({"variable": "reference2", "values": ["missing"]}) == "second reference standard missing"
    assert condition_words({"variable": "reference2", "values": ["0", "1"]}) == "second reference standard known"
    band = {"variable": "score.compare", "low": 12.0, "high": None}
    assert "screen" not in condition_words(band, "paired")
    assert condition_words({"variable": "score", "low": 0.5, "high": None}, "confusion").startswith("screen +")


def test_what_the_audit_did_not_search_is_said_in_one_line_each() -> None:
    audit = {"ok": True, "releases_considered": 3, "protection_width": 2}
    assert plain.unsearched_sentences(audit) == []  # recorded before the audit listed its searches: nothing said
    assert "with the 2 earlier releases of this site, to any study" in plain.audit_sentence(audit)
    gaps = [
        {"kind": "unions", "size": 7, "parts": 2, "largest": 88},
        {"kind": "across_groups", "groups": 4},
        {"kind": "whole_numbers", "atoms": 387, "limit": 60, "narrow": 1, "withheld_up_to": 400},
    ]
    lines = plain.unsearched_sentences({**audit, "not_searched": gaps})
    assert lines[:3] == [
        "Not searched in full: whether 7 or more finest groups together could be worked out, in 2 sets of counts "
        "tied together (the largest ties 88 finest groups whose counts are not known); smaller unions were searched.",
        "Audited in 4 parts (a long history): unions that take finest groups of two parts were not searched.",
        "Worked over real numbers and rounded, not by whole-number programs (387 finest groups, beyond the 60 those "
        "programs take): a count that only whole numbers pin down was not searched for (withheld counts tied to at "
        "most 400 finest groups were each decided over whole numbers); 1 withheld count kept so few values that "
        "whole numbers could matter.",
    ]
    assert lines[3].startswith("Not modelled by any audit") and len(lines) == 4
    atoms = {"kind": "whole_numbers", "atoms": 76, "limit": 60, "narrow": 0, "withheld_up_to": 400}
    atoms |= {"atoms_up_to": 400, "atoms_stopped": 2}
    assert plain.unsearched_sentences({**audit, "not_searched": [atoms]})[0] == (
        "Worked over real numbers and rounded, not by whole-number programs (76 finest groups, beyond the 60 those "
        "programs take): a count that only whole numbers pin down was not searched for (withheld counts tied to at "
        "most 400 finest groups and each finest group in a set of at most 400 tied together were each decided over "
        "whole numbers); for 2 finest groups the whole-number programs stopped at their limit."
    )
    assert plain.unsearched_sentences({**audit, "not_searched": []})[0] == "Every search of the audit ran in full."


def test_a_long_row_label_is_wrapped_never_cut() -> None:
    """Found by following the board's guide: the terminal page cut row labels at 72 characters, so two subgroup
    rows that differ only at their end read alike."""
    from site_agent import plain
    from site_agent.review import LABEL_WIDTH, _text_table

    long = " ".join(["scores at or above 0.25 and below 0.5, aged 24 to 35 months, sex coded 2"] * 2)
    assert len(long) > LABEL_WIDTH
    table = plain.Table("caption", "what it counts", ["group", "number"], [[long, "12"], ["short", "withheld"]])
    lines = _text_table(table)
    assert not any(long in line for line in lines)  # split over lines ...
    words = " ".join(" ".join(line.split()) for line in lines[3:])
    assert words.startswith(long + " 12 short withheld")  # ... nothing of it lost, the number on its last line
    assert all(len(line) <= 2 + LABEL_WIDTH + 2 + len("withheld") for line in lines[1:])
