"""A recipient who reasons with whole numbers, against random requests in a system too large for the audit's
small-system check (docs/threat-model.md, R3).

Each request is six cells of one variable (values 0..8), two counts over them released earlier and three or
four asked now (random sets of one to five cells), beside a path of ``pad`` more cells from one of them (pair
sums of cells 6..8, released earlier: they make the system larger than the 60 atoms the audit's small-system
check takes, and leave every cell of the six free). The site's ``protect`` decides both releases (k = 5, zeros
shown). The recipient then takes every count shown, earlier or now, and computes with scipy's own
``milp`` the least and greatest value of each of the six cells (with ``--unions``: of each of their 63 unions)
over whole-number tables of those counts. A region it pins to 1..k−1 is a leak; the line printed says whether
the real relaxation (scipy's ``linprog``) pinned it too.

The recipient here knows less than the audit assumes (it does not use what a withheld count's rule tells), so a
leak it finds is a real one; finding none is no proof.

    python -m simulations.whole_numbers --seed 1 --requests 400      (make audit-whole)
"""

from __future__ import annotations

import argparse
import itertools
import random
import time
from dataclasses import dataclass

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

from federation.protocol import PolicyViolation
from site_agent.audit import ReleaseFacts
from site_agent.counts import Condition, CountSet
from site_agent.disclosure import protect

CELLS = "abcdef"
K = 5


class _Policy:
    min_cell_size = K
    allow_zero = True
    protection_width = 2


@dataclass(frozen=True)
class Request:
    """One drawn request: the six cells' values, the cell the path starts from, the counts (each a string of
    cells) released earlier and asked now."""

    values: dict[str, int]
    start: str
    earlier: tuple[str, ...]
    now: tuple[str, ...]


def draw(rng: random.Random) -> Request:
    def cells() -> str:
        while True:
            chosen = "".join(c for c in CELLS if rng.random() < 0.5)
            if 1 <= len(chosen) <= 5:
                return chosen

    values = {c: rng.randrange(9) for c in CELLS}
    start = rng.choice(CELLS)
    earlier = (cells(), cells())
    now = tuple(cells() for _ in range(rng.choice([3, 4])))
    return Request(values, start, earlier, now)


def release(request: Request, pad: int) -> tuple[list[tuple[tuple[str, ...], int]], dict[str, int | None]]:
    """Both releases through the site's ``protect``: every count the recipient sees (its cells and value) and
    what the second release shows (None: withheld). Raises PolicyViolation where the site refuses."""
    values = dict(request.values) | {f"m{j}": 6 + j % 3 for j in range(pad)}
    path = [request.start, *(f"m{j}" for j in range(pad))]
    history = CountSet()
    for j in range(pad):
        pair = (path[j], path[j + 1])
        history.add(f"h.p{j}", values[pair[0]] + values[pair[1]], Condition("z", pair))
    for j, cells in enumerate(request.earlier):
        history.add(f"h.e{j}", sum(values[c] for c in cells), Condition("z", tuple(cells)))
    first = protect(history, _Policy())
    earlier = ReleaseFacts.from_dict("r0", first.facts(history))
    current = CountSet()
    for j, cells in enumerate(request.now):
        current.add(f"t.n{j}", sum(values[c] for c in cells), Condition("z", tuple(cells)))
    second = protect(current, _Policy(), [earlier], label="r1")
    seen = [(d.where[0].values, v) for n, d in earlier.definitions.items() if (v := earlier.values[n]) is not None]
    seen += [(tuple(request.now[int(n[3:])]), v) for n, v in second.released.items() if v is not None]
    return seen, second.released


def pinned(seen: list[tuple[tuple[str, ...], int]], unions: bool) -> list[tuple[str, int, bool]]:
    """Each region of the six cells the shown counts pin to 1..k−1 over whole numbers (scipy's ``milp``): the
    region, its value, and whether the reals pin it too (scipy's ``linprog``)."""
    names = sorted({c for cells, _ in seen for c in cells} | set(CELLS))
    rows = np.array([[1.0 if c in cells else 0.0 for c in names] for cells, _ in seen])
    totals = np.array([v for _, v in seen], float)
    sizes = range(1, len(CELLS) + 1) if unions else (1,)
    found = []
    for region in ("".join(r) for size in sizes for r in itertools.combinations(CELLS, size)):
        target = np.array([1.0 if c in region else 0.0 for c in names])
        ends = []
        for sign in (1.0, -1.0):
            result = milp(
                sign * target,
                constraints=[LinearConstraint(rows, totals, totals)],
                integrality=np.ones(len(names)),
                bounds=Bounds(0, np.inf),
            )
            ends.append(round(sign * result.fun) if result.status == 0 else None)  # None: unbounded
        if None in ends or ends[0] != ends[1] or not 0 < ends[0] < K:
            continue
        reals = [linprog(sign * target, A_eq=rows, b_eq=totals, bounds=(0, None)) for sign in (1.0, -1.0)]
        found.append((region, ends[0], abs(reals[0].fun + reals[1].fun) < 1e-6))
    return found


def campaign(seed: int, requests: int, pad: int, unions: bool) -> int:
    """Draw and play ``requests`` requests; print each leak; return the number of requests that leaked."""
    rng = random.Random(seed)
    leaked = refused = 0
    started = time.perf_counter()
    for number in range(requests):
        request = draw(rng)
        try:
            seen, shown = release(request, pad)
        except PolicyViolation:
            refused += 1
            continue
        found = pinned(seen, unions)
        if found:
            leaked += 1
            said = ", ".join(f"{r} = {v}" + (" (reals too)" if reals else "") for r, v, reals in found)
            print(f"request {number}: {request} shows {shown}: pins {said}", flush=True)
    print(
        f"seed {seed}, {requests} requests, path of {pad} cells, {'every union' if unions else 'each cell'}: "
        f"{leaked} leaked, {refused} refused ({time.perf_counter() - started:.0f} s)"
    )
    return leaked


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m simulations.whole_numbers",
        description="Random requests of six cells beside a path of cells, released by the site's protect; a "
        "recipient with scipy's integer programs over every shown count prints each cell (or union) it pins to "
        "1..k-1 (docs/threat-model.md, R3).",
    )
    parser.add_argument("--seed", type=int, default=1, help="random seed of the requests (default 1)")
    parser.add_argument("--requests", type=int, default=400, help="requests to draw (default 400)")
    parser.add_argument("--pad", type=int, default=70, help="cells on the path beside the six (default 70)")
    parser.add_argument("--unions", action="store_true", help="check every union of the six cells, not each cell")
    args = parser.parse_args(argv)
    campaign(args.seed, args.requests, args.pad, args.unions)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
