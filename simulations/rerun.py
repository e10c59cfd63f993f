"""A recipient who reruns the site's algorithm: how often do the audit's own decisions tell a small count?

The disclosure audit states what each rule tells (``suppressed_by``: a ``minimum_cell_size`` count is small,
a ``complementary`` or ``audit`` count is not) and checks that those facts, with every value released, pin
nothing the policy hides. A recipient who knows the algorithm can do more (docs/threat-model.md, R12): take
every table those facts leave possible, run the site's algorithm on each, and keep the tables on which it
shows exactly what it showed. Where the audit's decisions (what it withheld, whether it refused) depend on
values the facts do not state, that can pin a count the facts leave open.

This campaign plays that recipient over random requests: five cells of one variable (values drawn from
0..7, k = 5, zeros shown), a first release of 2..5 counts (each a random set of cells) and a second release
of 1..3 counts at the same site. For each it enumerates every table of cells 0..12 that the stated facts of
both releases allow (numpy; a table cut at 12 can only remove possibilities), reruns
:func:`site_agent.disclosure.protect` on each, and reports every region (a cell, a group of cells the same
counts hold, a difference of two nested counts, a count) the rerun pins to 1..k−1 while the stated facts
left it open, and which decision told it: the first release's, the second release's, or a refusal.

    python -m simulations.rerun --seed 3 --scenarios 150      (make audit-campaign)

Scenarios whose stated facts leave more than ``--cap`` tables are skipped (the rerun costs one pass of the
algorithm per table); the count skipped is printed. The figures in docs/threat-model.md (R12) come from here.
"""

from __future__ import annotations

import argparse
import functools
import random
import sys
import time
from collections.abc import Callable, Iterator

import numpy as np

from federation.protocol import PolicyViolation
from site_agent.audit import ReleaseFacts
from site_agent.counts import Condition, CountSet
from site_agent.disclosure import protect

CELLS = "abcde"
K = 5
_GRID = np.stack(np.meshgrid(*[np.arange(13)] * len(CELLS), indexing="ij"), axis=-1).reshape(-1, len(CELLS))


class _Policy:
    min_cell_size = K
    allow_zero = True
    protection_width = 2


def counts_of(values: dict[str, int], boxes: tuple[str, ...]) -> CountSet:
    """A count per box (a set of cells of ``z``), related where two boxes split a third."""
    out = CountSet()
    for i, box in enumerate(boxes):
        out.add(f"t.b{i}", sum(values[c] for c in box), Condition("z", tuple(box)))
    for i, box in enumerate(boxes):
        for j, part in enumerate(boxes):
            for other in boxes[j + 1 :]:
                if set(part) | set(other) == set(box) and not set(part) & set(other):
                    out.relate(f"t.b{i}", f"t.b{j}", f"t.b{boxes.index(other)}")
    return out


@functools.cache
def observe(table: tuple[int, ...], releases: tuple[tuple[str, ...], ...]) -> tuple:
    """What the recipient sees of each release when the site's records are ``table``."""
    values = dict(zip(CELLS, table, strict=True))
    earlier: list[ReleaseFacts] = []
    seen: list[tuple] = []
    for r, boxes in enumerate(releases):
        counts = counts_of(values, boxes)
        try:
            protected = protect(counts, _Policy(), earlier, label=f"r{r}")
        except PolicyViolation:
            seen.append(("refused",))
            continue
        seen.append(tuple((n, protected.released[n], protected.rules.get(n)) for n in sorted(protected.released)))
        earlier.append(ReleaseFacts.from_dict(f"r{r}", protected.facts(counts)))
    return tuple(seen)


def _sums(box: str) -> np.ndarray:
    return _GRID[:, [CELLS.index(c) for c in box]].sum(axis=1)


def stated(seen: tuple, releases: tuple[tuple[str, ...], ...]) -> np.ndarray:
    """Every table the released values and the rules' facts allow ("0, or at least k" as a disjunction).

    A count with neither a value nor a rule belongs to a release still being decided
    (:mod:`simulations.simulatable`): primary suppression did not take it, so it is not small either.
    """
    ok = np.ones(len(_GRID), bool)
    for boxes, release in zip(releases, seen, strict=True):
        if release == ("refused",):
            continue
        for name, value, rule in release:
            total = _sums(boxes[int(name.rsplit("b", 1)[1])])
            if value is not None:
                ok &= total == value
            elif rule == "minimum_cell_size":
                ok &= (total >= 1) & (total <= K - 1)
            elif rule in ("complementary", "audit", None):
                ok &= (total == 0) | (total >= K)
    return _GRID[ok]


def regions(releases: tuple[tuple[str, ...], ...]) -> list[str]:
    boxes = [b for release in releases for b in release]
    groups: dict[tuple[bool, ...], str] = {}
    for cell in CELLS:
        key = tuple(cell in b for b in boxes)
        groups[key] = groups.get(key, "") + cell
    out = set(groups.values()) | set(boxes)
    out |= {"".join(sorted(set(f) - set(g))) for f in boxes for g in boxes if set(g) < set(f)}
    return sorted(out)


def pinned_small(tables: np.ndarray, names: list[str]) -> set[tuple[str, int]]:
    """Each region of ``names`` that all of ``tables`` (at least one) give the same value in 1..k−1, with it."""
    out = set()
    for region in names:
        values = tables[:, [CELLS.index(c) for c in region]].sum(axis=1)
        if (value := int(values.min())) == values.max() and 0 < value < K:
            out.add((region, value))
    return out


def play(
    table: tuple[int, ...],
    releases: tuple[tuple[str, ...], ...],
    cap: int | None,
    algorithm: Callable[[tuple[int, ...], tuple[tuple[str, ...], ...]], tuple] = observe,
) -> dict | None:
    """One scenario: None if skipped (the first release refused, or more than ``cap`` tables to rerun).

    ``algorithm`` is what the site runs and the recipient reruns (default: the site's ``protect``).
    """
    seen = algorithm(table, releases)
    if seen[0] == ("refused",):
        return None
    possible = stated(seen, releases)
    if cap is not None and len(possible) > cap:
        return None
    names = regions(releases)
    kept, channels = [], set()
    for row in possible:
        other = algorithm(tuple(int(x) for x in row), releases)
        if other == seen:
            kept.append(row)
        elif other[0] != seen[0]:
            channels.add("first release")
        else:
            channels.add("refusal" if ("refused",) in (other[1], seen[1]) else "second release")
    by_facts = pinned_small(possible, names)
    told = sorted(pinned_small(np.array(kept), names) - by_facts)
    return {
        "tables": len(possible),
        "kept": len(kept),
        "told": told,
        "channels": sorted(channels) if told else [],
        "pinned_by_facts": sorted(by_facts),
    }


def _boxes(rng: random.Random, fewest: int, most: int) -> tuple[str, ...]:
    draws = range(rng.randint(fewest, most))
    return tuple(sorted({"".join(sorted(rng.sample(CELLS, rng.randint(1, 4)))) for _ in draws}))


def draw_scenarios(seed: int, count: int) -> Iterator[tuple[tuple[int, ...], tuple[str, ...], tuple[str, ...]]]:
    """The campaign's random requests: the cells' values, the first release's boxes, the second's."""
    rng = random.Random(seed)
    for _ in range(count):
        table = tuple(rng.choice([0, 0, 1, 2, 4, 5, 6, 7]) for _ in CELLS)
        first = _boxes(rng, 2, 5)
        second = _boxes(rng, 1, 3)
        yield table, first, second


def campaign(seed: int, scenarios: int, cap: int, out=sys.stdout) -> dict:
    checked = skipped = told = 0
    channels: dict[str, int] = {}
    started = time.perf_counter()
    for table, first, second in draw_scenarios(seed, scenarios):
        result = play(table, (first, second), cap)
        if result is None:
            skipped += 1
            continue
        checked += 1
        if result["told"]:
            told += 1
            for channel in result["channels"]:
                channels[channel] = channels.get(channel, 0) + 1
            print(
                f"told {result['told']} by {', '.join(result['channels'])}: cells {table}, first {first}, "
                f"second {second}",
                file=out,
                flush=True,
            )
    summary = {
        "seed": seed,
        "scenarios": scenarios,
        "checked": checked,
        "skipped": skipped,
        "told": told,
        "channels": channels,
        "seconds": round(time.perf_counter() - started, 1),
    }
    print(
        f"seed {seed}: {checked} scenarios checked ({skipped} skipped), in {told} the rerun pins a count the "
        f"stated facts leave open; decisions that told: {channels or 'none'}; {summary['seconds']} s",
        file=out,
    )
    return summary


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m simulations.rerun",
        description="Play a recipient who reruns the site's disclosure algorithm on every table the stated "
        "facts allow (docs/threat-model.md, R12); print each count it pins that the facts leave open.",
    )
    parser.add_argument("--seed", type=int, default=3, help="random seed of the scenarios (default 3)")
    parser.add_argument("--scenarios", type=int, default=150, help="scenarios to draw (default 150)")
    parser.add_argument("--cap", type=int, default=300, help="skip a scenario with more tables to rerun (default 300)")
    args = parser.parse_args(argv)
    campaign(args.seed, args.scenarios, args.cap)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
