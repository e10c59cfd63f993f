"""The audit's fast path for a lone release of the flow and one 2x2 table (site_agent.audit.tree) agrees with
the full LP/MILP audit (site_agent.audit.check) on random tables: it only says "safe" when the full audit
does, with the same whole-number interval for every withheld count. The full audit is itself checked
against an independent LP oracle in tests/site_agent/test_audit.py."""

from __future__ import annotations

from hypothesis import given, settings
from hypothesis import strategies as st

from site_agent.audit import Audit, ReleaseFacts
from site_agent.audit.facts import withheld_bounds
from site_agent.audit.tree import tree_audit
from site_agent.counts import ANALYSED, NEGATIVE, POSITIVE, Condition, CountSet, excluded
from site_agent.disclosure import is_unsafe, suppress


def release(tp: int, fp: int, fn: int, tn: int, exclusions: tuple[int, ...]) -> CountSet:
    out = CountSet()
    reasons = [f"reason{i}" for i in range(len(exclusions))]
    out.add("flow.read", tp + fp + fn + tn + sum(exclusions))
    out.add("flow.analysed", tp + fp + fn + tn, ANALYSED)
    out.add("flow.analysed_positive", tp + fn, ANALYSED, POSITIVE)
    out.add("flow.analysed_negative", fp + tn, ANALYSED, NEGATIVE)
    for reason, value in zip(reasons, exclusions, strict=True):
        out.add(f"flow.excluded.{reason}", value, excluded(reason))
    out.relate("flow.read", "flow.analysed", *(f"flow.excluded.{r}" for r in reasons))
    out.relate("flow.analysed", "flow.analysed_positive", "flow.analysed_negative")
    above, below = Condition("score", low=0.5), Condition("score", high=0.5)
    for cell, value, outcome, side in (
        ("tp", tp, POSITIVE, above),
        ("fp", fp, NEGATIVE, above),
        ("fn", fn, POSITIVE, below),
        ("tn", tn, NEGATIVE, below),
    ):
        out.add(f"confusion[0].{cell}", value, ANALYSED, outcome, side)
    out.relate("flow.analysed_positive", "confusion[0].tp", "confusion[0].fn")
    out.relate("flow.analysed_negative", "confusion[0].fp", "confusion[0].tn")
    return out


small = st.integers(0, 14)


@settings(max_examples=60, deadline=None)
@given(small, small, small, st.integers(0, 60), st.lists(st.integers(0, 12), min_size=1, max_size=3), st.booleans())
def test_the_fast_path_agrees_with_the_full_audit(tp, fp, fn, tn, exclusions, allow_zero) -> None:  # noqa: ANN001
    k = 5
    counts = release(tp, fp, fn, tn, tuple(exclusions))
    released, hidden = suppress(counts.values, counts.relations, k, allow_zero)
    rules = {n: "minimum_cell_size" if is_unsafe(counts.values[n], k, allow_zero) else "complementary" for n in hidden}
    zero = {n: counts.values[n] == 0 for n, r in rules.items() if r == "complementary"}
    fast = tree_audit(counts.definitions, released, withheld_bounds(rules, zero, k, allow_zero), k, allow_zero, 2)
    facts = ReleaseFacts("r", counts.definitions, {}, counts.relations, "", {}, k, allow_zero)
    full = Audit([], facts).evaluate(released, k, allow_zero, 2, current_rules=rules, current_zero=zero)
    if fast is None:
        return  # the full audit decides (and repairs): the fast path never claims more than it can show
    assert full.ok
    for name, interval in fast.intervals.items():
        if zero.get(name) and allow_zero:  # withheld as not small, and 0: fixed at 0, no target of the full audit
            assert (interval.low, interval.high) == (0, 0) and name not in full.intervals
            continue
        other = full.intervals[name]
        if other.exact:
            assert (interval.low, interval.high) == (other.low, other.high), name
        else:  # the full audit certified a sub-interval from two feasible tables: ours must contain it
            assert interval.low <= other.low and (interval.high is None or interval.high >= other.high), name


def test_a_plain_release_takes_the_fast_path() -> None:
    counts = release(40, 30, 20, 300, (0, 15))
    released, hidden = suppress(counts.values, counts.relations, 10, True)
    assert not hidden
    fast = tree_audit(counts.definitions, released, {}, 10, True, 2)
    assert fast is not None and fast.ok
    # two thresholds (tp at 0.5 and at 0.6) are not a tree of this kind: the full audit runs
    counts.add("confusion[1].tp", 35, ANALYSED, POSITIVE, Condition("score", low=0.6))
    assert tree_audit(counts.definitions, {**released, "confusion[1].tp": 35}, {}, 10, True, 2) is None
