"""The disclosure audit across releases (site_agent.audit), checked against an independent LP oracle.

External references:
- Hundepool A, Domingo-Ferrer J, Franconi L, et al. *Statistical Disclosure Control*. Wiley 2012, ch. 4
  (feasibility intervals of suppressed cells in a table with margins) and ch. 5 (disclosure by
  differencing two tabulations of the same population with overlapping classifications). The tables below
  are in the manner of the book's examples; their values are (from memory), not copied from the book.
- The oracle is scipy.optimize.linprog over the finest cells the test builds itself from the band edges
  (not the audit's refinement): min and max of a count subject to every released count.
"""

from __future__ import annotations

import math
from types import SimpleNamespace

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import Bounds, LinearConstraint, linprog, milp

from federation.protocol import PolicyViolation
from site_agent.audit import Audit, ReleaseFacts
from site_agent.counts import Condition, CountSet
from site_agent.disclosure import protect

POSITIVE = Condition("outcome", ("1",))
NEGATIVE = Condition("outcome", ("0",))


def policy(k: int = 10, allow_zero: bool = True, width: int = 2) -> SimpleNamespace:
    return SimpleNamespace(min_cell_size=k, allow_zero=allow_zero, protection_width=width)


# --- an oracle independent of site_agent.audit ----------------------------------------------------------------


def oracle_interval(
    cells: list[tuple],
    facts: list[tuple[tuple, int]],
    region: set[tuple],
    bounds: list[tuple] = (),
    either: tuple[int, list[set]] = (0, []),
) -> tuple[int, int]:
    """Whole-number interval (LP bounds rounded inward, or exact where a fact is "at least k") of the count of
    ``region`` given ``facts``.

    ``cells`` are the finest cells of the test's record space; each fact is (set of cells, released value);
    each bound is (set of cells, low, high): what a withheld count's rule tells (minimum cell size: 1..k-1;
    withheld as not small with zeros hidden: k..inf). ``either = (k, sets)``: counts withheld as not small
    with zeros shown, each "0, or at least k"; then the interval is exact over whole numbers
    (scipy.optimize.milp, a 0/1 variable z per count: k·z <= count <= N·z, N bounding every count).
    """
    index = {cell: i for i, cell in enumerate(cells)}
    a = np.zeros((len(facts), len(cells)))
    for row, (members, _) in enumerate(facts):
        for cell in members:
            a[row, index[cell]] = 1.0
    b = np.array([value for _, value in facts], float)
    c = np.zeros(len(cells))
    for cell in region:
        c[index[cell]] = 1.0
    k, disjunctions = either
    if disjunctions or any(math.isinf(hi) for _, _, hi in bounds):
        return _whole_number_interval(a, b, c, index, bounds, k, disjunctions)
    g = np.zeros((2 * len(bounds), len(cells)))
    h = np.zeros(2 * len(bounds))
    for row, (members, lo, hi) in enumerate(bounds):
        for cell in members:
            g[2 * row, index[cell]], g[2 * row + 1, index[cell]] = 1.0, -1.0
        h[2 * row], h[2 * row + 1] = hi, -lo
    ub = {"A_ub": g, "b_ub": h} if len(bounds) else {}
    low = linprog(c, A_eq=a, b_eq=b, bounds=(0, None), method="highs", **ub)
    high = linprog(-c, A_eq=a, b_eq=b, bounds=(0, None), method="highs", **ub)
    assert low.status == 0, "the released counts must be consistent"
    top = math.inf if high.status == 3 else -high.fun
    return math.ceil(low.fun - 1e-6), (math.floor(top + 1e-6) if math.isfinite(top) else 10**9)


def _whole_number_interval(
    a: np.ndarray, b: np.ndarray, c: np.ndarray, index: dict, bounds: list[tuple], k: int, disjunctions: list[set]
) -> tuple[int, int]:
    n, m = len(c), len(disjunctions)
    big = float(max(b.max(initial=0.0), 1.0)) * 4 + 1000.0  # above any count consistent with the facts here
    rows, low, high = [np.hstack([a, np.zeros((len(a), m))])], [b], [b]
    for members, lo, hi in bounds:
        row = np.zeros(n + m)
        row[[index[cell] for cell in members]] = 1.0
        rows.append(row[None])
        low.append([lo])
        high.append([hi])
    for j, members in enumerate(disjunctions):  # count - k·z >= 0 and count - big·z <= 0
        for weight, lo, hi in ((k, 0.0, np.inf), (big, -np.inf, 0.0)):
            row = np.zeros(n + m)
            row[[index[cell] for cell in members]] = 1.0
            row[n + j] = -weight
            rows.append(row[None])
            low.append([lo])
            high.append([hi])
    constraint = LinearConstraint(np.vstack(rows), np.concatenate(low), np.concatenate(high))
    box = Bounds(np.zeros(n + m), np.concatenate([np.full(n, np.inf), np.ones(m)]))
    found = []
    objective = np.concatenate([c, np.zeros(m)])
    for sign in (1.0, -1.0):
        result = milp(sign * objective, constraints=constraint, integrality=np.ones(n + m), bounds=box)
        if sign < 0 and result.status == 3:
            return round(found[0]), 10**9
        assert result.status == 0, "the released counts must be consistent"
        found.append(sign * result.fun)
    return round(found[0]), round(found[1])


def banded_release(edges: list[float], counts: dict[tuple[int, str], int], units: list[float]) -> CountSet:
    """Counts by (band of `age`, outcome), class totals and the grand total, with their relations.

    ``counts[(unit, outcome)]`` holds the records whose age lies in [units[unit], units[unit + 1]).
    """
    out = CountSet()
    bands = list(zip(edges[:-1], edges[1:], strict=True))
    for klass, condition in (("1", POSITIVE), ("0", NEGATIVE)):
        names = []
        for j, (low, high) in enumerate(bands):
            value = sum(v for (u, o), v in counts.items() if o == klass and low <= units[u] < high)
            name = f"subgroups.age[{j}].{'positive' if klass == '1' else 'negative'}"
            out.add(name, value, condition, Condition("age", low=low, high=high))
            names.append(name)
        total = f"subgroups.{'positive' if klass == '1' else 'negative'}"
        out.add(total, sum(v for (u, o), v in counts.items() if o == klass), condition)
        out.relate(total, *names)
    out.add("subgroups.total", sum(counts.values()))
    out.relate("subgroups.total", "subgroups.positive", "subgroups.negative")
    return out


def cells_of(definition, units: list[float], cells: list[tuple]) -> set[tuple]:
    """The test's own reading of a definition: which finest cells (unit, outcome) it contains."""
    chosen = set()
    for unit, klass in cells:
        ok = True
        for condition in definition.where:
            if condition.variable == "outcome":
                ok &= klass in condition.values
            elif condition.variable == "age":
                low = -math.inf if condition.low is None else condition.low
                high = math.inf if condition.high is None else condition.high
                ok &= low <= units[unit] and units[unit + 1] <= high
        if ok:
            chosen.add((unit, klass))
    return chosen


# --- Hundepool et al. 2012, ch. 4: feasibility intervals --------------------------------------------------------


def rectangle_table() -> CountSet:
    """A 3x3 table with margins; the four cells of rows 1-2 x columns 1-2 are to be suppressed.

    Hundepool et al. 2012, ch. 4 (feasibility interval of suppressed cells); values (from memory)::

                 col1  col2  col3 | total
        row1      20    50    10  |   80
        row2       8    19    32  |   59
        row3      17    32    12  |   61
        total     45   101    54  |  200
    """
    values = [[20, 50, 10], [8, 19, 32], [17, 32, 12]]
    out = CountSet()
    row = [Condition("row", (str(i),)) for i in range(3)]
    col = [Condition("col", (str(j),)) for j in range(3)]
    for i in range(3):
        for j in range(3):
            out.add(f"table.c{i}{j}", values[i][j], row[i], col[j])
    for i in range(3):
        out.add(f"table.row{i}", sum(values[i]), row[i])
        out.relate(f"table.row{i}", *(f"table.c{i}{j}" for j in range(3)))
    for j in range(3):
        out.add(f"table.col{j}", sum(values[i][j] for i in range(3)), col[j])
        out.relate(f"table.col{j}", *(f"table.c{i}{j}" for i in range(3)))
    out.add("table.total", 200)
    out.relate("table.total", *(f"table.row{i}" for i in range(3)))
    out.relate("table.total", *(f"table.col{j}" for j in range(3)))
    return out


def test_feasibility_intervals_of_a_suppressed_rectangle_match_the_handbook_formula() -> None:
    # Hundepool et al. 2012, ch. 4: with x11 + x12 = 70, x21 + x22 = 27, x11 + x21 = 28, x12 + x22 = 69 known,
    # x11 lies in [max(0, 28 - 27, 70 - 69), min(70, 28)] = [1, 28], and the others follow:
    # x12 = 70 - x11 in [42, 69], x21 = 28 - x11 in [0, 27], x22 = x11 - 1 in [0, 27]  (worked by hand).
    counts = rectangle_table()
    hidden = {"table.c00", "table.c01", "table.c10", "table.c11"}
    values = {n: (None if n in hidden else v) for n, v in counts.values.items()}
    audit = Audit([], ReleaseFacts("r1", counts.definitions, {}, counts.relations))
    result = audit.evaluate(values, min_cell_size=10, allow_zero=True)
    assert result.ok
    exact = {name: (i.low, i.high) for name, i in result.intervals.items() if i.exact}
    inner = {name: (i.low, i.high) for name, i in result.intervals.items()}
    expected = {"table.c00": (1, 28), "table.c01": (42, 69), "table.c10": (0, 27), "table.c11": (0, 27)}
    for name, (low, high) in expected.items():
        if name in exact:
            assert exact[name] == (low, high)
        else:  # certified without an LP: an inner interval that the true one contains
            assert low <= inner[name][0] <= inner[name][1] <= high
    # the LP oracle agrees with the hand-worked intervals
    cells = [(i, j) for i in range(3) for j in range(3)]
    facts = []
    for name, definition in counts.definitions.items():
        if values[name] is None:
            continue
        rows = {c.values[0] for c in definition.where if c.variable == "row"}
        cols = {c.values[0] for c in definition.where if c.variable == "col"}
        members = {(i, j) for i, j in cells if (not rows or str(i) in rows) and (not cols or str(j) in cols)}
        facts.append((members, values[name]))
    assert oracle_interval(cells, facts, {(0, 0)}) == (1, 28)
    assert oracle_interval(cells, facts, {(0, 1)}) == (42, 69)


def test_a_lone_suppressed_interior_cell_is_found_exposed() -> None:
    # Same table, only x21 = 8 hidden: row 2's total gives it back exactly (ch. 4: why secondary suppression).
    counts = rectangle_table()
    values = {n: (None if n == "table.c10" else v) for n, v in counts.values.items()}
    result = Audit([], ReleaseFacts("r1", counts.definitions, {}, counts.relations)).evaluate(values, 10, True)
    assert not result.ok
    assert [f.kind for f in result.findings] == ["suppressed"]
    assert result.findings[0].names == ("table.c10",)


def test_protect_hides_the_small_cell_and_enough_others() -> None:
    counts = rectangle_table()
    protected = protect(counts, policy(k=10))
    assert protected.released["table.c10"] is None
    for name, value in protected.released.items():
        assert value is None or value == counts.values[name]
    assert protected.audit is not None and protected.audit.ok
    assert all(i.values >= 2 for i in protected.audit.intervals.values())


# --- Hundepool et al. 2012, ch. 5: differencing two overlapping classifications --------------------------------


def test_second_tabulation_with_shifted_age_groups_does_not_reveal_the_difference() -> None:
    # Hundepool et al. 2012, ch. 5 (differencing): the same population tabulated by age groups ending at 15
    # and, later, at 16; the one-year group [15, 16) is the difference of two published figures. Values
    # (from memory): groups [0,15) 120, [15,65) 610, [65,120) 95; then [0,16) 123, [16,65) 607, [65,120) 95,
    # so the difference group holds 3 people (below k = 10).
    by_year = {(0, "1"): 120, (1, "1"): 3, (2, "1"): 607, (3, "1"): 95}
    units = [0.0, 15.0, 16.0, 65.0, 120.0]
    first = banded_release([0, 15, 65, 120], by_year, units)
    second = banded_release([0, 16, 65, 120], by_year, units)
    p1 = protect(first, policy(k=10))
    assert all(v is not None for v in p1.released.values())  # nothing small in the first tabulation
    earlier = [ReleaseFacts.from_dict("first", p1.facts(first))]
    naive = {n: v for n, v in second.values.items()}
    audit = Audit(earlier, ReleaseFacts("second", second.definitions, {}, second.relations))
    assert not audit.evaluate(naive, 10, True).ok  # released as asked, the difference would be exposed
    try:
        p2 = protect(second, policy(k=10), earlier)
    except PolicyViolation as refusal:
        assert "drop or coarsen 'subgroups'" in str(refusal)
        return
    cells = [(u, o) for u in range(4) for o in ("1", "0")]
    facts = []
    for name, definition in first.definitions.items():
        facts.append((cells_of(definition, units, cells), first.values[name]))
    for name, definition in second.definitions.items():
        if p2.released[name] is not None:
            facts.append((cells_of(definition, units, cells), p2.released[name]))
    low, high = oracle_interval(cells, facts, {(1, "1")})
    assert high - low + 1 >= 2, "the one-year difference group must not be worked out"


def test_overlapping_age_bands_24_48_then_30_48_do_not_reveal_a_count_of_one() -> None:
    # The issue's sequence: edges 0/24/48 months, then 0/30/48; one diseased child is 24-29 months old.
    units = [0.0, 24.0, 30.0, 48.0]
    data = {(0, "1"): 20, (1, "1"): 1, (2, "1"): 29, (0, "0"): 40, (1, "0"): 15, (2, "0"): 35}
    first = banded_release([0, 24, 48], data, units)
    second = banded_release([0, 30, 48], data, units)
    p1 = protect(first, policy(k=10))
    earlier = [ReleaseFacts.from_dict("first", p1.facts(first))]
    audit = Audit(earlier, ReleaseFacts("second", second.definitions, {}, second.relations))
    naive = audit.evaluate(dict(second.values), 10, True)
    assert not naive.ok and any(f.kind == "difference" for f in naive.findings)
    try:
        p2 = protect(second, policy(k=10), earlier)
    except PolicyViolation:
        return  # refused: acceptable
    assert p2.released["subgroups.age[0].positive"] is None  # [0, 30) among the diseased: 21, hidden
    cells = [(u, o) for u in range(3) for o in ("1", "0")]
    facts = [(cells_of(d, units, cells), first.values[n]) for n, d in first.definitions.items()]
    facts += [(cells_of(d, units, cells), p2.released[n]) for n, d in second.definitions.items() if p2.released[n]]
    low, high = oracle_interval(cells, facts, {(1, "1")})
    assert (low, high) != (1, 1)
    assert high - low + 1 >= 2


# --- property: sequences of overlapping band requests to one study ---------------------------------------------

UNITS = [float(u) for u in range(9)]  # 8 age units


@st.composite
def request_sequences(draw):  # noqa: ANN001, ANN201
    counts = {(u, o): draw(st.integers(0, 12)) for u in range(8) for o in ("1", "0")}
    k = draw(st.sampled_from([3, 5, 10]))
    allow_zero = draw(st.booleans())
    bandings = []
    for _ in range(draw(st.integers(2, 3))):
        inner = draw(st.lists(st.integers(1, 7), max_size=3, unique=True))
        bandings.append([0, *sorted(inner), 8])
    return counts, k, allow_zero, bandings


@settings(max_examples=400, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(request_sequences())
def test_no_sequence_of_band_requests_pins_down_a_hidden_or_small_count(case) -> None:  # noqa: ANN001
    counts, k, allow_zero, bandings = case
    cells = [(u, o) for u in range(8) for o in ("1", "0")]
    earlier: list[ReleaseFacts] = []
    facts: list[tuple[set, int]] = []
    hidden: list[tuple[set, int]] = []  # (cells, true value) of every count suppressed so far
    rules: list[tuple[set, int, float]] = []  # what each rule tells: 1..k-1 (0..k-1), or k.. (not small)
    either: list[set] = []  # withheld as not small with zeros shown: 0, or at least k
    shown: set[frozenset] = set()
    for r, edges in enumerate(bandings):
        counts_set = banded_release([float(e) for e in edges], counts, UNITS)
        try:
            protected = protect(counts_set, policy(k, allow_zero), earlier, label=f"r{r}")
        except PolicyViolation:
            continue  # refusing is always safe
        for name, definition in counts_set.definitions.items():
            members = cells_of(definition, UNITS, cells)
            value = protected.released[name]
            assert value is None or value == counts_set.values[name]  # released counts are never changed
            if value is None:
                hidden.append((members, counts_set.values[name]))
                rule = protected.rules.get(name)
                if rule == "minimum_cell_size":
                    rules.append((members, 1 if allow_zero else 0, k - 1))
                elif rule in ("complementary", "audit") and allow_zero:  # primary suppression ran first
                    either.append(members)  # so it was not small: 0, or at least k
                elif rule in ("complementary", "audit"):
                    rules.append((members, k, math.inf))
            else:
                assert not (0 < value < k) and (allow_zero or value > 0)
                facts.append((members, value))
                shown.add(frozenset(members))
        earlier.append(ReleaseFacts.from_dict(f"r{r}", protected.facts(counts_set)))
    if not facts:
        return
    for members, value in hidden:
        if frozenset(members) in shown:
            continue  # its value was public before it was hidden
        low, high = oracle_interval(cells, facts, members, rules, (k, either))
        if value == 0 and allow_zero and (low, high) == (0, 0):
            continue  # a 0 withheld to protect another count: worked out, it shows a count the policy shows
        assert high - low + 1 >= 2, "a suppressed count can be worked out from the releases"
    for unit in range(8):  # every finest cell that the policy would hide stays uncertain
        for klass in ("1", "0"):
            value = counts[(unit, klass)]
            if 0 < value < k or (value == 0 and not allow_zero):
                members = {(unit, klass)}
                if frozenset(members) in shown:
                    continue
                low, high = oracle_interval(cells, facts, members, rules, (k, either))
                assert (low, high) != (value, value), "a small cell can be worked out by differencing"


# --- data that changed between releases ---------------------------------------------------------------------


def test_changed_records_between_releases_are_refused_without_values() -> None:
    units = [0.0, 24.0, 48.0]
    first = banded_release([0, 24, 48], {(0, "1"): 30, (1, "1"): 30, (0, "0"): 30, (1, "0"): 30}, units)
    second = banded_release([0, 24, 48], {(0, "1"): 31, (1, "1"): 30, (0, "0"): 30, (1, "0"): 30}, units)
    earlier = [ReleaseFacts.from_dict("first", protect(first, policy()).facts(first))]
    with pytest.raises(PolicyViolation) as refusal:
        protect(second, policy(), earlier)
    message = str(refusal.value)
    assert "the records, or the mapping that reads them, changed" in message
    assert "31" not in message and "30" not in message


def test_scores_of_different_models_are_different_variables() -> None:
    # The same threshold on two bundles' scores defines two different counts: no contradiction, no pinning.
    def table(value: int) -> CountSet:
        out = CountSet()
        out.add("confusion[0].tp", value, POSITIVE, Condition("score", low=0.5))
        out.add("confusion[0].fn", 50 - value, POSITIVE, Condition("score", high=0.5))
        out.add("flow.analysed_positive", 50, POSITIVE)
        out.relate("flow.analysed_positive", "confusion[0].tp", "confusion[0].fn")
        return out

    first = table(30)
    earlier = [ReleaseFacts.from_dict("first", protect(first, policy(), bundle="a" * 16).facts(first))]
    second = table(35)  # another model: a different split of the same 50 records
    protected = protect(second, policy(), earlier, bundle="b" * 16)
    assert protected.released["confusion[0].tp"] == 35


# --- end to end: the same sequence through the real runner, subgroup analysis and ledger ---------------------


def test_overlapping_age_band_requests_end_to_end(tmp_path) -> None:  # noqa: ANN001
    """Two signed requests for age subgroups (edges 0/24/48, then 0/30/48) answered by the real site agent
    on records where exactly one diseased child is 24-29 months old; the coordinator's best LP bound on that
    group, from both releases, must not pin it to 1 (or the second request is refused)."""
    import pandas as pd

    from federation.protocol import AnalysisSpec, load_private_key
    from federation.protocol.documents import SubgroupSpec
    from federation.store import Store
    from federation.study import issue_request
    from simulations.consortium import FEATURES, ITEMS
    from simulations.demo import prepare_study
    from site_agent import ledger
    from site_agent.config import init_site, load_site
    from site_agent.runner import run_request

    demo = prepare_study(tmp_path / "demo")
    key = load_private_key(demo.root / "coordinator" / "coordinator.key")
    rng = np.random.default_rng(4)
    ages = [
        *rng.integers(0, 24, 60),
        26,
        *rng.integers(30, 48, 60),
        *rng.integers(0, 24, 50),
        *rng.integers(30, 48, 50),
    ]
    outcome = [1] * 121 + [0] * 100  # the 61st record (age 26) is the only diseased child aged 24-29
    frame = pd.DataFrame({item: rng.integers(0, 4, len(ages)) for item in ITEMS})
    frame["age_months"] = ages
    frame["sex"] = rng.choice(["female", "male"], len(ages))
    frame["subtype"] = ""  # optional in the demo schema (scored as "none")
    frame["outcome"] = outcome
    data = tmp_path / "records.csv"
    frame[[*FEATURES, "outcome"]].to_csv(data, index=False)
    folder = init_site(tmp_path / "site", "site-x", [demo.root / "coordinator" / "coordinator.pub"])
    from site_agent.models import approve_bundle

    approve_bundle(folder, demo.bundle_bytes, "site IT")
    site = load_site(folder)

    store = Store(demo.store_path)
    requests = []
    for request_id, edges in (("ages-1", (0.0, 24.0, 48.0)), ("ages-2", (0.0, 30.0, 48.0))):
        spec = AnalysisSpec("subgroups", subgroups=(SubgroupSpec("age_months", edges),))
        requests.append(
            issue_request(store, "age-study", demo.bundle_bytes, key, request_id=request_id, analyses=(spec,))
        )
    store.close()
    run_request(site, requests[0], demo.bundle_bytes, data)
    try:
        run_request(site, requests[1], demo.bundle_bytes, data)
    except PolicyViolation:
        return  # refused: the difference cannot be taken
    # The coordinator's view: every released count of both releases (definitions from the ledger's facts).
    edges = [-math.inf, 0.0, 24.0, 30.0, 48.0, math.inf]
    cells = [(a, o, s) for a in range(5) for o in ("1", "0") for s in ("low", "high")]

    def members(where: list[dict]) -> set:
        chosen = set()
        for a, o, s in cells:
            ok = True
            for c in where:
                if c["variable"] == "outcome":
                    ok &= o in c["values"]
                elif c["variable"] == "status":
                    ok &= "analysed" in c["values"]
                elif c["variable"] == "age_months":
                    low = -math.inf if c["low"] is None else c["low"]
                    high = math.inf if c["high"] is None else c["high"]
                    ok &= low <= edges[a] and edges[a + 1] <= high
                elif c["variable"] == "score":
                    # the demo bundle's threshold is 0.5: "high" = score >= 0.5
                    ok &= (c["low"] is None or s == "high") and (c["high"] is None or s == "low")
                else:
                    ok = False
            if ok:
                chosen.add((a, o, s))
        return chosen

    facts = []
    for details in ledger.releases_for_study(site.ledger_path, "age-study"):
        for count in details["facts"]["counts"]:
            statuses = [c for c in count["where"] if c["variable"] == "status"]
            if count["value"] is None or not statuses or statuses[0]["values"] != ["analysed"]:
                continue  # excluded records are not modelled here (none were excluded)
            facts.append((members(count["where"]), count["value"]))
    region = {(2, "1", "low"), (2, "1", "high")}  # diseased, 24 <= age < 30
    low, high = oracle_interval(cells, facts, region)
    assert low <= 1 <= high
    assert high - low + 1 >= 2, "the one diseased child aged 24-29 months can be worked out"


def test_a_site_policy_cannot_switch_the_audit_off(tmp_path) -> None:  # noqa: ANN001
    # protection_width = 1 once switched the audit off (every hidden count could then be worked out exactly);
    # the promise that nothing released lets a recipient work out a hidden count does not allow it.
    from federation.protocol.keys import write_keypair
    from site_agent.config import DocumentError, init_site, load_site

    _, public = write_keypair(tmp_path, "coordinator")
    folder = init_site(tmp_path / "site", "site-x", [public])
    config = folder / "site.toml"
    text = config.read_text()
    assert "protection_width = 2" in text
    config.write_text(text.replace("protection_width = 2", "protection_width = 1"))
    with pytest.raises(
        DocumentError, match=r"site\.toml: \[policy\]\.protection_width: must be a whole number from 2 to 1000"
    ):
        load_site(folder)
    config.write_text(text.replace("protection_width = 2", "protection_width = 3"))
    assert load_site(folder).policy.protection_width == 3
