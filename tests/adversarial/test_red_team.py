"""Attacks of issue 12 tried from outside, as a curious coordinator holding the coordinator's signing key: the
real command lines (``federation bundle pack``, ``federation request new``, ``site-agent run`` with the
default policy of ``site-agent init``) on records of our own making, with three children aged 24-29 months,
all with the condition. The recipient's interval for that count is recomputed independently by
tests/adversarial/world.py (its own enumeration of record types and integer programs, scipy.optimize.milp,
from the release files alone) and must keep at least ``protection_width`` = 2 whole numbers possible.

The recipient here uses every released *count*; it does not use the derived statistics (AUC, its standard
error, the expected total), which are not linear in the counts. Attacks through those are not defended yet
and are not played here (see docs/threat-model.md, residual risk R2).
"""

from __future__ import annotations

import math
from pathlib import Path

from .world import World, oracle_interval, records

SMALL = [(25, "f", 1, 1), (27, "m", 2, 1), (28, "f", 0, 1)]  # three children aged 24-29 months, all positive


def in_small_band(cell: tuple) -> bool:
    return 24 <= cell[0] < 30 and cell[3] == 1


def age_score(world: World, name: str, threshold: float) -> None:
    """A points scorecard whose score *is* the age in months (the recipient knows the model)."""
    world.scorecard(name, {"kind": "points", "weights": {"age_months": 1}}, threshold, lambda a, s, i: float(a))


def test_bands_between_whole_months_are_known_empty_across_studies(tmp_path: Path) -> None:
    """Issue 12 item 3: ages are whole months, so a band 23.2-23.5 holds nobody. Study one asks for age bands
    at 23.2/30, study two at 23.2/23.5/30 (the band 23.5-30 is the same records as 23.2-30). The release
    shows the empty band's zeros; the small band stays withheld and cannot be worked out."""
    world = World(tmp_path, records(small=SMALL))
    card = {"kind": "points", "points": {"item": {"2": 1, "3": 1}}}  # reads only the item, not the age
    world.scorecard("neutral", card, 1, lambda a, s, i: float(i >= 2))
    first = world.ask("neutral", "one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=23.2,30")
    second = world.ask("neutral", "two", "--analyses", "confusion,subgroups", "--subgroup", "age_months=23.2,23.5,30")
    assert first is not None and second is not None
    levels = second["results"]["subgroups"]["variables"][0]["levels"]
    assert levels[1]["level"] == {"low": 23.2, "high": 23.5}
    assert (levels[1]["analysed_positive"], levels[1]["analysed_negative"]) == (0, 0)  # empty, and shown so
    assert levels[2]["analysed_positive"] is None  # 23.5-30: the three children, withheld
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_score_bands_shifted_across_two_studies_on_a_score_that_is_the_age(tmp_path: Path) -> None:
    """Issue 12 items 1 and 2: one bundle whose score is the age; ROC score bands 0/24/48/96 in one study and
    0/30/48/96 in another would give the 24-29 band with the condition by subtraction. The second release
    withholds enough."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age", 48)
    first = world.ask("age", "one", "--analyses", "confusion,roc", "--roc-bands", "0,24,48,96")
    second = world.ask("age", "two", "--analyses", "confusion,roc", "--roc-bands", "0,30,48,96")
    assert first is not None and second is not None
    assert first["results"]["roc"]["bands"][1]["positive"] is not None  # 0-24 is shown in the first study
    assert second["results"]["roc"]["bands"][1]["positive"] is None  # so 0-30 is withheld in the second
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_a_paired_comparison_of_two_age_scores_shows_no_small_pair_cell(tmp_path: Path) -> None:
    """Issue 12 item 2, two bundles in one study: the model calls "age 24 or more" positive, the comparison
    "age 30 or more"; the paired 2x2 table's discordant cell with the condition is exactly the small group.
    The site withholds that cell and its partner in the paired table, and nothing of the primary table: the
    partner is the paired cell that is not the same count as a 2x2 cell (until 2026-12-05 secondary
    suppression took the one that is, and the site then cut the whole paired comparison back)."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age24", 24)
    age_score(world, "age30", 30)
    release = world.ask("age24", "one", "--analyses", "confusion,paired", compare="age30")
    assert release is not None
    paired = release["results"]["paired"]
    assert paired["suppressed_by"] == {
        "positive.model1_compare0": "minimum_cell_size",
        "positive.model1_compare1": "complementary",
    }
    assert paired["diseased"]["model0_compare0"] == release["results"]["confusion"][0]["cells"]["fn"]
    assert release["results"]["confusion"][0]["suppressed"] == []
    assert release.get("cut_back", []) == []
    assert paired["auc_model"] is not None and paired["auc_compare"] is not None
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_thresholds_either_side_of_the_small_band_on_a_score_that_is_the_age(tmp_path: Path) -> None:
    """Issue 12 items 2 and 4: one request, one bundle whose score is the age, thresholds 24 and 30: tp(24) −
    tp(30) is the small group. The second table withholds its cells (with the rule named), and the pattern of
    what is withheld, zeros shown, does not give the count."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age", 24)
    release = world.ask("age", "one", "--analyses", "confusion", "--thresholds", "24,30")
    assert release is not None
    first, second = release["results"]["confusion"]
    assert first["suppressed"] == [] and first["cells"]["tp"] > 0
    assert second["cells"]["tp"] is None and set(second["suppressed_by"]) == {"tp", "fn"}
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_bundles_whose_schemas_cut_the_age_range_differently_are_not_differenced(tmp_path: Path) -> None:
    """Issue 12 items 1 and 3 through the flow: a bundle whose schema allows ages from 24 months and another
    from 30 months would give the 24-29 count as the difference of their ``out_of_range`` exclusions. The
    second study is refused before any record is read (its schema declares the age differently), so the
    recipient holds only the first release: 24-29 is one part of the 304 analysed, anywhere in 0..98 with the
    condition (checked by a linear program over the three regions the release names, scipy.optimize.linprog)."""
    from scipy.optimize import linprog

    from federation.cli import main as federation
    from site_agent import ledger

    world = World(tmp_path, records(small=SMALL))
    key = str(tmp_path / "coordinator" / "coordinator.key")
    for name, low in (("from24", 24), ("from30", 30)):
        schema = tmp_path / f"{name}.toml"
        schema.write_text((tmp_path / "schema.toml").read_text().replace("min = 0\nmax = 95", f"min = {low}\nmax = 95"))
        model = tmp_path / f"{name}.json"
        model.write_text('{"format": "scorecard", "kind": "points", "points": {"item": {"2": 1, "3": 1}}}')
        out = tmp_path / f"{name}.bundle"
        args = ["bundle", "pack", "--model", str(model), "--schema", str(schema), "--threshold", "1"]
        assert federation([*args, "--sign", key, "--name", name, "--out", str(out)]) == 0
        world.bundles[name] = (out, lambda a, s, i: float(i >= 2), 1.0)
    first = world.ask("from24", "one", "--analyses", "confusion")
    assert first is not None
    flow = first["flow"]
    assert flow["excluded"]["out_of_range"] == sum(1 for a, *_ in world.data if a < 24)
    assert world.ask("from30", "two", "--analyses", "confusion") is None  # refused
    refusal = [e for e in ledger.read_entries(world.site / "ledger.jsonl") if e["event"] == "refusal"][-1]
    assert refusal["details"]["reason"].startswith(
        "request not accepted by the site's policy: bundle schema: feature 'age_months' is declared differently"
    )
    # Regions: [age < 24], [24-29, with], [24-29, without], [30+, with], [30+, without].
    rows = [[1, 0, 0, 0, 0], [0, 1, 0, 1, 0], [0, 0, 1, 0, 1], [1, 1, 1, 1, 1]]
    values = [flow["excluded"]["out_of_range"], flow["analysed_positive"], flow["analysed_negative"], flow["read"]]
    target = [0, 1, 0, 0, 0]
    low = linprog(target, A_eq=rows, b_eq=values, method="highs").fun
    high = -linprog([-x for x in target], A_eq=rows, b_eq=values, method="highs").fun
    assert (round(low), round(high)) == (0, flow["analysed_positive"])


def test_bundles_that_fill_a_missing_age_differently_are_refused_before_any_record_is_read(tmp_path: Path) -> None:
    """Found by our red team: two bundles whose schemas fill a missing age as 0 and as 95 months move the
    records with no age from one age to another. The audit took the second release's changed counts for
    changed records and refused, so released-or-refused told whether any record lacks an age (and the reason
    named the count, so which sex). Now the second bundle is refused before any record is read: the same
    line whether or not a record lacks an age, naming the feature, never a count."""
    from federation.cli import main as federation
    from site_agent import ledger

    reasons = []
    for name, extra in (("complete", []), ("one-without-age", [("", "m", 2, 1)])):
        world = World(tmp_path / name, records(n=300) + extra)  # type: ignore[operator]
        key = str(world.root / "coordinator" / "coordinator.key")
        for fill in (0, 95):
            schema = world.root / f"fill{fill}.toml"
            schema.write_text(
                (world.root / "schema.toml").read_text().replace("max = 95\n", f"max = 95\nmissing = {fill}\n", 1)
            )
            model = world.root / "age.json"
            model.write_text('{"format": "scorecard", "kind": "points", "weights": {"age_months": 1}}')
            out = world.root / f"fill{fill}.bundle"
            args = ["bundle", "pack", "--model", str(model), "--schema", str(schema), "--threshold", "48"]
            assert federation([*args, "--sign", key, "--name", f"fill{fill}", "--out", str(out)]) == 0
            world.bundles[f"fill{fill}"] = (out, lambda a, s, i: float(a), 48.0)
        assert world.ask("fill0", "one", "--analyses", "confusion,subgroups", "--subgroup", "sex") is not None
        assert world.ask("fill95", "two", "--analyses", "confusion,subgroups", "--subgroup", "sex") is None
        refusals = [e for e in ledger.read_entries(world.site / "ledger.jsonl") if e["event"] == "refusal"]
        reasons.append(refusals[-1]["details"]["reason"])
    assert reasons[0] == reasons[1]
    assert reasons[0].startswith(
        "request not accepted by the site's policy: bundle schema: feature 'age_months' is declared differently"
    )


def test_auc_and_expected_total_of_a_crafted_scorecard_do_not_give_the_withheld_cell(tmp_path: Path) -> None:
    """Issue 12 item 5: a logistic scorecard whose risk is about 1 inside the 24-29 month band and about 0
    outside. With record-level scores the AUC would be 0.5 + (tp/P − fp/N)/2 and the expected total
    n_band·σ(10) + (n − n_band)·σ(−10) (Hanley & McNeil 1982 for the AUC of a two-valued score, from memory),
    which give the withheld tp cell and the band's size in one release. The recipient solves both for every
    value its integer program still allows; neither may single one out."""
    world = World(tmp_path, records(small=SMALL))
    band = {str(a): 20 for a in range(24, 30)}

    def risk(a: int, s: str, i: int) -> float:
        return 1 / (1 + math.exp(-(-10 + (20 if 24 <= a < 30 else 0))))

    world.scorecard("band", {"kind": "logistic", "intercept": -10, "points": {"age_months": band}}, 0.5, risk)
    options = ["--roc-bands", "0,0.5,1", "--calibration-bands", "0,0.5,1"]
    release = world.ask("band", "one", "--analyses", "confusion,roc,calibration", *options)
    assert release is not None
    cells, flow = release["results"]["confusion"][0]["cells"], release["flow"]
    assert cells["tp"] is None and cells["fp"] == 0  # the three children are withheld; nobody without, shown
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)
    positives, negatives, n = flow["analysed_positive"], flow["analysed_negative"], flow["analysed"]
    auc, expected = release["results"]["roc"]["auc"], release["results"]["calibration"]["expected"]
    from_auc = [tp for tp in range(low, high + 1) if abs(0.5 + (tp / positives - 0) / 2 - auc) < 1e-9]
    assert len(from_auc) != 1, from_auc
    inside, outside = risk(25, "f", 0), risk(0, "f", 0)
    from_expected = [m for m in range(low, n + 1) if abs(m * inside + (n - m) * outside - expected) < 1e-6]
    assert len(from_expected) != 1, from_expected
    assert negatives > 0


# --- a box less several boxes inside it (found by our red team) -----------------------------------------------


def _months(ranges: list[tuple[tuple[int, int], float]]) -> dict[str, float]:
    return {str(a): p for (lo, hi), p in ranges for a in range(lo, hi)}


def _step(age: int, ranges: list[tuple[tuple[int, int], float]]) -> float:
    return next((float(p) for (lo, hi), p in ranges if lo <= age < hi), 0.0)


def _less_two_bands_world(tmp_path: Path) -> World:
    """Study one: a scorecard scoring 1 for ages 24-59, its 2x2 table (tp = positives aged 24-59). Model A
    scores 10 for ages 24-29, 15 for 60-74 and 5 more for boys, threshold 12: its bands split the three
    positives aged 24-29 by sex, so no atom holds them all."""
    world = World(tmp_path, records(small=SMALL))
    wide = [((24, 60), 1.0)]
    world.scorecard(
        "wide", {"kind": "points", "points": {"age_months": _months(wide)}}, 1, lambda a, s, i: _step(a, wide)
    )
    split = [((24, 30), 10.0), ((60, 75), 15.0)]
    card = {"kind": "points", "points": {"age_months": _months(split), "sex": {"m": 5}}}
    world.scorecard("split", card, 12, lambda a, s, i: _step(a, split) + (5.0 if s == "m" else 0.0))
    assert world.ask("wide", "one", "--analyses", "confusion") is not None
    return world


def test_a_count_less_two_bands_of_a_comparison_model_does_not_give_the_small_band(tmp_path: Path) -> None:
    """Our red team: in study two, a paired comparison with a logistic model that is high for ages 30-44 and
    45-59 showed those bands' positives (24 and 23); the first study's tp (50) less both gave the three positives
    aged 24-29 exactly, while model A's bands split them into two open atoms. The audit now checks a box less
    two or more sibling boxes inside it."""
    world = _less_two_bands_world(tmp_path)
    steps = [((30, 45), 1.3), ((45, 60), 2.6), ((80, 96), 3.9)]
    card = {"kind": "logistic", "intercept": -2.2, "points": {"age_months": _months(steps)}}
    world.scorecard("compare", card, 0.99, lambda a, s, i: 1 / (1 + math.exp(2.2 - _step(a, steps))))
    second = world.ask("split", "two", "--analyses", "confusion,roc,paired", "--roc-bands", "12", compare="compare")
    assert second is not None
    low, high = oracle_interval(world, in_small_band)
    assert low <= len(SMALL) <= high and high - low >= 1, (low, high)


def test_a_count_less_two_roc_bands_does_not_give_the_small_band(tmp_path: Path) -> None:
    """The same with model A's own ROC bands at 30 and 40 (ages 30-44, 45-59 and 60-74 fall in bands of their own
    once the boys' 5 points are added): no paired comparison needed."""
    world = _less_two_bands_world(tmp_path)
    steps = [((24, 30), 10.0), ((60, 75), 15.0), ((30, 45), 30.0), ((45, 60), 40.0)]
    card = {"kind": "points", "points": {"age_months": _months(steps), "sex": {"m": 5}}}
    world.scorecard("bands", card, 12, lambda a, s, i: _step(a, steps) + (5.0 if s == "m" else 0.0))
    assert world.ask("bands", "two", "--analyses", "confusion,roc", "--roc-bands", "12,30,40") is not None
    low, high = oracle_interval(world, in_small_band)
    assert low <= len(SMALL) <= high and high - low >= 1, (low, high)


def test_an_agreement_request_does_not_give_the_positives_without_a_second_reference(tmp_path: Path) -> None:
    """Our red team, with one ordinary request: the second reference is blank for three positives, and the
    model's call splits them into two cells, each withheld for the minimum cell size. The analysed positives
    (flow) less the two pair cells of positives with a second reference (reference x reference2) gave 3. The
    recipient here is our own: one whole-number variable per (model call, reference, second reference) cell,
    every released count of the flow, the 2x2 table and the agreement tables as an equality, every withheld
    count's rule as a bound ("0 or at least k" with a binary, big-M), two integer programs
    (scipy.optimize.milp) for the smallest and largest number of positives without a second reference."""
    import numpy as np
    from scipy.optimize import Bounds, LinearConstraint, milp

    data = records(seed=3)
    rng = np.random.default_rng(11)
    second = [str(o if rng.random() < 0.5 else 1 - o) for *_, o in data]
    positives = [j for j, r in enumerate(data) if r[3] == 1]
    for j in (positives[0], positives[5], positives[9]):
        second[j] = ""
    world = World(tmp_path, data, reference2=second)
    world.scorecard("items", {"kind": "points", "points": {"item": {"2": 1, "3": 1}}}, 1, lambda a, s, i: float(i >= 2))
    release = world.ask("items", "one", "--analyses", "confusion,agreement")
    assert release is not None
    k, big = world.k, 10 * len(data)
    cell = {(m, r, s): n for n, (m, r, s) in enumerate((m, r, s) for m in (1, 0) for r in (1, 0) for s in "10-")}
    rows, lows, highs, binaries = [], [], [], 0
    facts: list[tuple[list[tuple[int, int, str]], int | None, str | None]] = []
    table = release["results"]["agreement"]["tables"][0]
    rules = table["suppressed_by"]
    for entry in table["cells"]:
        s = "-" if entry["reference2"] is None else str(entry["reference2"])
        name = f"model{entry['model']}_reference{entry['reference']}_reference2{'missing' if s == '-' else s}"
        facts.append(([(entry["model"], entry["reference"], s)], entry["count"], rules.get(name)))
    for pair, content in table["pairs"].items():
        for key, value in content["cells"].items():
            a, b = int(key[0]), int(key[1])
            members = {
                "model_reference": [(a, b, s) for s in "10"],
                "model_reference2": [(a, r, str(b)) for r in (1, 0)],
                "reference_reference2": [(m, a, str(b)) for m in (1, 0)],
            }[pair]
            facts.append((members, value, rules.get(f"{pair}.{key}")))
    flow = release["flow"]
    facts.append(([(m, 1, s) for m in (1, 0) for s in "10-"], flow["analysed_positive"], None))
    facts.append(([(m, 0, s) for m in (1, 0) for s in "10-"], flow["analysed_negative"], None))
    confusion = release["results"]["confusion"][0]
    for name, (m, r) in {"tp": (1, 1), "fn": (0, 1), "fp": (1, 0), "tn": (0, 0)}.items():
        facts.append(
            ([(m, r, s) for s in "10-"], confusion["cells"][name], confusion.get("suppressed_by", {}).get(name))
        )
    extra = sum(1 for _, value, rule in facts if value is None and rule in ("complementary", "audit"))
    width = len(cell) + extra
    for members, value, rule in facts:
        row = np.zeros(width)
        for member in members:
            row[cell[member]] = 1
        if value is not None:
            rows.append(row), lows.append(value), highs.append(value)
        elif rule == "minimum_cell_size":
            rows.append(row), lows.append(1), highs.append(k - 1)
        elif rule in ("complementary", "audit"):  # 0 or at least k: y = 1 -> at least k; y = 0 -> 0
            flag = len(cell) + binaries
            binaries += 1
            at_least = row.copy()
            at_least[flag] = -k
            rows.append(at_least), lows.append(0), highs.append(np.inf)
            at_most = row.copy()
            at_most[flag] = -big
            rows.append(at_most), lows.append(-np.inf), highs.append(0)
    target = np.zeros(width)
    for m in (1, 0):
        target[cell[(m, 1, "-")]] = 1
    bounds = Bounds(np.zeros(width), np.r_[np.full(len(cell), np.inf), np.ones(extra)])
    found = []
    for sign in (1, -1):
        result = milp(
            sign * target,
            constraints=LinearConstraint(np.array(rows), lows, highs),
            integrality=np.ones(width),
            bounds=bounds,
        )
        assert result.status == 0
        found.append(round(sign * result.fun))
    assert found[0] <= 3 <= found[1] and found[1] - found[0] >= 1, found
