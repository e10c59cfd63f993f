"""``make audit-whole`` (simulations/whole_numbers.py): its recipient finds what it should, with scipy's own integer
programs and linear programs as the reference (docs/threat-model.md, R3)."""

from __future__ import annotations

import pytest

from simulations import whole_numbers
from site_agent.audit import check

# The request of site_agent/test_withheld.py::test_a_cell_whole_numbers_pin_in_a_large_block_is_not_released, found by
# this campaign's first version: three counts asked beside two earlier ones pin c = 1 over whole numbers alone.
PINNED = whole_numbers.Request(
    values={"a": 3, "b": 3, "c": 1, "d": 2, "e": 6, "f": 0},
    start="e",
    earlier=("bcef", "acde"),
    now=("acdf", "bd", "abf"),
)


def test_the_recipient_finds_a_cell_only_whole_numbers_pin(monkeypatch: pytest.MonkeyPatch) -> None:
    # without the audit's check of atoms over whole numbers, the site shows all three counts and the recipient pins
    # a, b, c and d (c = 1 and d = 2 small; over the reals c keeps 0..1, d 2..2.5)
    monkeypatch.setattr(check.Audit, "_whole_atoms_pinned", lambda self, *args: None)
    seen, shown = whole_numbers.release(PINNED, 70)
    assert shown == {"t.n0": 6, "t.n1": 5, "t.n2": 6}
    assert whole_numbers.pinned(seen, unions=False) == [
        ("a", 3, False),
        ("b", 3, False),
        ("c", 1, False),
        ("d", 2, False),
    ]
    monkeypatch.undo()
    # with it, acdf is withheld and no cell or union of the six is pinned small
    seen, shown = whole_numbers.release(PINNED, 70)
    assert shown == {"t.n0": None, "t.n1": 5, "t.n2": 6}
    assert whole_numbers.pinned(seen, unions=True) == []


def test_a_short_campaign_finds_no_leak(capsys: pytest.CaptureFixture[str]) -> None:
    assert whole_numbers.campaign(seed=1, requests=40, pad=70, unions=False) == 0
    assert "40 requests, path of 70 cells, each cell: 0 leaked" in capsys.readouterr().out
