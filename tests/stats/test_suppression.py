"""The suppression-aware evidence against the site's own disclosure rule (site_agent.disclosure.suppress):
whatever the rule hides, the set of tables the coordinator allows must contain the true one."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from federation.stats import PoolingError, ReleasedTable, site_evidence
from simulations.validate_stats import REASONS, release_table
from site_agent.counts import Relation
from site_agent.disclosure import suppress


@st.composite
def site_records(draw: st.DrawFn) -> tuple[int, int, int, int, list[int], int, bool]:
    positives = draw(st.integers(0, 80))
    negatives = draw(st.integers(0, 250))
    tp = draw(st.integers(0, positives))
    fp = draw(st.integers(0, negatives))
    excluded = [draw(st.sampled_from([0, 0, 0, draw(st.integers(1, 14)), draw(st.integers(10, 120))])) for _ in REASONS]
    k = draw(st.sampled_from([5, 10, 11]))
    return tp, fp, positives - tp, negatives - fp, excluded, k, draw(st.booleans())


# The release is produced by the project's own rule (simulations.validate_stats.release_table calls
# site_agent.disclosure.suppress with the flow and 2x2 relations of a release).
@settings(max_examples=400, deadline=None)
@given(site_records())
def test_the_true_table_is_always_allowed(case: tuple[int, int, int, int, list[int], int, bool]) -> None:
    tp, fp, fn, tn, excluded, k, allow_zero = case
    table = release_table("site", tp, fp, fn, tn, excluded, k, allow_zero)
    evidence = site_evidence(table)
    assert evidence.allows(tp, fp, fn, tn)
    assert evidence.censored == (not table.is_complete)


def test_two_thresholds_sharing_margins_still_allow_the_truth() -> None:
    # A second threshold's cells relate to the same margins; suppression there must not mislead the model.
    rng = np.random.default_rng(7)
    for _ in range(300):
        n1, n0, k = int(rng.integers(0, 60)), int(rng.integers(0, 200)), 10
        tp, fp = int(rng.integers(0, n1 + 1)), int(rng.integers(0, n0 + 1))
        tp2, fp2 = int(rng.integers(0, tp + 1)), int(rng.integers(0, fp + 1))
        counts = {
            "read": n1 + n0 + 3,
            "analysed": n1 + n0,
            "pos": n1,
            "neg": n0,
            "miss": 3,
            "tp": tp,
            "fn": n1 - tp,
            "fp": fp,
            "tn": n0 - fp,
            "tp2": tp2,
            "fn2": n1 - tp2,
            "fp2": fp2,
            "tn2": n0 - fp2,
        }
        relations = [
            Relation("read", ("analysed", "miss")),
            Relation("analysed", ("pos", "neg")),
            Relation("pos", ("tp", "fn")),
            Relation("neg", ("fp", "tn")),
            Relation("pos", ("tp2", "fn2")),
            Relation("neg", ("fp2", "tn2")),
        ]
        shown, _ = suppress(counts, relations, k, True)
        table = ReleasedTable(
            "site",
            shown["tp"],
            shown["fp"],
            shown["fn"],
            shown["tn"],
            positives=shown["pos"],
            negatives=shown["neg"],
            analysed=shown["analysed"],
            read=shown["read"],
            excluded=(shown["miss"],),
            min_cell_size=k,
        )
        assert site_evidence(table).allows(tp, fp, n1 - tp, n0 - fp)


def test_hidden_pair_with_known_margin_allows_both_ends() -> None:
    # Worked by hand: n1 = 50 released, TP and FN hidden, k = 10. One of them was below 10 (primary); the other
    # was hidden to protect it. So TP lies in 1..9 or 41..49, and nothing else is possible.
    table = ReleasedTable("s", None, 30, None, 60, positives=50, negatives=90, analysed=140, min_cell_size=10)
    evidence = site_evidence(table)
    assert evidence.n_blocks == 1
    assert evidence.tp_values[0].tolist() == [*range(1, 10), *range(41, 50)]
    assert evidence.fp_values[0].tolist() == [30]


def test_zeros_hidden_by_policy_widen_the_primary_range() -> None:
    # With allow_zero = false a hidden cell may also be 0 (Hundepool et al. 2012, primary suppression of zeros).
    table = ReleasedTable(
        "s", None, 30, None, 60, positives=50, negatives=90, analysed=140, min_cell_size=10, allow_zero=False
    )
    assert site_evidence(table).tp_values[0].tolist() == [*range(0, 10), *range(41, 51)]


def test_complete_table_is_plain_binomial_evidence() -> None:
    evidence = site_evidence(ReleasedTable.complete("s", 40, 12, 10, 88))
    assert not evidence.censored and evidence.n_blocks == 1
    assert (evidence.positives[0], evidence.negatives[0]) == (50, 100)


@pytest.mark.parametrize(
    ("table", "message"),
    [
        (ReleasedTable("s", None, 30, None, 60, positives=50, negatives=90), "states no minimum cell size"),
        (ReleasedTable("s", None, 3, None, 60, positives=50, negatives=63, min_cell_size=10), "contradicts its policy"),
        (ReleasedTable("s", None, None, None, None, min_cell_size=10), "nothing bounds the table"),
        (ReleasedTable("s", 20, 30, 20, 60, positives=41, negatives=90), "do not add up"),
    ],
)
def test_unusable_releases_raise_clear_errors(table: ReleasedTable, message: str) -> None:
    with pytest.raises(PoolingError, match=message):
        site_evidence(table)


def test_released_table_rejects_bad_counts() -> None:
    with pytest.raises(PoolingError, match="non-negative whole number"):
        ReleasedTable("s", -1, 2, 3, 4)
    with pytest.raises(PoolingError, match="min_cell_size"):
        ReleasedTable("s", 1, 2, 3, 4, min_cell_size=0)
