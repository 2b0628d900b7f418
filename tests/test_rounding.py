"""Numbers in the report and the figures: a value rounded to its error by the rule of the Particle
Data Group, upper limits for rates with no event."""

import math

import pytest

from dihedra.presentation.rounding import (error_digits, format_plain, format_rate, format_upper_limit,
                                           format_value_error)


@pytest.mark.parametrize("value, err, text", [
    # the examples of the rule's own statement (Particle Data Group, Review of Particle Physics,
    # Introduction, "Rounding"): 0.827 +- 0.119 -> 0.83 +- 0.12, 0.827 +- 0.367 -> 0.8 +- 0.4
    (0.827, 0.119, "0.83 ± 0.12"),
    (0.827, 0.367, "0.8 ± 0.4"),
    # the three ranges of the leading digits: 100-354 two digits, 355-949 one, 950-999 up to 1000, two
    (0.4321, 0.0354, "0.432 ± 0.035"),
    (0.4321, 0.0355, "0.43 ± 0.04"),
    (0.4321, 0.0949, "0.43 ± 0.09"),
    (0.4321, 0.0951, "0.43 ± 0.10"),
    (152.3, 0.97, "152.3 ± 1.0"),
    # errors of tens and hundreds: the value to the same place
    (12345.0, 432.0, "12300 ± 400"),
    (50.7, 12.3, "51 ± 12"),
])
def test_value_rounded_to_its_error(value, err, text):
    assert format_value_error(value, err) == text


def test_unknown_and_zero_errors_and_missing_values():
    assert format_value_error(0.5, float("nan")) == "0.5 ± n/a"   # never 0
    assert format_value_error(1.0, 0.0) == "1 ± 0"                 # a torsion that never left its state
    assert format_value_error(float("nan"), 0.1) == "–"
    assert format_value_error(-0.0001, 0.03) == "0.000 ± 0.030"   # no "-0.000"
    assert format_value_error(3.2e-6, 4e-7) == "(3.2 ± 0.4)e-6"


def test_error_digits_give_the_decimal_place():
    assert error_digits(0.0234) == (3, pytest.approx(0.023))
    assert error_digits(432.0) == (-2, pytest.approx(400.0))
    assert error_digits(0.98) == (1, pytest.approx(1.0))


def test_upper_limits_and_rates_without_events():
    assert format_upper_limit(12.64) == "< 13 (95 %)"
    assert format_upper_limit(0.0347) == "< 0.035 (95 %)"
    # a rate with no event is its upper limit, never 0 +- 0; per ps -> per ns
    assert format_rate(0.0, 0.0, 0, 0.0126, scale=1000.0) == "< 13 (95 %)"
    assert format_rate(0.08, 0.018, 19, 0.12, scale=1000.0) == "80 ± 18"
    assert format_plain(12345.0, 2) == "12000" and format_plain(0.000123, 2) == "0.00012"
    assert format_plain(math.inf) == "–"
