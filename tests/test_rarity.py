"""A return-level curve read the other way, in words (predictor.rarity).

Reference: interpolation linear in the logarithm of the period, worked by hand in each test
(the period at the level's fraction of the way between two rows: exp of the interpolated log);
Coles (2001), sec. 2.6.6, for reading an interval under another parameterisation.
"""
from __future__ import annotations

import math

import pytest

from predictor.rarity import period_of_level, rarity_words, round_period

CURVE = {"period": [1.1, 2.0, 10.0, 100.0],
         "level": [3.80, 4.00, 4.30, 4.60],
         "lower": [3.78, 3.95, 4.20, 4.40],
         "upper": [3.82, 4.05, 4.40, math.inf]}


def test_period_of_a_level_on_the_curve_is_its_period():
    p, shortest, longest = period_of_level(4.30, CURVE)
    assert p == pytest.approx(10.0)
    # upper band reaches 4.30 between (2, 4.05) and (10, 4.40): 5/7 of the way in log period
    assert shortest == pytest.approx(math.exp(math.log(2) + (0.25 / 0.35) * math.log(5)))
    # lower band reaches 4.30 half way between (10, 4.20) and (100, 4.40)
    assert longest == pytest.approx(math.sqrt(10 * 100))
    assert shortest < p < longest


def test_range_never_inverts_and_grows_with_the_level():
    prev = None
    for z in (3.9, 4.0, 4.1, 4.2, 4.3, 4.4):
        p, lo, hi = period_of_level(z, CURVE)
        assert lo <= p <= hi
        if prev is not None:
            assert p >= prev
        prev = p


def test_a_level_beyond_the_lower_band_has_no_longest_period():
    _, _, longest = period_of_level(4.5, CURVE)      # above the lower band's last row (4.40)
    assert math.isinf(longest)


def test_words_for_a_level_in_the_curve():
    words = rarity_words(4.30, CURVE, "above chart datum")
    assert words == "4.30 m above chart datum: about a 1-in-10-year level, range 1-in-6 to 1-in-32 years"


def test_words_for_an_ordinary_high_water_give_no_number():
    assert "reached in most years" in rarity_words(3.70, CURVE)
    assert "1-in" not in rarity_words(3.70, CURVE)


def test_words_beyond_the_curve_say_the_record_cannot_tell():
    words = rarity_words(4.75, CURVE)
    assert "beyond the 1-in-100-year level" in words and "rarer than the record can say" in words


def test_round_period_keeps_two_figures():
    assert [round_period(x) for x in (1.5, 2.4, 9.6, 31.6, 149.0, 1234.0)] == ["1.5", "2", "10", "32", "150", "1200"]


def test_a_curve_must_increase_in_period():
    with pytest.raises(ValueError, match="increasing periods"):
        period_of_level(4.0, {**CURVE, "period": [2.0, 1.5, 10.0, 100.0]})
