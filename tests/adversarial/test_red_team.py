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
    The site cuts the paired table back (in words, no count) and the primary table stays whole."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age24", 24)
    age_score(world, "age30", 30)
    release = world.ask("age24", "one", "--analyses", "confusion,paired", compare="age30")
    assert release is not None
    paired = release["results"]["paired"]
    assert paired["diseased"]["model1_compare0"] is None
    assert release["results"]["confusion"][0]["suppressed"] == []
    assert [cut["analysis"] for cut in release.get("cut_back", [])] == ["paired"]
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
