"""The audit's model of a scorecard (site_agent/audit/model.py) against brute force: for random points and
logistic scorecards and random released definitions (score bands, feature bands, categories, outcome), the
regions of record space the audit keeps (its atoms, as the sets of definitions that hold them) must be
exactly the distinct sets of definitions that the records of every possible type fall in, each type scored
by the site's own scorer (federation.protocol.scoring.Scorecard). Fewer regions would be a fact the recipient
does not have (an inconsistent audit); more would miss a fact the recipient has (a region it knows is
empty), which is how a score that is the age gave the small age band away."""

from __future__ import annotations

import itertools
import json

import numpy as np
from hypothesis import given, settings
from hypothesis import strategies as st

from federation.protocol.schema import Schema
from federation.protocol.scoring import Scorecard
from site_agent.audit.model import describe_bundle, joint_boxes, meet_entries
from site_agent.audit.refinement import Domain, normalise, refine
from site_agent.counts import ANALYSED, Condition

SCHEMA = {
    "features": [
        {"name": "age", "type": "int", "min": 0, "max": 11},
        {"name": "sex", "type": "category", "categories": ["f", "m", "x"]},
        {"name": "item", "type": "int", "min": 0, "max": 3},
    ]
}
halves = st.integers(-6, 6).map(lambda v: v / 2)  # exact in binary: the brute force and the audit agree exactly


@st.composite
def scorecards(draw: st.DrawFn) -> dict:
    kind = draw(st.sampled_from(["points", "logistic"]))
    card: dict = {"format": "scorecard", "kind": kind, "intercept": draw(halves), "weights": {}, "points": {}}
    for name in draw(st.sets(st.sampled_from(["age", "item", "sex"]), max_size=3)):
        card["weights"][name] = draw(halves)
    for name in draw(st.sets(st.sampled_from(["age", "item", "sex"]), max_size=2)):
        keys = ["f", "m", "x"] if name == "sex" else [str(v) for v in range(0, 12 if name == "age" else 4)]
        chosen = draw(st.sets(st.sampled_from(keys), min_size=1, max_size=3))
        card["points"][name] = {k: draw(halves) for k in sorted(chosen)}
    return card


@st.composite
def definitions(draw: st.DrawFn, logistic: tuple[bool, bool]) -> list[tuple[Condition, ...]]:
    out = []
    for _ in range(draw(st.integers(1, 5))):
        where = [ANALYSED]
        if draw(st.booleans()):
            where.append(Condition("outcome", (draw(st.sampled_from(["0", "1"])),)))
        for variable, is_logistic in (("score", logistic[0]), ("score.compare", logistic[1])):
            if draw(st.booleans()):
                grid = [v / 10 for v in range(1, 10)] if is_logistic else [v / 2 for v in range(-20, 21)]
                low, high = sorted(draw(st.lists(st.sampled_from(grid), min_size=2, max_size=2)))
                where.append(Condition(variable, (), low if draw(st.booleans()) else None, high))
        if draw(st.booleans()):
            low = draw(st.integers(0, 11))
            where.append(Condition("age", (), low, low + draw(st.integers(1, 6))))
        if draw(st.booleans()):
            where.append(Condition("sex", tuple(sorted(draw(st.sets(st.sampled_from("fmx"), min_size=1))))))
        out.append(tuple(where))
    return out


def brute_force(cards: list[Scorecard], wheres: list[tuple[Condition, ...]]) -> set[int]:
    """Every type of analysed record (age, sex, item, outcome), scored by the site's scorer: the set of
    definitions each type lies in."""
    types = list(itertools.product(range(12), range(3), range(4), (0, 1)))
    inputs = np.array([[a, s, i] for a, s, i, _ in types], dtype=np.float32)
    scores = [card.score(inputs) for card in cards]
    masks = set()
    for row, (age, sex, _item, outcome) in enumerate(types):
        values = {"age": age, "sex": "fmx"[sex], "outcome": str(outcome)}
        values["score"] = scores[0][row]
        values["score.compare"] = scores[-1][row]
        mask = 0
        for j, where in enumerate(wheres):
            inside = True
            for c in where:
                if c.variable == "status":
                    continue
                value = values[c.variable]
                if c.values:
                    inside &= value in c.values
                else:
                    inside &= (c.low is None or value >= c.low) and (c.high is None or value < c.high)
            mask |= inside << j
        if mask:
            masks.add(mask)
    return masks


@settings(max_examples=80, deadline=None)
@given(st.data())
def test_the_audit_keeps_exactly_the_regions_some_record_can_be_in(data: st.DataObject) -> None:
    schema = Schema.from_dict(SCHEMA)
    raw = [data.draw(scorecards()) for _ in range(2)]
    cards = [Scorecard.from_json(json.dumps(card).encode(), schema) for card in raw]
    logistic = (raw[0]["kind"] == "logistic", raw[1]["kind"] == "logistic")
    wheres = data.draw(definitions(logistic))

    class _Bundle:  # what describe_bundle reads of a bundle
        class manifest:
            model_format = "scorecard"

    _Bundle.schema = schema
    models = {"score": describe_bundle(_Bundle, cards[0]), "score.compare": describe_bundle(_Bundle, cards[1])}
    entries = {f["name"]: meet_entries(None, f) for f in SCHEMA["features"]}
    domains = {name: Domain.from_dict(entry) for name, entry in entries.items()}
    boxes = [normalise(where, "b", domains, models) for where in wheres]
    keep = [j for j, box in enumerate(boxes) if box is not None]
    qualified = {f"score@m:{m['id']}": m for m in models.values()}
    joined, values, _ = joint_boxes([boxes[j] for j in keep], qualified, entries)
    audit = {sum(1 << keep[b] for b in range(len(keep)) if mask >> b & 1) for mask in refine(joined, domains, values)}
    assert audit == brute_force(cards, wheres)


def test_the_closed_form_fast_path_never_takes_a_feature_or_a_second_score() -> None:
    """The fast path (site_agent/audit/tree.py) knows nothing of the models: a release whose definitions name a
    feature beside the score, or a second score, must go to the full audit, which does."""
    from site_agent.audit.tree import tree_audit
    from site_agent.counts import POSITIVE, CountDef

    above = Condition("score", (), 30.0, None)
    lone = {
        "analysed_positive": CountDef("analysed_positive", (ANALYSED, POSITIVE)),
        "tp": CountDef("tp", (ANALYSED, POSITIVE, above)),
        "fn": CountDef("fn", (ANALYSED, POSITIVE, Condition("score", (), None, 30.0))),
    }
    values = {"analysed_positive": 128, "tp": 95, "fn": 33}
    assert tree_audit(lone, values, {}, 10, True, 2) is not None  # the premise: this one is a tree
    for extra in (Condition("age_months", (), 24.0, None), Condition("score.compare", (), 30.0, None)):
        mixed = {**lone, "more": CountDef("more", (ANALYSED, POSITIVE, extra))}
        assert tree_audit(mixed, {**values, "more": 98}, {}, 10, True, 2) is None


@settings(max_examples=40, deadline=None)
@given(st.data())
def test_the_conservative_rule_keeps_only_regions_that_hold_a_record(data: st.DataObject) -> None:
    """The rule for models the audit cannot follow (ONNX), played with scorecards so that brute force knows the
    truth: given the combinations some records hold, the audit keeps every region those records fall in (it
    is consistent with the data) and no region that no input can reach (every fact the recipient has from
    the models is among the audit's)."""
    import site_agent.audit.model as model

    schema = Schema.from_dict(SCHEMA)
    raw = [data.draw(scorecards()) for _ in range(2)]
    cards = [Scorecard.from_json(json.dumps(card).encode(), schema) for card in raw]
    wheres = data.draw(definitions((raw[0]["kind"] == "logistic", raw[1]["kind"] == "logistic")))
    held = data.draw(st.lists(st.tuples(st.integers(0, 11), st.integers(0, 2), st.integers(0, 3)), min_size=1))

    class _Bundle:
        class manifest:
            model_format = "scorecard"

    _Bundle.schema = schema
    models = {"score": describe_bundle(_Bundle, cards[0]), "score.compare": describe_bundle(_Bundle, cards[1])}
    qualified = {f"score@m:{m['id']}": m for m in models.values()}
    by_id = {f"score@m:{m['id']}": card for m, card in zip(models.values(), cards, strict=True)}
    entries = {f["name"]: meet_entries(None, f) for f in SCHEMA["features"]}
    domains = {name: Domain.from_dict(entry) for name, entry in entries.items()}
    boxes = [normalise(where, "b", domains, models) for where in wheres]
    keep = [j for j, box in enumerate(boxes) if box is not None]
    inputs = np.array(held, dtype=np.float32)

    def occupied(features: list[str], descriptions: list[dict]) -> np.ndarray:
        columns = [inputs[:, ["age", "sex", "item"].index(f)] for f in features]
        scores = [by_id[f"score@m:{d['id']}"].score(inputs) for d in descriptions]
        return np.column_stack([*columns, *scores]) if columns or scores else np.zeros((len(held), 0))

    original = model._exact_combinations
    model._exact_combinations = lambda *args: None  # as for an ONNX graph
    try:
        joined, values, _ = joint_boxes([boxes[j] for j in keep], qualified, entries, occupied)
    finally:
        model._exact_combinations = original
    audit = {sum(1 << keep[b] for b in range(len(keep)) if mask >> b & 1) for mask in refine(joined, domains, values)}
    full = brute_force(cards, wheres)
    assert audit <= full  # never a region no input reaches
    # every held record's region is kept (with either outcome: the rule looks at features and scores only)
    held_regions = set()
    scores = [card.score(inputs) for card in cards]
    for row, (age, sex, _item) in enumerate(held):
        for outcome in ("0", "1"):
            values_of = {"age": age, "sex": "fmx"[sex], "outcome": outcome, "score": scores[0][row]}
            values_of["score.compare"] = scores[1][row]
            mask = 0
            for j, where in enumerate(wheres):
                inside = all(
                    (values_of[c.variable] in c.values)
                    if c.values
                    else (
                        (c.low is None or values_of[c.variable] >= c.low)
                        and (c.high is None or values_of[c.variable] < c.high)
                    )
                    for c in where
                    if c.variable != "status"
                )
                mask |= inside << j
            if mask:
                held_regions.add(mask)
    assert held_regions <= audit


def test_a_release_recorded_before_models_shares_the_score_of_its_bundle() -> None:
    """A ledger entry written before releases described their models names the score by its bundle; a new
    release of the same bundle must still be the same score (else shifted bands across the two give a band's
    count by subtraction, tests/adversarial/test_red_team.py::test_score_bands_shifted_across_two_studies_on_a_
    score_that_is_the_age)."""
    from site_agent.audit import ReleaseFacts
    from site_agent.audit.check import Audit
    from site_agent.counts import CountDef

    where = (ANALYSED, Condition("score", (), 24.0, None))
    age = {"age_months": {"type": "int", "min": 0, "max": 95}}
    card = {"format": "scorecard", "kind": "points", "intercept": 0.0}
    card["terms"] = {"age_months": {"weight": 1.0, "points": {}}}
    model = {"score": {**card, "id": "c0ffee"}}
    definitions = {"band": CountDef("band", where)}
    old = ReleaseFacts("old", definitions, {"band": 40}, bundle="b1", domains=age)
    new = ReleaseFacts("new", definitions, {}, bundle="b1", domains=age, models=model)
    other = ReleaseFacts("other", definitions, {}, bundle="b2", domains=age, models=model)
    audit = Audit([old], new)
    assert audit.statements[1].box is not None and audit.statements[0].box == audit.statements[1].box
    audit = Audit([old], other)  # another bundle's old entry is not this model's
    assert audit.statements[1].box is not None and audit.statements[0].box != audit.statements[1].box


def test_an_onnx_score_the_site_cannot_score_again_is_refused_only_beside_a_feature_it_reads() -> None:
    """An earlier ONNX graph whose bundle is gone: beside a definition naming a feature it reads the audit
    refuses (it cannot show the release is safe); a score that stands alone stays its own variable."""
    import pytest

    from site_agent.audit import AuditError
    from site_agent.audit.model import describe_onnx

    onnx = describe_onnx("ab" * 32, ["age", "sex", "item"])
    models = {f"score@m:{onnx['id']}": onnx}
    score = (("score@m:" + onnx["id"], (0.5, float("inf"))), ("status", frozenset({"analysed"})))
    entries = {f["name"]: meet_entries(None, f) for f in SCHEMA["features"]}
    joined, values, _ = joint_boxes([score], models, entries, lambda features, descriptions: None)
    assert joined == [score] and values == {}
    age = (("age", (0.0, 6.0)), ("status", frozenset({"analysed"})))
    with pytest.raises(AuditError, match="cannot follow a model"):
        joint_boxes([score, age], models, entries, lambda features, descriptions: None)
