"""A small world of our own making for playing disclosure attacks through the real command lines.

A coordinator (keys, bundles, requests made with ``federation``), one site (``site-agent init`` and ``run``)
and a few hundred invented records: ``age_months`` (whole months 0..95), ``sex`` (f/m), ``item`` (0..3) and
the reference standard. ``oracle_interval`` is the recipient: from the release files alone (what it was
sent) and the models it packed, it enumerates every record type the schema allows, scores each with its
own copy of the scorecard, and solves two integer programs (scipy.optimize.milp) for the smallest and largest
number of records of a target region consistent with everything released. It shares no code with the
site's audit.
"""

from __future__ import annotations

import itertools
import json
import math
import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
from scipy.optimize import Bounds, LinearConstraint, milp

from federation.cli import main as federation
from site_agent.cli import main as site_agent

SCHEMA = """\
[[features]]
name = "age_months"
type = "int"
min = 0
max = 95

[[features]]
name = "sex"
type = "category"
categories = ["f", "m"]

[[features]]
name = "item"
type = "int"
min = 0
max = 3
"""
AGES = range(0, 96)
SEXES = ("f", "m")
ITEMS = range(0, 4)

Record = tuple[int, str, int, int]  # age_months, sex, item, outcome
NOT_SMALL = "0 or at least k"  # a withheld count's fact when zeros are shown: a disjunction (integer program)
Score = Callable[[int, str, int], float]


def records(seed: int = 3, n: int = 400, small: Sequence[Record] = ()) -> list[Record]:
    """``n`` invented records spread over every age except 24..29 months, plus the ``small`` group."""
    rng = np.random.default_rng(seed)
    ages = [a for a in AGES if not 24 <= a < 30]
    out = [
        (int(rng.choice(ages)), str(rng.choice(SEXES)), int(rng.integers(0, 4)), int(rng.random() < 0.3))
        for _ in range(n)
    ]
    return out + list(small)


@dataclass
class World:
    root: Path
    data: list[Record]
    k: int = 10
    allow_zero: bool = True
    reference2: list[str] | None = None  # a second reference standard per record ("1", "0" or "" = blank)
    bundles: dict[str, tuple[Path, Score, float]] = field(default_factory=dict)
    releases: list[dict[str, Any]] = field(default_factory=list)
    refused: list[str] = field(default_factory=list)

    def __post_init__(self) -> None:
        self.root.mkdir(parents=True, exist_ok=True)
        assert federation(["keys", "new", "--out", str(self.root / "coordinator")]) == 0
        (self.root / "schema.toml").write_text(SCHEMA)
        self.site = self.root / "site"
        pub = str(self.root / "coordinator" / "coordinator.pub")
        assert site_agent(["init", "--site-id", "site-a", "--trust", pub, "--out", str(self.site)]) == 0
        config = self.site / "site.toml"
        text = re.sub(r"min_cell_size = \d+", f"min_cell_size = {self.k}", config.read_text())
        text = text.replace("allow_zero = true", f"allow_zero = {str(self.allow_zero).lower()}")
        # the worst case: a site that runs every model the coordinator signs (model approval is played in
        # tests/site_agent/test_model_approval.py)
        text = text.replace("require_model_approval = true", "require_model_approval = false")
        config.write_text(text)
        lines = ["age_months,sex,item,outcome", *(f"{a},{s},{i},{o}" for a, s, i, o in self.data)]
        self.mapping: Path | None = None
        if self.reference2 is not None:
            lines = [f"{line},{r}" for line, r in zip(lines, ["ref2", *self.reference2], strict=True)]
            self.mapping = self.root / "mapping.toml"
            self.mapping.write_text('[reference2]\ncolumn = "ref2"\npositive = ["1"]\nnegative = ["0"]\n')
        (self.root / "records.csv").write_text("\n".join(lines) + "\n")

    def scorecard(self, name: str, card: dict[str, Any], threshold: float, score: Score) -> Path:
        """Pack a scorecard; ``score`` is the recipient's own copy of the same function."""
        model = self.root / f"{name}.json"
        model.write_text(json.dumps({"format": "scorecard", **card}))
        out = self.root / f"{name}.bundle"
        key = str(self.root / "coordinator" / "coordinator.key")
        args = ["bundle", "pack", "--model", str(model), "--schema", str(self.root / "schema.toml")]
        assert federation([*args, "--threshold", str(threshold), "--sign", key, "--name", name, "--out", str(out)]) == 0
        self.bundles[name] = (out, score, threshold)
        return out

    def ask(self, bundle: str, study: str, *options: str, compare: str | None = None) -> dict[str, Any] | None:
        """Issue a request with ``federation request new`` and answer it with ``site-agent run``; the release
        (parsed) or None when the site refused (exit 2)."""
        path, _, _ = self.bundles[bundle]
        n = len(self.releases) + len(self.refused)
        request = self.root / f"request-{n}.json"
        key = str(self.root / "coordinator" / "coordinator.key")
        store = str(self.root / "study.db")
        new = ["request", "new", "--store", store, "--study-id", study, "--bundle", str(path), "--sign", key]
        if compare is not None:
            new += ["--compare", str(self.bundles[compare][0])]
        assert federation([*new, *options, "--out", str(request)]) == 0
        out = self.root / f"release-{n}.json"
        args = ["run", "--site", str(self.site), "--request", str(request), "--bundle", str(path)]
        if compare is not None:
            args += ["--compare-bundle", str(self.bundles[compare][0])]
        if self.mapping is not None:
            args += ["--mapping", str(self.mapping)]
        code = site_agent([*args, "--data", str(self.root / "records.csv"), "--out", str(out)])
        if code == 2:
            self.refused.append(request.name)
            return None
        assert code == 0
        release = json.loads(out.read_text())
        release["_bundle"] = bundle
        release["_compare"] = compare
        self.releases.append(release)
        return release


# --- the recipient -----------------------------------------------------------------------------------------


def _cells() -> list[tuple[int, str, int, int]]:
    return [(a, s, i, o) for a, s, i in itertools.product(AGES, SEXES, ITEMS) for o in (0, 1)]


def _in_band(value: float, band: dict[str, Any] | None) -> bool:
    if band is None:
        return True
    low, high = band.get("low"), band.get("high")
    return (low is None or value >= low) and (high is None or value < high)


def facts_of(
    release: dict[str, Any], score: Score, k: int, allow_zero: bool, compare: Score | None = None
) -> list[tuple[Callable, int | tuple]]:
    """(membership test over record types, value or (low, high) from the withheld rule, or ``NOT_SMALL``) for
    every count the release shows or withholds, read from the release file alone (``compare``: the comparison
    model of a paired release). What each rule tells follows from the algorithm alone: primary suppression
    runs first, so a count withheld by any rule but ``minimum_cell_size`` or ``coarsened`` was not small (0 or
    at least k when zeros are shown, at least k when they are not)."""
    facts: list[tuple[Callable, Any]] = []
    low_small = 1 if allow_zero else 0

    def add(test: Callable, value: int | None, rule: str | None) -> None:
        if value is not None:
            facts.append((test, value))
        elif rule == "minimum_cell_size":
            facts.append((test, (low_small, k - 1)))
        elif rule in ("complementary", "audit"):
            facts.append((test, NOT_SMALL if allow_zero else (k, math.inf)))

    flow = release["flow"]
    by = flow.get("suppressed_by", {})
    add(lambda c: True, flow["analysed"], by.get("analysed"))
    add(lambda c: c[3] == 1, flow["analysed_positive"], by.get("analysed_positive"))
    add(lambda c: c[3] == 0, flow["analysed_negative"], by.get("analysed_negative"))

    def confusion(tables: list[dict[str, Any]], where: Callable) -> None:
        for table in tables:
            t, by = table["threshold"], table.get("suppressed_by", {})
            sides = {"tp": (1, True), "fp": (0, True), "fn": (1, False), "tn": (0, False)}
            for cell, (outcome, above) in sides.items():

                def test(c: tuple, o: int = outcome, up: bool = above, t: float = t) -> bool:
                    return where(c) and c[3] == o and (score(c[0], c[1], c[2]) >= t) == up

                add(test, table["cells"][cell], by.get(cell))

    results = release["results"]
    confusion(results.get("confusion", []), lambda c: True)
    for variable in results.get("subgroups", {}).get("variables", []):
        name = variable["variable"]
        for level in variable["levels"]:
            label = level["level"]

            def inside(c: tuple, label: Any = label, name: str = name) -> bool:
                if name == "sex":
                    return c[1] == label
                return _in_band(c[0] if name == "age_months" else c[2], label)

            by = level.get("suppressed_by", {})
            add(lambda c, f=inside: f(c) and c[3] == 1, level["analysed_positive"], by.get("analysed_positive"))
            add(lambda c, f=inside: f(c) and c[3] == 0, level["analysed_negative"], by.get("analysed_negative"))
            confusion(level.get("confusion", []), inside)
    calibration = results.get("calibration")
    if calibration:
        by = calibration.get("suppressed_by", {})
        for j, band in enumerate(calibration["bands"]):
            for klass, outcome in (("events", 1), ("non_events", 0)):
                test = lambda c, b=band, o=outcome: c[3] == o and _in_band(score(c[0], c[1], c[2]), b)  # noqa: E731
                add(test, band[klass], by.get(f"bin[{j}].{klass}"))
    roc = results.get("roc")
    if roc:
        by = roc.get("suppressed_by", {})
        for j, band in enumerate(roc["bands"]):
            for klass, outcome in (("positive", 1), ("negative", 0)):
                test = lambda c, b=band, o=outcome: c[3] == o and _in_band(score(c[0], c[1], c[2]), b)  # noqa: E731
                add(test, band[klass], by.get(f"band[{j}].{klass}"))
    paired = results.get("paired")
    if paired and compare is not None:
        _paired_facts(paired, score, compare, add)
    return facts


def _paired_facts(paired: dict[str, Any], score: Score, compare: Score, add: Callable) -> None:
    """The paired 2x2 tables, each model's own bands and the joint table, through ``add``."""
    by = paired.get("suppressed_by", {})
    t, u = paired["threshold"], paired["compare_threshold"]
    for group, klass, outcome in (("diseased", "positive", 1), ("non_diseased", "negative", 0)):
        for a, b in itertools.product((1, 0), (1, 0)):

            def test(c: tuple, a: int = a, b: int = b, o: int = outcome) -> bool:
                own = score(c[0], c[1], c[2]) >= t
                other = compare(c[0], c[1], c[2]) >= u
                return c[3] == o and own == bool(a) and other == bool(b)

            add(test, paired[group][f"model{a}_compare{b}"], by.get(f"{klass}.model{a}_compare{b}"))
        for which, model in (("model", score), ("compare", compare)):
            for j, band in enumerate(paired.get(f"{which}_bands", [])):
                test = lambda c, b=band, o=outcome, f=model: c[3] == o and _in_band(f(c[0], c[1], c[2]), b)  # noqa: E731
                add(test, band[klass], by.get(f"{klass}.{which}_band[{j}]"))
        rows, columns = paired.get("joint_bands", {}).get("model", []), paired.get("joint_bands", {}).get("compare", [])
        for i, row in enumerate(rows):
            for j, column in enumerate(columns):

                def test(c: tuple, r: dict = row, q: dict = column, o: int = outcome) -> bool:
                    return c[3] == o and _in_band(score(c[0], c[1], c[2]), r) and _in_band(compare(c[0], c[1], c[2]), q)

                add(test, paired["joint"][group][i][j], by.get(f"{klass}.joint[{i}][{j}]"))


def oracle_interval(world: World, region: Callable[[tuple], bool]) -> tuple[int, int]:
    """Whole-number min and max of the number of records in ``region`` over every table of record types
    consistent with every release the world's site made (HiGHS branch and bound, scipy.optimize.milp). A
    ``NOT_SMALL`` fact gets a 0/1 variable z: k·z <= count <= N·z (N, the number of records, bounds any count)."""
    cells = _cells()
    rows, lows, highs, either = [], [], [], []
    for release in world.releases:
        _, score, _ = world.bundles[release["_bundle"]]
        compare = world.bundles[release["_compare"]][1] if release.get("_compare") else None
        for test, value in facts_of(release, score, world.k, world.allow_zero, compare):
            row = [1.0 if test(c) else 0.0 for c in cells]
            if value == NOT_SMALL:
                either.append(row)
                continue
            rows.append(row)
            low, high = (value, value) if isinstance(value, int) else value
            lows.append(low)
            highs.append(high)
    n, m, total = len(cells), len(either), float(len(world.data))
    matrix = np.zeros((len(rows) + 2 * m, n + m))
    matrix[: len(rows), :n] = np.array(rows).reshape(len(rows), n)
    for j, row in enumerate(either):  # count - k·z >= 0 and count - N·z <= 0
        matrix[len(rows) + 2 * j, :n] = row
        matrix[len(rows) + 2 * j, n + j] = -world.k
        matrix[len(rows) + 2 * j + 1, :n] = row
        matrix[len(rows) + 2 * j + 1, n + j] = -total
    lows += [v for _ in either for v in (0.0, -np.inf)]
    highs += [v for _ in either for v in (np.inf, 0.0)]
    target = np.array([1.0 if region(c) else 0.0 for c in cells] + [0.0] * m)
    constraint = LinearConstraint(matrix, np.array(lows, float), np.array(highs, float))
    bounds = Bounds(np.zeros(n + m), np.concatenate([np.full(n, np.inf), np.ones(m)]))
    found = []
    for sign in (1.0, -1.0):
        result = milp(sign * target, constraints=constraint, integrality=np.ones(n + m), bounds=bounds)
        assert result.status == 0, "the releases must be consistent with some table"
        found.append(sign * result.fun)
    return math.ceil(found[0] - 1e-6), math.floor(found[1] + 1e-6)
