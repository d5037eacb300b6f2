"""Units and angles: exact definitions and the sign and rounding edge cases."""

from __future__ import annotations

import math

import pytest

from server.units import (
    ARCSEC_PER_RAD,
    LENGTH_FACTORS,
    RAD_PER_GON,
    RAD_PER_MGON,
    UnitError,
    format_dms,
    parse_angle,
    parse_dms,
    parse_length,
    parse_number,
    parse_quantity,
    wrap_2pi,
    wrap_pi,
)


def test_feet_are_exact_definitions():
    """International foot 0.3048 m exactly; US survey foot 1200/3937 m
    (NIST and NOAA/NGS, 85 FR 62698, 2020); the ratio is 1.000002 (2 ppm)."""
    assert LENGTH_FACTORS["ft"] == 0.3048
    assert LENGTH_FACTORS["usft"] == 1200 / 3937
    assert LENGTH_FACTORS["usft"] / LENGTH_FACTORS["ft"] - 1 == pytest.approx(2.000e-6, abs=5e-10)
    # 1,000,000 US survey feet are 2 international feet longer than 1,000,000 feet
    assert 1e6 * LENGTH_FACTORS["usft"] / 0.3048 - 1e6 == pytest.approx(2.0, abs=0.001)


def test_gon_definitions():
    """400 gon to the circle (ISO 80000-3): 1 gon = 0.9°, 1 mgon = 3.24″."""
    assert parse_angle("100", "gon") == pytest.approx(math.pi / 2, abs=1e-15)
    assert math.degrees(RAD_PER_GON) == pytest.approx(0.9, abs=1e-15)
    assert pytest.approx(3.24, abs=1e-12) == RAD_PER_MGON * ARCSEC_PER_RAD
    assert parse_angle("96.9375gon", "dms") == pytest.approx(96.9375 * math.pi / 200)


@pytest.mark.parametrize(
    ("text", "arcsec"),
    [
        ("-0:00:30", -30.0),
        ("0:00:30", 30.0),
        ("359:59:59.999", 1295999.999),
        ("87:14:31.5", 87 * 3600 + 14 * 60 + 31.5),
        ("-12:30:00", -45000.0),
    ],
)
def test_dms_signs(text, arcsec):
    assert parse_dms(text) * ARCSEC_PER_RAD == pytest.approx(arcsec, abs=1e-6)


@pytest.mark.parametrize("bad", ["12:75:00", "12:30:60", "12:30", "12.5", "1:2:3:4", "٣:00:00"])
def test_dms_errors(bad):
    with pytest.raises(UnitError):
        parse_dms(bad)


@pytest.mark.parametrize(
    ("degrees", "text"),
    [
        (59.999999999, "60:00:00.0"),  # 59°59′59.99999″ rounds up into the next degree
        (0.0166666, "0:01:00.0"),
        (-0.0000001, "0:00:00.0"),  # no "−0"
        (-10.5, "-10:30:00.0"),
        (359.99999999, "360:00:00.0"),
    ],
)
def test_format_dms_carries_rounding(degrees, text):
    assert format_dms(degrees) == text


def test_format_dms_wraps_full_circle_when_asked():
    assert format_dms(359.99999999, wrap=True) == "0:00:00.0"


@pytest.mark.parametrize(
    ("value", "expected"),
    [
        (-0.0, 0.0),
        (2 * math.pi, 0.0),
        (-1e-18, 0.0),
        (3 * math.pi, math.pi),
        (-math.pi / 2, 1.5 * math.pi),
    ],
)
def test_wrap_2pi(value, expected):
    result = wrap_2pi(value)
    assert 0.0 <= result < 2 * math.pi
    assert result == pytest.approx(expected, abs=1e-15)


def test_wrap_pi_keeps_plus_pi():
    assert wrap_pi(math.pi) == math.pi
    assert wrap_pi(-math.pi) == math.pi
    assert wrap_pi(1.5 * math.pi) == pytest.approx(-0.5 * math.pi)


def test_quantities_in_si():
    q = parse_quantity("2mm+2ppm")
    assert (q.constant, q.ppm) == (0.002, 2.0)
    lev = parse_quantity("0.5mm+1.0mm/sqrtkm")
    assert (lev.constant, lev.per_sqrtkm) == (0.0005, 0.001)
    # an allowance adds its parts linearly: 2 cm + 50 ppm at 100 m is 2.5 cm
    # (docs/references.md "ALTA/NSPS relative positional precision")
    assert parse_quantity("2cm+50ppm").allowance_distance(100.0) == pytest.approx(0.025)
    assert parse_quantity("1.5sec").constant * ARCSEC_PER_RAD == pytest.approx(1.5)
    assert parse_quantity("0.07ft+50ppm").constant == pytest.approx(0.021336)


@pytest.mark.parametrize("bad", ["2", "2mm+", "2mm+2sec", "2 mm", "2parsec", "nan", "2mm/hour"])
def test_quantity_errors(bad):
    with pytest.raises(UnitError):
        parse_quantity(bad)


def test_numbers_refuse_non_finite_and_commas():
    for bad in ("nan", "inf", "-Infinity", "1,5", "1e999"):
        with pytest.raises(UnitError):
            parse_number(bad)
    assert parse_length("0.42km") == pytest.approx(420.0)
