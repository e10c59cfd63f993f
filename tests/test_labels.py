"""Band and level labels as a paper's table writes them (federation.labels)."""

from __future__ import annotations

import pytest

from federation.labels import band_label, level_label, number_text, unit_of


@pytest.mark.parametrize(
    ("value", "text"),
    [(0.1 + 0.2, "0.3"), (0.5 - 0.05, "0.45"), (36.0, "36"), (35.99999999999999, "36"), (1.5e-05, "1.5e-05")],
)
def test_numbers_are_written_without_floating_point_noise(value: float, text: str) -> None:
    assert number_text(value) == text


def test_integer_bands_read_by_their_first_and_last_values() -> None:
    assert band_label(None, 36.0, True, "months") == "under 36 months"
    assert band_label(36.0, 48.0, True, "months") == "36-47 months"
    assert band_label(48.0, None, True, "months") == "48 months and over"
    assert band_label(36.5, 48.0, True, "months") == "37-47 months"  # whole months from 36.5 are 37 and up
    assert band_label(36.0, 37.0, True) == "36"


def test_continuous_bands_and_categories() -> None:
    assert band_label(0.3, 0.45) == "0.3 to under 0.45"
    assert level_label("age_months", {"low": 36.0, "high": 48.0}, integer=True) == "36-47 months"
    assert level_label("weight_kg", {"low": None, "high": 20.0}) == "under 20"
    assert level_label("sex", "female") == "female"
    assert level_label("sex", ["not", "a", "level"]) == "unnamed level"
    assert (unit_of("age_months"), unit_of("age_in_years"), unit_of("months"), unit_of("score")) == (
        "months",
        "years",
        "",
        "",
    )
