"""Unit parsing: SI conversions (exact factors: 1 h = 3600 s, 1 d = 86400 s, 1 kn = 1852 m / 3600 s (SI Brochure, 9th ed., table 8))."""

from __future__ import annotations

import pytest

from driftwise.errors import InputError
from driftwise.units import parse_diffusivity_m2_s, parse_duration_s, parse_durations_s, parse_length_m, parse_speed_m_s


@pytest.mark.parametrize(
    ("text", "expected"),
    [("10m", 10.0), ("2km", 2000.0), ("500", 500.0), ("1.5e3m", 1500.0), (" 25 cm ", 0.25)],
)
def test_lengths(text, expected):
    assert parse_length_m(text) == pytest.approx(expected, rel=1e-15)


@pytest.mark.parametrize(
    ("text", "expected"),
    [("6h", 21600.0), ("2d", 172800.0), ("10min", 600.0), ("30s", 30.0), ("3600", 3600.0)],
)
def test_durations(text, expected):
    assert parse_duration_s(text) == pytest.approx(expected, rel=1e-15)


def test_duration_list():
    assert parse_durations_s("6h,12h,24h") == [21600.0, 43200.0, 86400.0]


def test_speed_and_diffusivity():
    assert parse_speed_m_s("1kn") == pytest.approx(0.514444, rel=1e-6)
    assert parse_speed_m_s("20cm/s") == pytest.approx(0.2, rel=1e-15)
    assert parse_diffusivity_m2_s("5m2/s") == pytest.approx(5.0, rel=1e-15)


@pytest.mark.parametrize("text", ["ten metres", "5 parsecs", "", "1..2m"])
def test_bad_values_name_the_option(text):
    with pytest.raises(InputError, match="--horizon"):
        parse_duration_s(text, what="--horizon")
