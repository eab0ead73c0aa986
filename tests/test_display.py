"""Numbers as a physicist writes them: value ± uncertainty in SI units (checked by hand;
common practice, no source)."""
from __future__ import annotations

import pytest

from povmfit.fitting.display import format_interval, format_p_value, format_quantity, format_uncertain


@pytest.mark.parametrize("value, stderr, unit, expected", [
    (0.6194, 0.0186, "%", "61.9 ± 1.9 %"),
    (0.61935, 0.000526, "%", "61.935 ± 0.053 %"),
    (164213.1, 3499.7, "Hz", "164.2 ± 3.5 kHz"),
    (20.5, 0.3, "Hz", "20.50 ± 0.30 Hz"),
    (2.5e6, 4e4, "Hz", "2.500 ± 0.040 MHz"),
    (1e-7, None, "s", "100 ns"),
    (0.5, 0.01, "", "0.500 ± 0.010"),
])
def test_quantities_with_units(value, stderr, unit, expected):
    assert format_quantity(value, stderr, unit) == expected


def test_uncertainty_sets_the_decimals_of_value_and_interval():
    assert format_uncertain(1234.5, 67.0) == "1234 ± 67"
    assert format_uncertain(0.012344, 0.00067) == "0.01234 ± 0.00067"
    assert format_interval(0.5829, 0.6558, 0.0186, "%", reference=0.6194) == "[58.3, 65.6] %"
    assert format_interval(157354.0, 171072.7, 3499.7, "Hz", reference=164213.1) == "[157.4, 171.1] kHz"


def test_one_p_value_format():
    assert format_p_value(0.99815) == "0.998"
    assert format_p_value(0.01234) == "0.0123"
    assert format_p_value(0.0) == "< 1e-300"
    assert format_p_value(None) == "n/a"
