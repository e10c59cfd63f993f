"""The simulatable protector of simulations/simulatable.py decides from what is public, never from a value.

On a few fixed requests of the campaign's world (five cells, k = 5, zeros shown): every table the stated
facts allow gets exactly the same release, so a recipient who reruns the protector on each of them learns
nothing the facts do not give; and at each decision it makes for the true table, other tables consistent
with what was public at that moment get the same decision.
"""

from __future__ import annotations

import functools

import numpy as np
import pytest

from simulations import rerun
from simulations.simulatable import decision_order, observe

# (cells a..e, first release's boxes, second release's boxes): the first two are requests where the site's
# protect tells a small count to a recipient who reruns it (through the first release's decisions, through
# a refusal: seed 3 of the campaign); the third is test_withheld's refusal example.
REQUESTS = [
    ((6, 4, 4, 1, 0), ("acde", "bcd", "bcde", "bde"), ("abce",)),
    ((1, 5, 0, 0, 1), ("ac", "bce", "cd", "cde"), ("acd", "b")),
    ((0, 1, 1, 0, 6), ("abe", "acd", "ade", "bce"), ("bcd", "cd", "de")),
]


def as_table(row: np.ndarray) -> tuple[int, ...]:
    return tuple(int(x) for x in row)


@pytest.mark.parametrize(("table", "first", "second"), REQUESTS)
def test_every_table_the_stated_facts_allow_gets_the_same_release(
    table: tuple[int, ...], first: tuple[str, ...], second: tuple[str, ...]
) -> None:
    releases = (first, second)
    seen = observe(table, releases)
    possible = rerun.stated(seen, releases)
    assert len(possible) > 1
    assert all(observe(as_table(row), releases) == seen for row in possible)
    result = rerun.play(table, releases, None, observe)
    assert result is not None and result["kept"] == result["tables"] == len(possible)
    assert result["told"] == [] and result["pinned_by_facts"] == []


@pytest.mark.parametrize(("table", "first", "second"), REQUESTS)
def test_each_decision_is_the_same_for_tables_that_were_as_public(
    table: tuple[int, ...], first: tuple[str, ...], second: tuple[str, ...]
) -> None:
    # Replay the true table's decisions: before each, the recipient knows the earlier release(s) as seen and
    # this release's entries decided so far (the rest: not small). Tables drawn from those that fit it, run
    # through the whole protector, must have seen the same so far and get the same decision.
    releases = (first, second)
    seen = observe(table, releases)
    rng = np.random.default_rng(0)
    decisions = 0
    for r, release in enumerate(seen):
        entries = {name: (name, value, rule) for name, value, rule in release}
        public = {n: e for n, e in entries.items() if e[2] in ("minimum_cell_size", "complementary")}
        for name in decision_order([n for n in entries if n not in public]):
            before = (*seen[:r], tuple(public.get(n, (n, None, None)) for n in sorted(entries)))
            tables = rerun.stated(before, releases[: r + 1])
            for row in tables[rng.choice(len(tables), size=min(8, len(tables)), replace=False)]:
                other = observe(as_table(row), releases)
                assert other[:r] == seen[:r]
                assert [e for e in other[r] if e[0] in public] == [e for e in release if e[0] in public]
                assert ({n: v for n, v, _ in other[r]}[name] is None) == (entries[name][1] is None)
            public[name] = entries[name]
            decisions += 1
    assert decisions >= 3


def test_where_primary_suppression_alone_tells_only_a_refusal_decided_beforehand_protects() -> None:
    # Cells 0, 2, 1, 1, 2 (seed 5 of the campaign): every count of the first release is small, and in the
    # second ABCE = 5 is not while ACDE and AD are. Those rules alone pin every cell. The site's protect
    # refuses the second release (and the refusal tells the recipient who reruns it); the simulatable
    # protector, which keeps primary suppression as it is, states them. Refusing whenever some pattern of
    # small counts the first release allows would tell, before a value of the second is read, tells nothing.
    table, releases = (0, 2, 1, 1, 2), (("abcd", "acd", "ae", "c", "d"), ("abce", "acde", "ad"))
    assert ("c", 1) in rerun.play(table, releases, None, observe)["pinned_by_facts"]
    refusing = functools.partial(observe, refuse=True)
    assert refusing(table, releases)[1] == ("refused",)
    result = rerun.play(table, releases, None, refusing)
    assert result["kept"] == result["tables"] and result["told"] == result["pinned_by_facts"] == []
