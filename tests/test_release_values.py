"""Values read out of a release (federation.release_values): a withheld count is null (docs/formats.md), and a
field from another party may hold anything, so anything but a whole count or a finite number reads as None."""

from __future__ import annotations

import json
import math

from federation.release_values import count_or_none, number_or_none


def test_counts_are_whole_non_negative_integers_only() -> None:
    cells = json.loads('{"tp": 12, "fp": null, "fn": 0, "tn": -3, "flag": true, "share": 4.0, "text": "7"}')
    assert [count_or_none(cells[k]) for k in ("tp", "fp", "fn", "tn", "flag", "share", "text")] == [
        12,
        None,
        0,
        None,
        None,  # JSON true is a bool, not a count
        None,  # 4.0 is a number, not a count
        None,
    ]


def test_numbers_are_finite_and_never_booleans() -> None:
    # Python's json reads NaN and Infinity (a non-standard extension), so a release can carry them.
    values = json.loads('[0.8125, 3, NaN, Infinity, -Infinity, false, null, "0.5"]')
    read = [number_or_none(v) for v in values]
    assert read[:2] == [0.8125, 3.0] and isinstance(read[1], float)
    assert read[2:] == [None] * 6
    assert not any(isinstance(v, float) and not math.isfinite(v) for v in read)
