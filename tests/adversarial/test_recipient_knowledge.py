"""Each thing a recipient knows (docs/threat-model.md, "What the recipient knows"), played through the real
command lines against records of our own making: the small group (three children aged 24-29 months, all with
the condition) must never be worked out. The recipient's interval is recomputed independently by
tests/adversarial/world.py (its own enumeration of record types and integer programs, scipy.optimize.milp)."""

from __future__ import annotations

import html
import json
from pathlib import Path

import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from federation.cli import main as federation

from .world import World, oracle_interval, records

SMALL = [(25, "f", 1, 1), (27, "m", 2, 1), (28, "f", 0, 1)]  # three children aged 24-29 months, all positive


def neutral(world: World) -> None:
    # A model that reads only the item: its score says nothing about age.
    card = {"kind": "points", "points": {"item": {"2": 1, "3": 1}}}
    world.scorecard("neutral", card, 1, lambda a, s, i: float(i >= 2))


def in_small_band(cell: tuple) -> bool:
    return 24 <= cell[0] < 30 and cell[3] == 1


def test_age_bands_asked_in_two_studies_do_not_give_the_small_band(tmp_path: Path) -> None:
    """Item 1: the audit's scope is the site. Age bands 0/24/48 in one study and 0/30/48 in another would
    give the 24-29 count by subtraction; the second release must withhold enough (or be refused)."""
    world = World(tmp_path, records(small=SMALL))
    neutral(world)
    first = world.ask("neutral", "study-one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=24,48")
    assert first is not None
    world.ask("neutral", "study-two", "--analyses", "confusion,subgroups", "--subgroup", "age_months=30,48")
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)  # at least two values remain possible


def _suppressed_lists(node: object, path: str = "") -> list[tuple[str, dict]]:
    if isinstance(node, dict):
        found = [(path, node)] if "suppressed" in node and isinstance(node["suppressed"], list) else []
        return found + [x for k, v in node.items() for x in _suppressed_lists(v, f"{path}.{k}")]
    if isinstance(node, list):
        return [x for i, v in enumerate(node) for x in _suppressed_lists(v, f"{path}[{i}]")]
    return []


def test_every_withheld_count_names_its_rule(tmp_path: Path) -> None:
    """Item 4: the release's suppressed_by maps name the rule of every withheld count; the small group's
    cells are withheld for the minimum cell size and the release says so."""
    world = World(tmp_path, records(small=SMALL))
    neutral(world)
    release = world.ask("neutral", "s", "--analyses", "confusion,subgroups", "--subgroup", "age_months=24,30")
    assert release is not None
    parts = _suppressed_lists({"flow": release["flow"], "results": release["results"]})
    assert parts
    for path, part in parts:
        assert set(part["suppressed_by"]) == set(part["suppressed"]), path
        assert set(part["suppressed_by"].values()) <= {"minimum_cell_size", "complementary", "audit", "coarsened"}
    level = release["results"]["subgroups"]["variables"][0]["levels"][1]  # 24-29 months: three, all positive
    assert level["level"] == {"low": 24.0, "high": 30.0}
    assert level["analysed_positive"] is None and level["suppressed_by"]["analysed_positive"] == "minimum_cell_size"


def test_a_band_outside_the_schema_range_is_known_to_be_empty(tmp_path: Path) -> None:
    """Item 3: ages are whole months from 0, so a band below 0 (or between two whole months) holds nobody,
    and the recipient knows it. Bands at 0/24/30: the 24-29 group is withheld, and the fixed complementary
    rule withholds the first level too; if that level is the empty one, the total minus the shown levels is
    the small count unless the audit knows the band is empty."""
    world = World(tmp_path, records(small=SMALL))
    neutral(world)
    release = world.ask("neutral", "one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=0,24,30")
    assert release is not None
    levels = release["results"]["subgroups"]["variables"][0]["levels"]
    assert levels[2]["level"] == {"low": 24.0, "high": 30.0} and levels[2]["analysed_positive"] is None
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_a_study_asking_for_everything_keeps_the_primary_table(tmp_path: Path, capsys) -> None:
    """Issue 13, item 1: every analysis, a second reference that is often blank and a paired comparison, at a
    site of 400 participants. The primary 2x2 table and the flow stay whole; what had to give is cut back
    in words (no count), and the hidden small group still cannot be worked out."""
    data = records(small=SMALL)
    rng = np.random.default_rng(5)
    second = [("" if rng.random() < 0.4 else str(o if rng.random() < 0.85 else 1 - o)) for *_, o in data]
    world = World(tmp_path, data, reference2=second)
    # The short form calls a child positive from 24 months, the full-length form from 30: the paired table's
    # discordant cell with the condition is the small group (the audit knows both models, and that is what
    # has to give).
    world.scorecard(
        "short",
        {"kind": "logistic", "intercept": -24.0, "weights": {"item": 0.1, "age_months": 1.0}},
        0.5,
        lambda a, s, i: 1 / (1 + np.exp(-(-24.0 + 0.1 * i + 1.0 * a))),
    )
    world.scorecard("long", {"kind": "points", "weights": {"age_months": 1}}, 30, lambda a, s, i: float(a))
    everything = "confusion,roc,calibration,margin,agreement,subgroups,paired"
    release = world.ask(
        "short",
        "full",
        "--analyses",
        everything,
        "--subgroup",
        "age_months=12,24,30,48",
        "--subgroup",
        "sex",
        compare="long",
    )
    assert release is not None
    primary = release["results"]["confusion"][0]
    assert primary["threshold"] == 0.5 and primary["suppressed"] == [], primary
    assert release["flow"]["suppressed"] == []
    for cut in release.get("cut_back", []):
        assert set(cut) == {"analysis", "action", "rule"}
        assert not any(ch.isdigit() for ch in cut["rule"].replace("2x2", "") + cut["action"])  # words, no count
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)
    # The coordinator is told the same in words: analyze (terminal and JSON) and the report's flow section.
    assert release.get("cut_back"), "this request costs the site more than the primary table allows"
    store = str(tmp_path / "study.db")
    assert federation(["enrol", "--store", store, "--site-id", "site-a", "--key", str(world.site / "site.pub")]) == 0
    assert federation(["ingest", "--store", store, str(tmp_path / "release-0.json")]) == 0
    capsys.readouterr()
    assert federation(["analyze", "--store", store, "--json"]) == 0
    site = json.loads(capsys.readouterr().out)["sites"][0]
    assert site["cut_back"] == release["cut_back"]
    assert federation(["analyze", "--store", store]) == 0
    summary = capsys.readouterr().out
    assert "cut back so that each site's primary 2x2 table could be released" in summary
    line = next(text for text in summary.splitlines() if text.startswith("  site-a "))
    for cut in release["cut_back"]:
        assert f"{cut['analysis']}: {cut['action']}" in line and cut["rule"] in summary
    assert federation(["report", "--store", store, "--out", str(tmp_path / "report.html")]) == 0
    page = (tmp_path / "report.html").read_text()
    assert "Cut back by the sites" in page and all(html.escape(cut["rule"]) in page for cut in release["cut_back"])


def test_derived_statistics_tell_nothing_the_released_counts_do_not(tmp_path: Path) -> None:
    """Item 5: a crafted logistic scorecard whose risk is a distinct value for every month of age. An AUC or
    an expected total computed from record-level risks would be a further equation in those ages; here each
    is recomputed from the release's own bands (scikit-learn's roc_auc_score on the band of each record,
    expected = count x bin midpoint), and the small group stays uncertain."""
    world = World(tmp_path, records(small=SMALL))

    def risk(a: int, s: str, i: int) -> float:
        return float(1 / (1 + np.exp(-(-3.0 + 0.05 * a))))

    card = {"kind": "logistic", "intercept": -3.0, "weights": {"age_months": 0.05}}
    world.scorecard("crafted", card, 0.5, risk)
    release = world.ask("crafted", "s", "--analyses", "confusion,roc,calibration")
    assert release is not None
    roc, calibration = release["results"]["roc"], release["results"]["calibration"]
    assert roc["auc"] is not None and calibration["expected"] is not None
    if roc["auc"] is not None:
        labels, bands = [], []
        for j, band in enumerate(roc["bands"]):
            labels += [1] * band["positive"] + [0] * band["negative"]
            bands += [j] * (band["positive"] + band["negative"])
        assert roc["auc"] == pytest.approx(roc_auc_score(labels, bands), abs=1e-12)
    if calibration["expected"] is not None:
        middle = [((b["low"] or 0.0) + (b["high"] if b["high"] is not None else 1.0)) / 2 for b in calibration["bands"]]
        total = sum((b["events"] + b["non_events"]) * m for b, m in zip(calibration["bands"], middle, strict=True))
        assert calibration["expected"] == pytest.approx(total, rel=1e-12)
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)
