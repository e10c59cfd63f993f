"""Issue 12 item 2, the model: the recipient can evaluate the score for any input, so a score band is a region
of the features the model reads. Played through the real command lines (``federation bundle pack``,
``federation request new``, ``site-agent run``) on records of our own making, with three children aged 24-29
months, all with the condition. The recipient's interval for that count is recomputed independently by
tests/adversarial/world.py (its own enumeration of record types, each scored with the recipient's own copy of
the model, and two integer programs with scipy.optimize.milp, from the release files alone); at least two
whole numbers must stay possible (protection_width = 2)."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from .world import World, oracle_interval, records

SMALL = [(25, "f", 1, 1), (27, "m", 2, 1), (28, "f", 0, 1)]  # three children aged 24-29 months, all positive


def in_small_band(cell: tuple) -> bool:
    return 24 <= cell[0] < 30 and cell[3] == 1


def age_score(world: World, name: str, threshold: float, card: dict | None = None) -> None:
    """A points scorecard whose score *is* the age in months (the recipient knows the model)."""
    card = card or {"kind": "points", "weights": {"age_months": 1}}
    world.scorecard(name, card, threshold, lambda a, s, i: float(a))


def test_a_score_that_is_the_age_asked_with_an_age_subgroup(tmp_path: Path) -> None:
    """(a) One request: threshold 30 on a score that is the age, and subgroups by age at 24 months. tp at 30
    is "age 30 or more, with the condition", so the subgroup "24 or more, with the condition" minus it is the
    small group, unless the release withholds enough."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age", 30)
    release = world.ask("age", "one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=24")
    assert release is not None
    assert release["results"]["confusion"][0]["suppressed"] == []  # the primary table stays whole
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_the_same_attack_in_two_studies(tmp_path: Path) -> None:
    """(a) across studies: the subgroup at 24 months in one study (a model that reads only the item), the
    age score at threshold 30 in another."""
    world = World(tmp_path, records(small=SMALL))
    world.scorecard(
        "neutral", {"kind": "points", "points": {"item": {"2": 1, "3": 1}}}, 1, lambda a, s, i: float(i >= 2)
    )
    age_score(world, "age", 30)
    assert world.ask("neutral", "one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=24") is not None
    world.ask("age", "two", "--analyses", "confusion")
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


@pytest.mark.parametrize("studies", [("one", "one"), ("one", "two")])
def test_two_bundles_whose_score_is_the_age_at_thresholds_24_and_30(tmp_path: Path, studies: tuple) -> None:
    """(b) Two bundles (thresholds 24 and 30; the second written as a logistic-free points card with the same
    weight and an intercept of 0 spelled out, so its bytes differ): tp(24) − tp(30) is the small group. In
    one study and across two studies, the second release must withhold enough (or be refused)."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age24", 24)
    age_score(world, "age30", 30, {"kind": "points", "intercept": 0, "weights": {"age_months": 1.0}})
    first = world.ask("age24", studies[0], "--analyses", "confusion")
    assert first is not None and first["results"]["confusion"][0]["cells"]["tp"] is not None
    world.ask("age30", studies[1], "--analyses", "confusion")
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_two_different_scorecards_that_read_the_age(tmp_path: Path) -> None:
    """(b) with two different functions: one card scores the age, the other twice the age plus one point for
    an item of 3 (threshold 60: "age 30 or more", whatever the item, since 2 × 29 + 1 < 60). The audit must
    see that their level sets nest."""
    world = World(tmp_path, records(small=SMALL))
    age_score(world, "age24", 24)
    card = {"kind": "points", "weights": {"age_months": 2}, "points": {"item": {"3": 1}}}
    world.scorecard("double", card, 60, lambda a, s, i: 2.0 * a + (1.0 if i == 3 else 0.0))
    assert world.ask("age24", "one", "--analyses", "confusion") is not None
    world.ask("double", "two", "--analyses", "confusion")
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def age_graph(scale: float) -> bytes:
    """An ONNX graph whose probabilities are [age × scale, age × scale] (the age is input column 0)."""
    import onnx
    from onnx import TensorProto, helper

    graph = helper.make_graph(
        [
            helper.make_node("Constant", [], ["index"], value=helper.make_tensor("i", TensorProto.INT64, [1], [0])),
            helper.make_node("Constant", [], ["scale"], value=helper.make_tensor("s", TensorProto.FLOAT, [], [scale])),
            helper.make_node("Gather", ["input", "index"], ["age"], axis=1),
            helper.make_node("Mul", ["age", "scale"], ["share"]),
            helper.make_node("Concat", ["share", "share"], ["probabilities"], axis=1),
        ],
        "age",
        [helper.make_tensor_value_info("input", TensorProto.FLOAT, [None, 3])],
        [helper.make_tensor_value_info("probabilities", TensorProto.FLOAT, [None, 2])],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", 17)])
    onnx.checker.check_model(model)
    return model.SerializeToString()


def age_onnx(world: World, name: str, threshold: float, scale: float = 0.01) -> None:
    """An ONNX graph whose probability is the age times ``scale``, packed with ``federation bundle pack``
    (the recipient's copy computes it in float32, as onnxruntime does)."""
    from federation.cli import main as federation

    model = world.root / f"{name}.onnx"
    model.write_bytes(age_graph(scale))
    out = world.root / f"{name}.bundle"
    key = str(world.root / "coordinator" / "coordinator.key")
    args = ["bundle", "pack", "--model", str(model), "--schema", str(world.root / "schema.toml")]
    assert federation([*args, "--threshold", str(threshold), "--sign", key, "--name", name, "--out", str(out)]) == 0
    world.bundles[name] = (out, lambda a, s, i: float(np.float32(a) * np.float32(scale)), threshold)


def at_age(age: int, scale: float) -> float:
    """The graph's score at ``age`` (float32, as onnxruntime computes it): a threshold exactly there."""
    return float(np.float32(age) * np.float32(scale))


def test_an_onnx_score_that_is_the_age_asked_with_an_age_subgroup(tmp_path: Path) -> None:
    """(c) The same attack as (a) with an ONNX graph whose score is the age/100, threshold at age 30, subgroups
    by age at 24 months. The audit cannot compute the graph's level sets; it assumes the recipient knows every
    (age band, score band) combination no record holds is empty, which covers what the graph tells."""
    world = World(tmp_path, records(small=SMALL))
    age_onnx(world, "onnx-age", at_age(30, 0.01))
    release = world.ask("onnx-age", "one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=24")
    assert release is not None
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)


def test_an_onnx_score_and_an_age_subgroup_in_two_studies(tmp_path: Path) -> None:
    """(c) across studies, with two graphs: age × 0.01 at its score for age 30, with subgroups by age at 30 months
    in one study, then age × 0.005 at its score for age 24 in another. The second audit scores the records
    with the first graph again, from the bundle the site kept."""
    world = World(tmp_path, records(small=SMALL))
    age_onnx(world, "onnx30", at_age(30, 0.01))
    age_onnx(world, "onnx24", at_age(24, 0.005), scale=0.005)
    assert world.ask("onnx30", "one", "--analyses", "confusion,subgroups", "--subgroup", "age_months=30") is not None
    world.ask("onnx24", "two", "--analyses", "confusion")
    low, high = oracle_interval(world, in_small_band)
    assert high - low >= 1, (low, high)
