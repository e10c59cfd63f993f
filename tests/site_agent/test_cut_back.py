"""Cutting back other analyses so that the primary table keeps its cells (site_agent.disclosure.protect).

Where the audit makes the primary 2x2 table pay for another analysis, the site tries again with the parts it
found exposed cut back, and keeps the attempt that withholds the fewest of the primary table's cells. Each
audit round of an attempt only withholds more, so an attempt that already withholds as many of those cells as
the best one so far stops there. These tests hold that stop to the attempts run to their end: the same
releases, reasons and cut-back lines, on random site histories of mixed requests (generated records of
their own making, as in test_audit_groups.py).
"""

from __future__ import annotations

import random
from types import SimpleNamespace

from federation.protocol import PolicyViolation
from site_agent import disclosure
from site_agent.audit import Audit, ReleaseFacts
from site_agent.counts import ANALYSED, Condition, CountSet

from .test_audit_groups import DOMAINS, OUTCOMES, records, with_flow


def mixed_request(data: dict, cut: float, other_cut: float, edges: list[float], age_cut: int) -> CountSet:
    """One request's counts: the flow, the primary 2x2 table (``confusion[0]``), a 2x2 table at another
    threshold, ROC bands, and subgroup tables by age band and by sex at the primary threshold."""
    out, add = with_flow(data)
    for t, threshold in enumerate((cut, other_cut)):
        for outcome, word in OUTCOMES:
            add(f"confusion[{t}].{word}.above", ANALYSED, outcome, Condition("score", low=threshold))
            add(f"confusion[{t}].{word}.below", ANALYSED, outcome, Condition("score", high=threshold))
            out.relate(f"flow.analysed_{word}", f"confusion[{t}].{word}.above", f"confusion[{t}].{word}.below")
    bands = [None, *edges, None]
    for outcome, word in OUTCOMES:
        parts = []
        for j in range(len(bands) - 1):
            add(f"roc.{word}[{j}]", ANALYSED, outcome, Condition("score", low=bands[j], high=bands[j + 1]))
            parts.append(f"roc.{word}[{j}]")
        out.relate(f"flow.analysed_{word}", *parts)
    groups = {
        "age": (Condition("age_months", high=age_cut), Condition("age_months", low=age_cut)),
        "sex": (Condition("sex", ("f",)), Condition("sex", ("m",))),
    }
    for variable, (first, second) in groups.items():
        for outcome, word in OUTCOMES:
            totals = []
            for level, group in enumerate((first, second)):
                name = f"subgroups.{variable}[{level}].{word}"
                add(name, ANALYSED, outcome, group)
                add(f"{name}.above", ANALYSED, outcome, group, Condition("score", low=cut))
                add(f"{name}.below", ANALYSED, outcome, group, Condition("score", high=cut))
                out.relate(name, f"{name}.above", f"{name}.below")
                totals.append(name)
            out.relate(f"flow.analysed_{word}", *totals)
    return out


def _history(seed: int, stop: bool) -> tuple[list, int, int]:
    """Five requests to one site (each protected against the releases before it): what each gave (its
    released counts, reasons and cut-back lines, or its refusal), the attempts made and the audit rounds run.
    ``stop=False`` runs every attempt to its end."""
    rng = random.Random(seed)
    data = records(seed, rng.choice([60, 100, 200, 400]))
    policy = SimpleNamespace(min_cell_size=rng.choice([3, 5, 10]), allow_zero=True)
    once, evaluate = disclosure._protect_once, Audit.evaluate
    used = {"attempts": 0, "rounds": 0}

    def attempt(context, primary, dropped, beaten=None):  # noqa: ANN001, ANN202
        used["attempts"] += 1
        return once(context, primary, dropped, beaten if stop else None)

    def counted(self, *args, **kwargs):  # noqa: ANN001, ANN002, ANN003, ANN202
        used["rounds"] += 1
        return evaluate(self, *args, **kwargs)

    outcomes, earlier = [], []
    disclosure._protect_once, Audit.evaluate = attempt, counted
    try:
        for step in range(5):
            cut, other_cut = rng.choice([0.3, 0.35, 0.4, 0.45, 0.5]), rng.choice([0.25, 0.55, 0.6])
            edges = sorted({round(rng.uniform(0.1, 0.8), 2) for _ in range(rng.randint(2, 5))})
            counts = mixed_request(data, cut, other_cut, edges, rng.randint(12, 60))
            primary = frozenset(n for n in counts.values if n.startswith(("flow.", "confusion[0].")))
            try:
                protected = disclosure.protect(counts, policy, earlier, "", f"r{step}", primary, DOMAINS)
            except PolicyViolation as refused:
                outcomes.append(str(refused))
                continue
            outcomes.append((protected.released, protected.reasons, protected.cut_back))
            earlier.append(ReleaseFacts.from_dict(f"r{step}", protected.facts(counts)))
    finally:
        disclosure._protect_once, Audit.evaluate = once, evaluate
    return outcomes, used["attempts"], used["rounds"]


def test_an_attempt_that_cannot_keep_more_of_the_primary_table_stops_with_the_same_releases() -> None:
    # Seeds 8 and 25: 10 requests, two of them released with analyses cut back (their best attempt is not the
    # first). Run to their end: 20 attempts, 81 audit rounds; with the stop: 23 attempts, 74 rounds. A stopped
    # attempt passes on only the parts it found exposed so far, so the next attempt may cut back fewer (more
    # attempts), and the best attempt is the same. In make bench the 10-release request took 3.7 s, 3.1 s of it
    # in two attempts that could not do better (1.6 s with the stop). Stopping every attempt after its first
    # round fails here.
    attempts = rounds = stopped_rounds = 0
    for seed in (8, 25):
        full, attempts_full, rounds_full = _history(seed, stop=False)
        stopped, _, rounds_stopped = _history(seed, stop=True)
        assert stopped == full, seed
        attempts, rounds = attempts + attempts_full, rounds + rounds_full
        stopped_rounds += rounds_stopped
    assert attempts > 10  # (20) requests were cut back
    assert stopped_rounds < rounds  # and some attempt stopped early
