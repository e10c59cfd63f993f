"""Simulatable auditing in the toy world of :mod:`simulations.rerun`: what it costs in released counts.

The site's audit decides from values: whether it withholds more, and which count, depends on values the
stated facts do not give, and a recipient who reruns the algorithm on every table those facts allow learns
from it (docs/threat-model.md, R12). A simulatable protector decides each count from what is already public
and for every value the count could take, never from the value itself, so that rerunning it tells nothing.
This module builds an idealised one for the campaign's world (five cells, 0..12 each, k = 5, zeros shown),
by enumeration over the same grid, and compares it with the site's ``protect`` on the campaign's scenarios.

For each release, in turn:

1. **Primary suppression**, exactly as the site does it: a count in 1..k−1 is withheld
   (``minimum_cell_size``). Its rule is stated, so the pattern is public: every other count is 0 or at
   least k.
2. **Complementary suppression**, exactly as the site does it (:func:`site_agent.disclosure.suppress`): its
   choice reads the pattern of withheld counts and the relations, never a value, so it is public as soon as
   the pattern is, and its fact ("0, or at least k") is one the pattern already gives. Keeping it makes the
   comparison isolate the audit; the step below would catch every count it protects anyway (a small count
   recomputed from a total and its parts is a region pinned to a small value).
3. **The simulatable audit**: every other count in a fixed order (:func:`decision_order`). For a count,
   S is the set of tables consistent with everything public so far (the earlier releases' stated facts,
   steps 1 and 2, the counts of this release shown so far). For each value v the count takes over S: if
   the tables of S where it equals v pin a region (:func:`simulations.rerun.regions` of both releases,
   those the campaign checks; so the first release already knows the second request's regions, which a site
   could not) to 1..k−1 that S left open, the count is withheld (``audit``, whose fact the pattern already
   gives); otherwise it is shown and becomes public. It never refuses (but see ``refuse`` below).

Each decision is a function of the public state alone (cached on it, as :func:`simulations.rerun.observe`
caches on the table), so every table the stated facts allow gets the same decisions: the recipient who
reruns it learns nothing beyond them. What it cannot undo is primary suppression's own fact: where the
earlier releases and which counts are small already pin a region, the stated facts pin it too. With
``refuse`` it refuses such a release, and decides so before reading any of its values: whenever some
pattern of small counts that the earlier releases allow would pin a region they leave open
(:func:`primary_could_tell`).

    python -m simulations.simulatable --seed 3 --scenarios 150      (make audit-simulatable)

The scenarios, the cap and the skip rule are those of ``make audit-campaign``, decided by the site's
``protect``, so that both protectors are compared on the same set.
"""

from __future__ import annotations

import argparse
import functools
import json
import sys
import time
from collections.abc import Iterable

import numpy as np

from site_agent.disclosure import is_unsafe, suppress

from .rerun import CELLS, K, counts_of, draw_scenarios, pinned_small, play, regions, stated
from .rerun import observe as site_observe

Releases = tuple[tuple[str, ...], ...]


def decision_order(names: list[str]) -> list[str]:
    """The order in which the simulatable audit decides the counts primary and complementary suppression left.

    A count decided later faces narrower public facts, so it is the one more often withheld. The site's audit
    withholds first the candidate that matters least (other analyses before the primary table, then by name;
    every count here is of one analysis, so by name); deciding in the reverse order keeps that preference:
    the count the site would give up first is decided last.
    """
    return sorted(names, reverse=True)


@functools.cache
def withholds(releases: Releases, public: tuple, name: str) -> bool:
    """Whether the simulatable audit withholds ``name`` of the last release in ``public``.

    ``public`` is what the recipient knows when the count is decided: the earlier releases as seen, and this
    release's entries so far ((name, value, rule); a count not yet decided has neither value nor rule).
    """
    tables = stated(public, releases[: len(public)])
    box = releases[len(public) - 1][int(name.rsplit("b", 1)[1])]
    return _some_part_pins(tables, regions(releases), tables[:, [CELLS.index(c) for c in box]].sum(axis=1))


@functools.cache
def primary_could_tell(releases: Releases, seen: tuple) -> bool:
    """Whether some pattern of small counts in the next release, among those the releases ``seen`` so far
    allow, would pin a region to 1..k−1 that they leave open: primary suppression's rules would then tell it.

    Decided before any value of the release is read, so refusing on it tells nothing either.
    """
    tables = stated(seen, releases[: len(seen)])
    pattern = np.zeros(len(tables), np.int64)
    for i, box in enumerate(releases[len(seen)]):
        totals = tables[:, [CELLS.index(c) for c in box]].sum(axis=1)
        pattern |= ((totals >= 1) & (totals < K)).astype(np.int64) << i
    return _some_part_pins(tables, regions(releases), pattern)


def _some_part_pins(tables: np.ndarray, names: list[str], key: np.ndarray) -> bool:
    """Whether, with ``tables`` split by ``key`` (one value per table: what a decision would reveal), some part
    pins a region of ``names`` to 1..k−1 that all of them leave open."""
    before = pinned_small(tables, names)
    return any(pinned_small(tables[key == value], names) - before for value in np.unique(key))


@functools.cache
def observe(table: tuple[int, ...], releases: Releases, refuse: bool = False) -> tuple:
    """What the recipient sees of each release when the simulatable protector releases ``table``'s counts.

    It never refuses, unless ``refuse``: then it refuses a release where :func:`primary_could_tell`.
    """
    values = dict(zip(CELLS, table, strict=True))
    seen: list[tuple] = []
    for boxes in releases:
        if refuse and primary_could_tell(releases, tuple(seen)):
            seen.append(("refused",))
            continue
        counts = counts_of(values, boxes)
        _, withheld = suppress(counts.values, counts.relations, K)
        entries = {
            name: (name, None, "minimum_cell_size" if is_unsafe(counts.values[name], K, True) else "complementary")
            for name in withheld
        }
        for name in decision_order([n for n in counts.values if n not in withheld]):
            if withholds(releases, (*seen, _release(counts.values, entries)), name):
                entries[name] = (name, None, "audit")
            else:
                entries[name] = (name, counts.values[name], None)
        seen.append(_release(counts.values, entries))
    return tuple(seen)


def _release(names: Iterable[str], entries: dict[str, tuple]) -> tuple:
    """A release as the recipient sees it; a count not decided yet has neither value nor rule."""
    return tuple(entries.get(name, (name, None, None)) for name in sorted(names))


def figures(seen: tuple, releases: Releases) -> dict:
    """Per release, counts shown and whether it was refused; and withheld counts other than small ones whose
    value (not 0) the stated facts pin all the same (the site's audit keeps two values for each; this
    protector does not try)."""
    possible = stated(seen, releases)
    shown, refused, known = [], [], 0
    for boxes, release in zip(releases, seen, strict=True):
        refused.append(int(release == ("refused",)))
        if refused[-1]:
            shown.append(0)
            continue
        shown.append(sum(value is not None for _, value, _ in release))
        for name, value, rule in release:
            if value is None and rule != "minimum_cell_size":
                box = boxes[int(name.rsplit("b", 1)[1])]
                totals = possible[:, [CELLS.index(c) for c in box]].sum(axis=1)
                known += int(totals.min() == totals.max() > 0)  # a withheld 0 needs no protection: zeros are shown
    return {"shown": shown, "refused": refused, "withheld_but_pinned": known}


def compare(seed: int, scenarios: int, cap: int, refuse: bool = False, out=sys.stdout) -> dict:
    """The campaign's scenarios under the site's ``protect`` and under the simulatable protector.

    Which scenarios are skipped is decided by the site's ``protect``, as in the campaign; the simulatable
    protector is played on the same set, however many tables its own facts leave to rerun.
    """
    protectors = {"site": site_observe, "simulatable": functools.partial(observe, refuse=refuse)}
    totals = {
        label: {
            "told": 0,
            "pinned_by_facts": 0,
            "shown": [0, 0],
            "refused": [0, 0],
            "withheld_but_pinned": 0,
            "seconds": 0.0,
        }
        for label in protectors
    }
    against = {"fewer": 0, "same": 0, "more": 0}
    skipped = 0
    for table, first, second in draw_scenarios(seed, scenarios):
        releases = (first, second)
        started = time.perf_counter()
        site = play(table, releases, cap)
        totals["site"]["seconds"] += time.perf_counter() - started
        if site is None:
            skipped += 1
            continue
        started = time.perf_counter()
        # a first release refused (only with ``refuse``): nothing released, nothing told
        ours = play(table, releases, None, protectors["simulatable"]) or {"told": [], "pinned_by_facts": []}
        totals["simulatable"]["seconds"] += time.perf_counter() - started
        shown = {}
        for label, result in (("site", site), ("simulatable", ours)):
            counted, total = figures(protectors[label](table, releases), releases), totals[label]
            total["told"] += bool(result["told"])
            total["pinned_by_facts"] += bool(result["pinned_by_facts"])
            for key in ("shown", "refused"):
                total[key] = [a + b for a, b in zip(total[key], counted[key], strict=True)]
            total["withheld_but_pinned"] += counted["withheld_but_pinned"]
            shown[label] = sum(counted["shown"])
        if ours["told"] or ours["pinned_by_facts"]:
            print(
                f"simulatable: the rerun pins {ours['told']}, the stated facts pin {ours['pinned_by_facts']}: cells "
                f"{table}, first {first}, second {second}",
                file=out,
                flush=True,
            )
        difference = shown["simulatable"] - shown["site"]
        against["fewer" if difference < 0 else "more" if difference > 0 else "same"] += 1
    for total in totals.values():
        total["seconds"] = round(total["seconds"], 1)
    summary = {"seed": seed, "scenarios": scenarios, "checked": scenarios - skipped, "skipped": skipped}
    summary |= {"refuse": refuse, **totals, "simulatable_shows": against}
    for label, total in totals.items():
        print(
            f"seed {seed}, {label}: {summary['checked']} scenarios ({skipped} skipped); the rerun pins a count the "
            f"facts leave open in {total['told']}, the stated facts pin one in {total['pinned_by_facts']}; counts "
            f"shown {sum(total['shown'])} (first release {total['shown'][0]}, second {total['shown'][1]}); "
            f"releases refused {total['refused'][0]} first, {total['refused'][1]} second; withheld counts the "
            f"facts pin {total['withheld_but_pinned']}; {total['seconds']} s",
            file=out,
        )
    print(
        f"seed {seed}: the simulatable protector shows fewer counts in {against['fewer']} scenarios, as many in "
        f"{against['same']}, more in {against['more']}",
        file=out,
    )
    return summary


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m simulations.simulatable",
        description="Compare the site's disclosure algorithm with a simulatable one on the scenarios of "
        "`make audit-campaign` (docs/threat-model.md, R12): what each lets a recipient who reruns it learn, "
        "and how many counts each shows.",
    )
    parser.add_argument("--seed", type=int, default=3, help="random seed of the scenarios (default 3)")
    parser.add_argument("--scenarios", type=int, default=150, help="scenarios to draw (default 150)")
    parser.add_argument("--cap", type=int, default=300, help="skip a scenario with more tables to rerun (default 300)")
    parser.add_argument(
        "--refuse",
        action="store_true",
        help="let the simulatable protector refuse a release when primary suppression's rules alone could pin a "
        "small count (decided before any value of the release is read)",
    )
    parser.add_argument("--json", action="store_true", help="print the summary as JSON after the lines")
    args = parser.parse_args(argv)
    summary = compare(args.seed, args.scenarios, args.cap, args.refuse)
    if args.json:
        print(json.dumps(summary))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
