"""Feasible ranges of withheld cells, worked out by the coordinator from everything a site sent, and the
pooling that uses them. Checked against ranges worked by hand and against the full tables the releases came
from (data of the test's own making: a disclosure scenario, not a clinical one)."""

from __future__ import annotations

from federation.analysis import analyze_tables, site_tables
from federation.protocol.documents import ConfusionTable, Release
from federation.ranges import count_definitions, feasible_ranges, primary_ranges
from federation.stats import glmm_accuracy
from federation.store import StoredRelease

POLICY = {"min_cell_size": 10, "allow_zero": True}


def _release(site: str, tp: int, fn: int, fp: int, tn: int, bands: list[tuple], hide_fp: bool, rules=None) -> Release:
    """A release at threshold 0.5 with ROC bands (low, high, positive, negative); FP and TN withheld if asked."""
    cells = {"tp": tp, "fp": None if hide_fp else fp, "fn": fn, "tn": None if hide_fp else tn}
    hidden = tuple(c for c in ("tp", "fp", "fn", "tn") if cells[c] is None)
    table = ConfusionTable(0.5, cells, hidden, dict(rules) if rules else {})
    flow = {
        "read": tp + fn + fp + tn,
        "analysed": tp + fn + fp + tn,
        "analysed_positive": tp + fn,
        "analysed_negative": fp + tn,
        "excluded": {"missing_outcome": 0},
    }
    roc = {
        "bands": [{"low": lo, "high": hi, "positive": p, "negative": n} for lo, hi, p, n in bands],
        "positive": tp + fn,
        "negative": fp + tn,
    }
    return Release("study", "r1", "b" * 64, site, "2026-12-01T00:00:00Z", POLICY, flow, (table,), extra={"roc": roc})


# Negatives by band: 100 below 0.3, 21 in [0.3, 0.5) (withheld), 3 in [0.5, 0.7) (withheld), 10 from 0.7.
# With the threshold at 0.5 the recipient knows FP = 10 + (the [0.5, 0.7) band) and the two withheld bands
# add up to 134 - 110 = 24, so FP lies in 10..34 and TN = 134 - FP in 100..124 (worked by hand).
BANDS = [(None, 0.3, 2, 100), (0.3, 0.5, 8, None), (0.5, 0.7, 10, None), (0.7, None, 20, 10)]


def test_ranges_of_withheld_cells_follow_from_the_roc_bands() -> None:
    release = _release("s1", 30, 10, 13, 121, BANDS, hide_fp=True)
    assert primary_ranges(release, 0) == {"fp": (10, 34), "tn": (100, 124)}


def test_ranges_combine_every_release_of_the_site() -> None:
    # A second release to the same study shows the negatives from 0.6 up: 10 + 1 = 11 (the band [0.6, 0.7)
    # holds 1). Then FP = 11 + [0.5, 0.6): the first release bounds [0.5, 0.7) by 24, so FP in 11..34.
    first = _release("s1", 30, 10, 13, 121, BANDS, hide_fp=True)
    second = _release("s1", 30, 10, 13, 121, [(None, 0.6, 10, 123), (0.6, None, 30, 11)], hide_fp=True)
    assert primary_ranges(first, 0, [second]) == {"fp": (11, 34), "tn": (100, 123)}


def test_inconsistent_releases_give_no_ranges() -> None:
    counts = count_definitions(_release("s1", 30, 10, 13, 121, [(None, None, 41, 134)], hide_fp=True))
    assert feasible_ranges(counts, ["confusion[0].fp"]) == {}  # 41 positives in the band, 40 in the flow


def test_audit_withheld_cells_are_pooled_within_their_range_not_below_k() -> None:
    # Six sites released 134 participants without the condition; at three the audit withheld FP and TN. Full
    # tables: FP = 13 or 14 of 134 everywhere, specificity 0.899 (the figure the full tables give). Treating
    # the withheld cells as 1..9 (the minimum-cell-size rule) pulls the pooled specificity towards 0.96.
    stored = []
    for i in range(6):
        fp = 13 + i % 2
        bands = [(None, 0.3, 2, 100), (0.3, 0.5, 8, 21 - i % 2), (0.5, 0.7, 10, fp - 10), (0.7, None, 20, 10)]
        if i < 3:
            bands = [(lo, hi, p, None if 0.3 <= (lo or 0) < 0.7 else n) for lo, hi, p, n in bands]
        rules = {"fp": "audit", "tn": "audit"} if i < 3 else None
        release = _release(f"s{i}", 30, 10, fp, 134 - fp, bands, hide_fp=i < 3, rules=rules)
        stored.append(StoredRelease(release, b""))
    tables = site_tables(stored)
    assert all(t.ranges == {"fp": (10, 34), "tn": (100, 124)} for t in tables[:3])
    assert tables[0].suppressed_by == {"fp": "audit", "tn": "audit"}
    pooled = analyze_tables("study", tables)["pooled"]["bivariate_glmm_suppression_aware"]
    truth = 1 - 13.5 / 134  # 0.899
    assert abs(pooled["specificity"]["estimate"] - truth) < 0.01
    # The blanket rule (no ranges, no rule named): withheld cells read as 1..9, and the estimate moves away.
    blanket = [t.released_table() for t in tables]
    blanket = [type(t)(**{**t.__dict__, "ranges": {}, "suppressed_by": {}}) for t in blanket]
    assert glmm_accuracy(blanket).specificity.estimate > truth + 0.02
