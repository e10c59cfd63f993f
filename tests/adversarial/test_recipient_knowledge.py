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


def test_a_count_withheld_to_protect_another_is_known_not_to_be_small(tmp_path: Path) -> None:
    """Item 4: primary suppression runs first, so a count withheld by the complementary rule or by the audit
    was not small: 0 or at least k (at least k when zeros are hidden). Eleven children aged 24-29 months with
    the condition, one scoring at the threshold: the band's positives (11) are shown, its tp (1) is withheld
    for the minimum cell size and its fn (10) to protect tp. A recipient who knows the rule reads fn in
    {0} or 10.. and tp in 1..9 with tp + fn = 11: fn = 10 and tp = 1, unless the site withholds more."""
    split = [(25, "f", 3, 1)] + [(24 + i % 6, "mf"[i % 2], 0, 1) for i in range(10)]
    for allow_zero in (True, False):
        world = World(tmp_path / str(allow_zero), records(small=split), allow_zero=allow_zero)
        neutral(world)
        release = world.ask("neutral", "s", "--analyses", "confusion,subgroups", "--subgroup", "age_months=24,30")
        assert release is not None
        level = release["results"]["subgroups"]["variables"][0]["levels"][1]
        assert level["level"] == {"low": 24.0, "high": 30.0}
        # the scenario's premise: tp withheld for its size (the first rule the recipient reads)
        assert level["confusion"][0]["suppressed_by"]["tp"] == "minimum_cell_size"
        low, high = oracle_interval(world, lambda c: 24 <= c[0] < 30 and c[3] == 1 and c[2] >= 2)
        assert high - low >= 1, (allow_zero, low, high)


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
    site of 400 participants. The primary 2x2 table and the flow stay whole; whatever had to give is cut back
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


def test_what_a_site_cut_back_reaches_the_coordinator_in_words(tmp_path: Path, capsys) -> None:
    """Issue 13, item 1: eleven false positives, one of them a girl's. Her cell is withheld for the minimum
    cell size and the boys' (ten) as its complement; the 2x2 table's false positives then give hers exactly
    (eleven less "at least ten"), and only a 2x2 cell could hide it. So the site cuts the subgroups by sex
    back; analyze (terminal and JSON) and the report's flow section say so in the site's words, never a
    count. The recipient's interval for her cell (the world's own integer programs) keeps two values."""
    data = [(40 + i, "f" if i == 0 else "m", 2 + (i > 0), 0) for i in range(11)]  # the false positives
    for sex in ("f", "m"):
        data += [
            (40 + i % 20, sex, item, outcome)
            for item, outcome, n in ((0, 0, 30), (3, 1, 25), (1, 1, 15))
            for i in range(n)
        ]
    world = World(tmp_path, data)
    neutral(world)
    release = world.ask("neutral", "one", "--analyses", "confusion,subgroups", "--subgroup", "sex")
    assert release is not None and [cut["analysis"] for cut in release.get("cut_back", [])] == ["subgroups.sex"]
    assert release["results"]["confusion"][0]["suppressed"] == []
    assert release["results"]["confusion"][0]["cells"]["fp"] == 11
    low, high = oracle_interval(world, lambda cell: cell[1] == "f" and cell[2] >= 2 and cell[3] == 0)
    assert high - low >= 1, (low, high)
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
        assert not any(ch.isdigit() for ch in cut["rule"].replace("2x2", "") + cut["action"])  # words, no count
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


def _delong_pairs(positive: np.ndarray, negative: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """DeLong et al. (1988) straight from the definition, over all m x n pairs (psi = 1, 1/2 on a tie, 0):
    the AUC and the structural components V10 (per positive) and V01 (per negative)."""
    psi = (positive[:, None] > negative[None, :]) + 0.5 * (positive[:, None] == negative[None, :])
    return float(psi.mean()), psi.mean(axis=1), psi.mean(axis=0)


def _as_records(bands: list[dict], total_positive: int, total_negative: int) -> tuple[list[int], list[float]]:
    """(outcome, band index) per record, as a recipient reads each model's released bands: a run from the
    first to the last band with a withheld count is one band holding the totals minus the other bands."""
    hidden = [j for j, b in enumerate(bands) if b["positive"] is None or b["negative"] is None]
    groups = [(b["positive"], b["negative"]) for b in bands]
    if hidden:
        first, last = hidden[0], hidden[-1]
        outside = groups[:first] + groups[last + 1 :]
        middle = (total_positive - sum(p for p, _ in outside), total_negative - sum(n for _, n in outside))
        groups = groups[:first] + [middle] + groups[last + 1 :]
    labels, index = [], []
    for j, (p, n) in enumerate(groups):
        labels += [1] * p + [0] * n
        index += [float(j)] * (p + n)
    return labels, index


def test_a_crafted_comparison_model_gives_nothing_through_the_paired_aucs(tmp_path: Path) -> None:
    """Item 5 for the paired comparison (R11 in docs/threat-model.md): the comparison model is a logistic
    scorecard whose risk is about 1 inside the small age band only. From record-level scores its AUC would be
    1/2 + s/(2m), which gives the band's count s with the condition exactly (played below with scikit-learn on
    the records). The release computes every paired statistic from its own bands instead: each is recomputed
    here from the release file alone (scikit-learn's roc_auc_score and the DeLong structural components over
    all pairs), no other statistic travels, and the small group stays uncertain for a recipient who holds
    every released count (the integer programs of tests/adversarial/world.py)."""
    world = World(tmp_path, records(small=SMALL))
    world.scorecard(
        "screen",
        {"kind": "points", "points": {"item": {"1": 1, "2": 2, "3": 3}}},
        2,
        lambda a, s, i: float(i),
    )
    inside = {str(age): 12.0 for age in range(24, 30)}

    def crafted(a: int, s: str, i: int) -> float:
        return float(1 / (1 + np.exp(-(-6.0 + (12.0 if 24 <= a < 30 else 0.0)))))

    world.scorecard("crafted", {"kind": "logistic", "intercept": -6.0, "points": {"age_months": inside}}, 0.5, crafted)
    # What a record-level AUC of the comparison model would have told: s = (2 AUC - 1) m, exactly.
    data = world.data
    outcome = np.array([o for *_, o in data])
    record_level = roc_auc_score(outcome, [crafted(a, s, i) for a, s, i, _ in data])
    assert round((2 * record_level - 1) * outcome.sum()) == len(SMALL)

    release = world.ask("screen", "s", "--analyses", "confusion,paired", compare="crafted")
    assert release is not None
    paired = release["results"]["paired"]
    statistics = {"auc_model", "auc_compare", "auc_model_se", "auc_compare_se", "auc_correlation", "auc_covariance"}
    statistics |= {"auc_difference", "auc_difference_se", "auc_difference_ci_low", "auc_difference_ci_high"}
    counts = {"diseased", "non_diseased", "model_bands", "compare_bands", "joint"}
    words = {"compare_bundle_sha256", "threshold", "compare_threshold", "rule", "bands_rule", "method"}
    structure = {"edges", "joint_bands", "suppressed", "suppressed_by"}
    assert set(paired) == statistics | counts | words | structure  # nothing else travels
    # the crafted model's one small band is merged away: one band, so no AUC at all (it would restate totals)
    assert len(paired["compare_bands"]) == 1 and paired["auc_compare"] is None
    assert paired["auc_model"] is not None
    _check_paired_statistics(paired)
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)
    # An honest comparison model at a fresh site: its statistics are recomputed the same way.
    world = World(tmp_path / "honest", records(small=SMALL))
    world.scorecard("screen", {"kind": "points", "points": {"item": {"1": 1, "2": 2, "3": 3}}}, 2, lambda a, s, i: i)
    world.scorecard(
        "other",
        {"kind": "logistic", "intercept": -2.0, "weights": {"item": 0.9}, "points": {"sex": {"f": 0.4}}},
        0.5,
        lambda a, s, i: float(1 / (1 + np.exp(-(-2.0 + 0.9 * i + (0.4 if s == "f" else 0.0))))),
    )
    second = world.ask("screen", "t", "--analyses", "confusion,paired", compare="other")
    assert second is not None and second["results"]["paired"]["auc_compare"] is not None
    _check_paired_statistics(second["results"]["paired"])
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def _check_paired_statistics(paired: dict) -> None:
    """Every statistic of a released paired section, recomputed from its counts alone."""
    m, n = paired["diseased"]["total"], paired["non_diseased"]["total"]
    found = {}
    for which in ("model", "compare"):
        labels, index = _as_records(paired[f"{which}_bands"], m, n)
        found[which] = _delong_pairs(
            np.array([x for x, y in zip(index, labels, strict=True) if y == 1]),
            np.array([x for x, y in zip(index, labels, strict=True) if y == 0]),
        )
        if paired[f"auc_{which}"] is not None:
            assert paired[f"auc_{which}"] == pytest.approx(roc_auc_score(labels, index), abs=1e-12)
            auc, v10, v01 = found[which]
            se = np.sqrt(v10.var(ddof=1) / len(v10) + v01.var(ddof=1) / len(v01))
            assert paired[f"auc_{which}_se"] == pytest.approx(se, rel=1e-9)
    if paired["auc_correlation"] is not None:  # from the joint table: every cell is released
        joint = paired["joint"]
        rows, columns, labels = [], [], []
        for group, label in (("diseased", 1), ("non_diseased", 0)):
            for i, row in enumerate(joint[group]):
                for j, cell in enumerate(row):
                    rows += [i] * cell
                    columns += [j] * cell
                    labels += [label] * cell
        rows_a, columns_a, labels_a = np.array(rows, float), np.array(columns, float), np.array(labels)
        a = _delong_pairs(rows_a[labels_a == 1], rows_a[labels_a == 0])
        b = _delong_pairs(columns_a[labels_a == 1], columns_a[labels_a == 0])
        covariance = np.cov(a[1], b[1])[0, 1] / m + np.cov(a[2], b[2])[0, 1] / n
        variance = [x[1].var(ddof=1) / m + x[2].var(ddof=1) / n for x in (a, b)]
        assert paired["auc_correlation"] == pytest.approx(covariance / np.sqrt(variance[0] * variance[1]), rel=1e-9)
        se = (paired["auc_model_se"], paired["auc_compare_se"])
        assert paired["auc_covariance"] == pytest.approx(paired["auc_correlation"] * se[0] * se[1], rel=1e-9)
        difference_se = np.sqrt(se[0] ** 2 + se[1] ** 2 - 2 * paired["auc_covariance"])
        assert paired["auc_difference_se"] == pytest.approx(difference_se, rel=1e-9)
    else:
        assert paired["auc_difference_se"] is None and paired["auc_covariance"] is None
