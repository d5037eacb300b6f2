"""Tests of the field book parser: SI values, the contract's rules and every error message.

Unit factors are checked against their definitions, not against the code:
the international foot is 0.3048 m exactly and the US survey foot 1200/3937 m
(NIST and NOAA/NGS, 85 FR 62698, 2020); 1 gon = π/200 rad (ISO 80000-3); sources and
their status in docs/references.md "Units".
"""

from __future__ import annotations

import hashlib
import math
import re

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from server.errors import FieldbookError, Issue
from server.fieldbook.model import Fieldbook, Observation
from server.fieldbook.parser import parse_fieldbook
from tests.hypothesis_profiles import examples

FOOT_M = 0.3048
US_FOOT_M = 1200.0 / 3937.0
ARCSEC = math.pi / (180.0 * 3600.0)
GON = math.pi / 200.0
DEG = math.pi / 180.0

CONTRACT_EXAMPLE = """\
fieldbook 1
title "Example: two benchmarks and a new mark"
units length=m angle=dms
defaults level=1.0mm/sqrtkm

point BM-1 height=100.0000 fix
point BM-2 height=101.5000 fix

level BM-1 TP-1 +0.7421 len=0.35km
level TP-1 NEW  +0.5112 len=0.28km
level NEW  BM-2 +0.2450 len=0.40km
level NEW  BM-1 -1.2530 len=0.62km   note="return run"
"""

ALL_DEFAULTS = (
    "defaults level=1mm/sqrtkm distance=2mm+2ppm angle=1sec direction=1sec "
    "azimuth=2sec zenith=1.5sec slope=2mm+2ppm\n"
)


#: The 3D kinds need a crs line (the geodetic model); any valid one serves these tests.
CRS = "crs EPSG:32633\n"


def parse(text: str | bytes, **kwargs: str) -> Fieldbook:
    return parse_fieldbook(text, **kwargs)


def issues_of(text: str | bytes) -> tuple[Issue, ...]:
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    return caught.value.issues


def only_issue(text: str | bytes) -> Issue:
    issues = issues_of(text)
    assert len(issues) == 1, "\n".join(map(str, issues))
    return issues[0]


def single(text: str) -> Observation:
    """The one observation of a small field book (all defaults set)."""
    (observation,) = parse(ALL_DEFAULTS + text).observations
    return observation


# --------------------------------------------------------------------------- the contract example


def test_contract_example_parses_to_si_values() -> None:
    book = parse(CONTRACT_EXAMPLE, source="example.fieldbook")
    assert book.title == "Example: two benchmarks and a new mark"
    assert (book.length_unit, book.angle_unit, book.version) == ("m", "dms", 1)
    assert [(p.name, p.height, p.fixed, p.weighted) for p in book.points] == [
        ("BM-1", 100.0, "h", ""),
        ("BM-2", 101.5, "h", ""),
    ]
    assert [(o.line, o.from_point, o.to, o.value, o.length_km) for o in book.observations] == [
        (9, "BM-1", "TP-1", 0.7421, 0.35),
        (10, "TP-1", "NEW", 0.5112, 0.28),
        (11, "NEW", "BM-2", 0.2450, 0.40),
        (12, "NEW", "BM-1", -1.2530, 0.62),
    ]
    assert all(o.sigma.per_sqrtkm == pytest.approx(1e-3, rel=1e-12) for o in book.observations)
    assert book.observations[-1].note == "return run"
    assert book.warnings == ()
    assert book.source == "example.fieldbook"


def test_hash_is_of_the_raw_bytes() -> None:
    raw = CONTRACT_EXAMPLE.replace("\n", "\r\n").encode("utf-8")
    assert parse(raw).text_sha256 == hashlib.sha256(raw).hexdigest()
    assert (
        parse(CONTRACT_EXAMPLE).text_sha256
        == hashlib.sha256(CONTRACT_EXAMPLE.encode("utf-8")).hexdigest()
    )


# --------------------------------------------------------------------------- units


@pytest.mark.parametrize(
    ("unit", "metres_per_unit"),
    [("m", 1.0), ("ft", FOOT_M), ("usft", US_FOOT_M), ("FT", FOOT_M), ("UsFt", US_FOOT_M)],
)
def test_coordinates_and_observed_lengths_convert_by_the_exact_definition(
    unit: str, metres_per_unit: float
) -> None:
    book = parse(
        f"units length={unit}\n{CRS}{ALL_DEFAULTS}"
        "point A east=1000.5 north=-2000.25 height=350.125\n"
        "distance A B 328.084\n"
        "level A B -1.5 len=1km\n"
        "slope A B 500\n"
    )
    (point,) = book.points
    assert point.east == pytest.approx(1000.5 * metres_per_unit, rel=1e-15)
    assert point.north == pytest.approx(-2000.25 * metres_per_unit, rel=1e-15)
    assert point.height == pytest.approx(350.125 * metres_per_unit, rel=1e-15)
    distance, level, slope = book.observations
    assert distance.value == pytest.approx(328.084 * metres_per_unit, rel=1e-15)
    assert level.value == pytest.approx(-1.5 * metres_per_unit, rel=1e-15)
    assert slope.value == pytest.approx(500 * metres_per_unit, rel=1e-15)
    assert book.length_unit == unit.lower()


def test_us_survey_foot_is_two_ppm_longer_than_the_international_foot() -> None:
    """The two feet differ by 2 ppm: 2 ft in a million (85 FR 62698)."""
    feet = parse(f"units length=ft\n{ALL_DEFAULTS}distance A B 1000000\n").observations[0]
    us_feet = parse(f"units length=usft\n{ALL_DEFAULTS}distance A B 1000000\n").observations[0]
    assert us_feet.value / feet.value == pytest.approx(1.000002, abs=1e-11)


def test_option_lengths_carry_their_own_unit_whatever_the_file_unit() -> None:
    book = parse(
        "units length=ft\ncrs EPSG:32633\ndefaults level=1mm/sqrtkm slope=1mm zenith=1sec\n"
        "level A B 1.0 len=420m\nlevel A B 1.0 len=1320ft\n"
        "slope A B 100 hi=1.552m ht=5ft\n"
        "zenith A B 90:00:00 hi=0m ht=-0.35m\n"
    )
    first, second, slope, zenith = book.observations
    assert first.length_km == pytest.approx(0.42, rel=1e-15)
    assert second.length_km == pytest.approx(1320 * FOOT_M / 1000, rel=1e-15)
    assert slope.instrument_height == pytest.approx(1.552, rel=1e-15)
    assert slope.target_height == pytest.approx(5 * FOOT_M, rel=1e-15)
    # a zero instrument height and a target hanging below its mark are both real
    assert (zenith.instrument_height, zenith.target_height) == (0.0, pytest.approx(-0.35))


@pytest.mark.parametrize(
    ("angle_unit", "text", "radians"),
    [
        ("dms", "87:14:31.5", (87 + 14 / 60 + 31.5 / 3600) * DEG),
        ("dms", "0:00:00", 0.0),
        ("dms", "0:00:59.9999", 59.9999 * ARCSEC),
        ("dms", "359:59:59.9", (360 - 0.1 / 3600) * DEG),
        ("dms", "87.2421deg", 87.2421 * DEG),
        ("dms", "96.9375gon", 96.9375 * GON),
        ("dms", "96.9375GON", 96.9375 * GON),
        ("deg", "87.2421", 87.2421 * DEG),
        ("deg", "1.5e1", 15 * DEG),
        ("gon", "96.9375", 96.9375 * GON),
        ("gon", "100", math.pi / 2),
        ("gon", "45deg", math.pi / 4),
    ],
)
def test_angles_in_each_unit(angle_unit: str, text: str, radians: float) -> None:
    book_unit = parse(f"units angle={angle_unit}\n{ALL_DEFAULTS}angle A B C {text}\n")
    observation = book_unit.observations[0]
    assert observation.value == pytest.approx(radians, rel=1e-14, abs=1e-15)


@pytest.mark.parametrize(
    ("text", "radians"),
    [
        # A leading minus makes the whole angle negative; reduced into [0, 360°).
        ("-0:00:30", 2 * math.pi - 30 * ARCSEC),
        ("-90:00:00", 1.5 * math.pi),
        ("360:00:00", 0.0),
        ("400gon", 0.0),
        ("725:00:00", 5 * DEG),
        ("-450gon", 350 * GON),
    ],
)
def test_horizontal_angles_directions_and_azimuths_are_reduced_to_one_turn(
    text: str, radians: float
) -> None:
    book = parse(
        ALL_DEFAULTS + f"angle A B C {text}\nazimuth A B {text}\ndirections S\nA {text}\nend\n"
    )
    for observation in book.observations:
        assert 0.0 <= observation.value < 2 * math.pi
        assert observation.value == pytest.approx(radians, abs=1e-12)


@pytest.mark.parametrize(
    ("text", "radians"),
    [("0:00:00", 0.0), ("90:00:00", math.pi / 2), ("180:00:00", math.pi), ("200gon", math.pi)],
)
def test_zenith_angles_at_the_ends_of_their_range_are_accepted(text: str, radians: float) -> None:
    (zenith,) = parse(CRS + ALL_DEFAULTS + f"zenith A B {text}\n").observations
    assert zenith.value == pytest.approx(radians, abs=1e-15)
    assert 0.0 <= zenith.value <= math.pi


@pytest.mark.parametrize("text", ["-0:00:01", "180:00:01", "200.001gon", "-1deg"])
def test_zenith_angles_outside_0_to_180_are_errors(text: str) -> None:
    issue = only_issue(CRS + ALL_DEFAULTS + f"zenith A B {text}\n")
    assert issue.line == 3
    assert issue.token == text
    assert "between 0 and 180°" in issue.message


@pytest.mark.parametrize(
    ("text", "fragment"),
    [
        ("12:75:00", "'12:75:00': minutes must be below 60"),
        ("12:00:60", "seconds must be below 60"),
        ("12:30", "not an angle in D:M:S"),
        ("12.5", "is not in D:M:S"),
        ("0", "is not in D:M:S"),
        ("nan", "not a finite number"),
        ("-inf", "not a finite number"),
        ("12,5deg", "not a number"),
        ("+12:00:00", "not an angle in D:M:S"),
    ],
)
def test_bad_angles_say_what_is_wrong(text: str, fragment: str) -> None:
    issue = only_issue(ALL_DEFAULTS + f"angle A B C {text}\n")
    assert (issue.line, issue.token) == (2, text)
    assert fragment in issue.message


def test_dms_in_a_decimal_degree_file_points_at_the_units_line() -> None:
    issue = only_issue(f"units angle=deg\n{ALL_DEFAULTS}azimuth A B 87:14:31\n")
    assert issue.line == 3
    assert "units angle=dms" in issue.message


# --------------------------------------------------------------------------- observations


def test_each_kind_names_its_points_as_the_result_contract_says() -> None:
    book = parse(
        CRS + ALL_DEFAULTS + "level L1 L2 0.5 len=1km\n"
        "distance D1 D2 10\n"
        "angle BACK AT FORE 10:00:00\n"
        "azimuth Z1 Z2 10:00:00\n"
        "slope S1 S2 10\n"
        "zenith V1 V2 90:00:00\n"
        "directions OCC\nT1 0:00:00\nT2 10:00:00\nend\n"
    )
    assert [(o.kind, o.from_point, o.at, o.to) for o in book.observations] == [
        ("level", "L1", None, "L2"),
        ("distance", "D1", None, "D2"),
        ("angle", "BACK", "AT", "FORE"),
        ("azimuth", "Z1", None, "Z2"),
        ("slope", "S1", None, "S2"),
        ("zenith", "V1", None, "V2"),
        ("direction", "OCC", "OCC", "T1"),
        ("direction", "OCC", "OCC", "T2"),
    ]
    assert [o.line for o in book.observations] == [3, 4, 5, 6, 7, 8, 10, 11]
    assert book.rounds[0].line == 9
    assert book.rounds[0].observation_lines == (10, 11)
    assert {o.round_line for o in book.observations[-2:]} == {9}


def test_own_sd_replaces_the_default_for_that_observation_only() -> None:
    book = parse(ALL_DEFAULTS + "distance A B 10 sd=5mm+3ppm\ndistance A B 10\n")
    own, default = book.observations
    assert (own.sigma.constant, own.sigma.ppm) == pytest.approx((0.005, 3.0))
    assert (default.sigma.constant, default.sigma.ppm) == pytest.approx((0.002, 2.0))


@pytest.mark.parametrize(
    ("sd", "field", "radians"),
    [("1.5sec", "constant", 1.5 * ARCSEC), ("0.3mgon", "constant", 0.3e-3 * GON)],
)
def test_angular_standard_deviations_in_radians(sd: str, field: str, radians: float) -> None:
    observation = single(f"angle A B C 1:00:00 sd={sd}\n")
    assert observation.sigma.angular
    assert getattr(observation.sigma, field) == pytest.approx(radians, rel=1e-12)


def test_leveling_standard_deviation_parts() -> None:
    observation = single("level A B 0.5 len=0.42km setups=6 sd=0.5mm+1.0mm/sqrtkm+0.4mm/setup\n")
    assert observation.sigma.constant == pytest.approx(0.5e-3)
    assert observation.sigma.per_sqrtkm == pytest.approx(1.0e-3)
    assert observation.sigma.per_setup == pytest.approx(0.4e-3)
    assert (observation.length_km, observation.setups) == (pytest.approx(0.42), 6)


def test_ignore_and_note_are_kept() -> None:
    observation = single('distance A B 10 ignore note="tape \\"B\\" # not a comment"\n')
    assert observation.ignored
    assert observation.note == 'tape "B" # not a comment'


def test_centering_goes_to_distances_angles_directions_and_slope_distances_only() -> None:
    """Slope distances carry it too: the 3D model adds 2c² to them as to distances."""
    book = parse(
        CRS + ALL_DEFAULTS + "defaults centering=1.5mm\n"
        "distance A B 10\nangle A B C 1:00:00\ndirections A\nB 0:00:00\nC 1:00:00\nend\n"
        "azimuth A B 1:00:00\nlevel A B 1 len=1km\nslope A B 10\nzenith A B 90:00:00\n"
    )
    centering = {o.kind: o.centering for o in book.observations}
    assert centering == {
        "distance": pytest.approx(0.0015),
        "angle": pytest.approx(0.0015),
        "direction": pytest.approx(0.0015),
        "azimuth": 0.0,
        "level": 0.0,
        "slope": pytest.approx(0.0015),
        "zenith": 0.0,
    }


def test_centering_applies_also_with_own_sd_and_zero_turns_it_off() -> None:
    book = parse(
        ALL_DEFAULTS + "defaults centering=1mm\ndistance A B 10 sd=1mm\n"
        "defaults centering=0mm\ndistance A B 10\n"
    )
    assert [o.centering for o in book.observations] == [pytest.approx(0.001), 0.0]


def test_defaults_changing_mid_file_apply_only_to_later_observations() -> None:
    book = parse(
        "defaults distance=2mm+2ppm angle=1sec\n"
        "distance A B 10\nangle A B C 1:00:00\n"
        "defaults distance=5mm\n"  # a second instrument; angle default stays
        "distance A B 10\nangle A B C 1:00:00\n"
    )
    first_distance, first_angle, second_distance, second_angle = book.observations
    assert (first_distance.sigma.constant, first_distance.sigma.ppm) == pytest.approx((0.002, 2))
    assert (second_distance.sigma.constant, second_distance.sigma.ppm) == pytest.approx((0.005, 0))
    assert first_angle.sigma == second_angle.sigma


def test_scale_multiplies_only_the_distances_after_it() -> None:
    book = parse(
        "units length=ft\n" + CRS + ALL_DEFAULTS + "distance A B 1000\n"
        "scale factor=0.99962\n"
        "distance A B 1000\nslope A B 1000\nlevel A B 1000 len=1km\n"
        "scale factor=1\ndistance A B 1000\n"
    )
    before, scaled, slope, level, after = book.observations
    assert before.value == pytest.approx(1000 * FOOT_M, rel=1e-15)
    assert scaled.value == pytest.approx(1000 * FOOT_M * 0.99962, rel=1e-15)
    assert scaled.scale == 0.99962
    assert (slope.value, slope.scale) == (pytest.approx(1000 * FOOT_M, rel=1e-15), 1.0)
    assert (level.value, level.scale) == (pytest.approx(1000 * FOOT_M, rel=1e-15), 1.0)
    assert after.value == pytest.approx(1000 * FOOT_M, rel=1e-15)


def test_scale_far_from_one_but_possible_warns() -> None:
    book = parse(ALL_DEFAULTS + "scale factor=1.02\ndistance A B 100\n")
    assert book.observations[0].value == pytest.approx(102.0)
    (warning,) = book.warnings
    assert warning.line == 2
    assert "0.5%" in warning.message


@pytest.mark.parametrize("factor", ["0", "-0.9996", "0.3048", "3.28084", "1.2"])
def test_scale_factor_that_no_projection_gives_is_an_error(factor: str) -> None:
    issue = only_issue(f"scale factor={factor}\n")
    assert issue.token == f"factor={factor}"
    assert "between 0.9 and 1.1" in issue.message


def test_keywords_options_values_and_units_are_case_insensitive() -> None:
    book = parse(
        "UNITS Length=FT Angle=GON\nDefaults DISTANCE=2MM+2PPM Direction=0.3MGON\n"
        "POINT A East=1 NORTH=2 FIX=EN\n"
        "Distance A B 10 IGNORE\nDIRECTIONS A\nB 0\nC 100\nEND\n"
    )
    assert (book.length_unit, book.angle_unit) == ("ft", "gon")
    assert book.points[0].fixed == "en"
    assert book.observations[0].ignored
    assert book.observations[2].value == pytest.approx(math.pi / 2)


def test_point_names_are_case_sensitive() -> None:
    book = parse("point bm1 height=1\npoint BM1 height=2\n")
    assert [p.name for p in book.points] == ["bm1", "BM1"]


# --------------------------------------------------------------------------- points


@pytest.mark.parametrize(
    ("options", "fixed", "weighted", "sd_en", "sd_h"),
    [
        ("east=1 north=2 height=3", "", "", None, None),
        ("east=1 north=2 height=3 fix", "enh", "", None, None),
        ("height=3 fix", "h", "", None, None),
        ("east=1 north=2 fix", "en", "", None, None),
        ("east=1 north=2 height=3 fix=en", "en", "", None, None),
        ("east=1 north=2 height=3 fix=h", "h", "", None, None),
        ("east=1 north=2 height=3 fix=enh", "enh", "", None, None),
        ("east=1 north=2 height=3 sd=5mm", "", "enh", 0.005, 0.005),
        ("east=1 north=2 height=3 fix=h sd=5mm", "h", "en", 0.005, None),
        ("east=1 north=2 height=3 fix=en sd=1cm", "en", "h", None, 0.01),
        ("east=1 north=2 height=3 sd_en=5mm sd_h=8mm", "", "enh", 0.005, 0.008),
        ("east=1 north=2 height=3 sd_h=8mm", "", "h", None, 0.008),
        ("east=1 north=2 height=3 fix=h sd_en=0.02ft", "h", "en", 0.02 * FOOT_M, None),
    ],
)
def test_fixed_and_weighted_components(
    options: str, fixed: str, weighted: str, sd_en: float | None, sd_h: float | None
) -> None:
    (point,) = parse(f"point P {options}\n").points
    assert (point.fixed, point.weighted) == (fixed, weighted)
    assert point.sd_en == (None if sd_en is None else pytest.approx(sd_en, rel=1e-12))
    assert point.sd_h == (None if sd_h is None else pytest.approx(sd_h, rel=1e-12))


def test_points_may_follow_observations_and_keep_their_note() -> None:
    book = parse(ALL_DEFAULTS + 'distance A B 10\npoint A east=0 north=0 note="iron pin"\n')
    assert book.points[0].line == 3
    assert book.points[0].note == "iron pin"


@pytest.mark.parametrize(
    ("line", "fragment"),
    [
        ("point A east=1", "has east= but no north="),
        ("point A north=1 height=2", "has north= but no east="),
        ("point A height=1 fix=en", "needs east= and north= on point A"),
        ("point A east=1 north=2 fix=h", "needs height= on point A"),
        ("point A east=1 north=2 fix=enh", "needs height= on point A"),
        ("point A fix", "nothing to hold"),
        ("point A height=1 fix fix=h", "either 'fix' or 'fix=...'"),
        ("point A height=1 fix=z", "fix= takes en, h or enh"),
        ("point A height=1 fix sd=5mm", "every given component is fixed"),
        ("point A sd=5mm", "has no coordinates"),
        ("point A height=1 fix=h sd_h=5mm", "height of A is fixed; it cannot also be weighted"),
        ("point A east=1 north=2 fix sd_en=5mm", "horizontal position of A is fixed"),
        ("point A height=1 sd_en=5mm", "needs east= and north= on point A"),
        ("point A height=1 sd=5mm sd_h=5mm", "either sd= or sd_en=/sd_h="),
        ("point A height=1 sd=0mm", "must be greater than zero"),
        ("point A height=1 sd=-1mm", "cannot be negative"),
        ("point A height=1 sd=5", "needs a unit"),
        ("point A height=1 sd=5sec", "is an angle, but a control point's standard deviation"),
        ("point A height=1 sd=5mm+2ppm", "ppm part applies to distances only"),
        ("point A east=100m north=2", "plain numbers in the file's length unit (m)"),
        ("point A east=1,5 north=2", "not a number"),
        ("point A height=nan", "not a finite number"),
        ("point A 100 200", "coordinates are always named"),
        ("point end height=1", "'end' cannot be a point name"),
        ("point END height=1", "'end' cannot be a point name"),
        ('point "A B" height=1', "quotes are only for text"),
        ("point " + "X" * 65, "longer than 64 characters"),
        ("point A\u00a0B height=1", "'A\\u00a0B' contains white space or an invisible"),
        ("point A heigth=1", "did you mean 'height'?"),
        ("point A height=1 ignore", "'ignore' does not apply to point"),
        ("point A len=1km", "'len=' does not apply to point; it is an option of level"),
    ],
)
def test_point_errors(line: str, fragment: str) -> None:
    issue = only_issue(f"# control\n{line}\n")
    assert issue.line == 2
    assert fragment in issue.message


def test_a_64_character_name_is_allowed() -> None:
    name = "N" * 64
    assert parse(f"point {name} height=1\n").points[0].name == name


def test_duplicate_point_names_the_first_declaration() -> None:
    issue = only_issue(
        "fieldbook 1\n\n\npoint BM-1 height=1\npoint BM-2 height=2\npoint BM-1 height=3\n"
    )
    assert issue.line == 6
    assert issue.token == "BM-1"
    assert issue.message == "point BM-1 is already declared on line 4"


# --------------------------------------------------------------------------- rounds


def test_options_on_the_directions_line_apply_to_every_direction() -> None:
    book = parse(
        "defaults direction=1sec\n"
        'directions S1 sd=2sec note="face left" ignore\n'
        "A 0:00:00\n"
        "B 45:00:00 sd=3sec note=own\n"
        "C 90:00:00\n"
        "end\n"
    )
    a, b, c = book.observations
    assert a.sigma.constant == pytest.approx(2 * ARCSEC)
    assert b.sigma.constant == pytest.approx(3 * ARCSEC)  # its own sd wins
    assert c.sigma.constant == pytest.approx(2 * ARCSEC)
    assert [o.note for o in book.observations] == ["face left", "own", "face left"]
    assert all(o.ignored for o in book.observations)


def test_round_without_options_takes_the_direction_default() -> None:
    book = parse("defaults direction=0.5sec angle=9sec\ndirections S1\nA 0:00:00\nB 1:00:00\nend\n")
    assert [o.sigma.constant for o in book.observations] == [pytest.approx(0.5 * ARCSEC)] * 2


def test_each_round_is_its_own_round() -> None:
    book = parse(
        "defaults direction=1sec\ndirections S1\nA 0:00:00\nB 1:00:00\nend\n"
        "directions S2\nA 0:00:00\nB 1:00:00\nA 0:00:01\nend\n"
    )
    assert [(r.line, r.at, r.observation_lines) for r in book.rounds] == [
        (2, "S1", (3, 4)),
        (6, "S2", (7, 8, 9)),  # closing on the reference object is fine
    ]


def test_round_of_one_direction_is_accepted_with_a_warning() -> None:
    book = parse("defaults direction=1sec\n\ndirections S1\nA 0:00:00\nend\n")
    assert len(book.observations) == 1
    (warning,) = book.warnings
    assert warning.line == 3
    assert "only one direction" in warning.message
    assert "no redundancy" in warning.message


def test_statement_inside_a_round_means_a_missing_end() -> None:
    issues = issues_of(
        "defaults direction=1sec distance=1mm\n"
        "directions S1\nA 0:00:00\nB 1:00:00\n"
        "distance S1 A 10\n"
        "distance S1 B 10 sd=-1mm\n"  # still read as a statement after the round
    )
    assert [issue.line for issue in issues] == [5, 6]
    assert issues[0].token == "distance"
    assert "round at S1 on line 2 is not closed" in issues[0].message
    assert "cannot be negative" in issues[1].message


def test_round_left_open_at_the_end_of_the_file() -> None:
    issue = only_issue("defaults direction=1sec\ndirections S1\nA 0:00:00\nB 1:00:00\n")
    assert issue.line == 2
    assert "never closed" in issue.message
    assert "add 'end'" in issue.message


def test_empty_round_is_an_error() -> None:
    issue = only_issue("defaults direction=1sec\ndirections S1 # nothing turned\nend\n")
    assert issue.line == 2
    assert "is empty" in issue.message


def test_a_wrong_sd_on_the_directions_line_is_reported_once() -> None:
    issue = only_issue("directions S1 sd=2mm\nA 0:00:00\nB 1:00:00\nend\n")
    assert (issue.line, issue.token) == (1, "sd=2mm")
    assert "direction standard deviation is an angle" in issue.message


def test_end_takes_nothing_after_it() -> None:
    issue = only_issue("defaults direction=1sec\ndirections S1\nA 0:00:00\nB 1:00:00\nend S1\n")
    assert (issue.line, issue.token) == (5, "S1")
    assert "end takes nothing" in issue.message


def test_a_point_named_like_a_statement_works_outside_rounds_only() -> None:
    book = parse("defaults level=1mm\npoint level height=1\nlevel level B 0.5\n")
    assert book.points[0].name == "level"
    assert book.observations[0].from_point == "level"
    first, *_ = issues_of("defaults direction=1sec\ndirections S1\nA 0:00:00\nlevel 1:00:00\nend\n")
    assert first.line == 4
    assert "round at S1 on line 2 is not closed" in first.message


def test_end_without_a_round() -> None:
    issue = only_issue("defaults distance=1mm\ndistance A B 1\nend\n")
    assert (issue.line, issue.token) == (3, "end")
    assert "no round is open" in issue.message


def test_missing_direction_sd_is_reported_once_per_round() -> None:
    issues = issues_of("directions S1\nA 0:00:00\nB 1:00:00\nC 2:00:00\nend\n")
    assert len(issues) == 1
    assert issues[0].line == 2
    assert "no standard deviation for this direction" in issues[0].message


@pytest.mark.parametrize(
    ("entry", "fragment"),
    [
        ("S1 1:00:00", "direction from S1 to itself"),
        ("A", "a direction in a round needs TO and the direction"),
        ("A 1:00:00 hi=1.5m", "'hi=' does not apply to a direction in a round"),
        ("A 1:00:00 sd=2mm", "is a length, but a direction standard deviation is an angle"),
        ("A 1:00:00 extra", "not expected here"),
        ("A 99:99:99", "minutes must be below 60"),
    ],
)
def test_direction_errors(entry: str, fragment: str) -> None:
    issue = only_issue(f"defaults direction=1sec\ndirections S1\nB 0:00:00\n{entry}\nend\n")
    assert issue.line == 4
    assert fragment in issue.message


# --------------------------------------------------------------------------- observation errors


@pytest.mark.parametrize(
    ("line", "token", "fragment"),
    [
        ("distnce A B 12", "distnce", "'distnce' is not a statement; did you mean 'distance'?"),
        ("levle A B 1", "levle", "did you mean 'level'?"),
        ("direction S1", "direction", "did you mean 'directions'?"),
        ("xyzzy A B 1", "xyzzy", "a line starts with a keyword"),
        ("distance A B", "distance", "distance needs FROM, TO and the distance"),
        ("angle A B C", "angle", "angle needs BACK, AT, FORE and the angle"),
        ("level A", "level", "level needs FROM, TO and the height difference"),
        ("distance A A 10", "A", "from A to itself"),
        ("level A A 1 len=1km", "A", "from A to itself"),
        ("angle A B A 10:00:00", "A", "BACK and FORE are both A"),
        ("angle A A C 10:00:00", "A", "AT must differ from BACK and FORE"),
        ("distance A B 0", "0", "greater than zero"),
        ("distance A B -12.5", "-12.5", "greater than zero"),
        ("slope A B 0", "0", "greater than zero"),
        ("distance A B 12.5m", "12.5m", "leave out the unit"),
        ("distance A B nan", "nan", "not a finite number"),
        ("distance A B 1e999", "1e999", "too large"),
        ("distance A B 10 sd=0mm", "sd=0mm", "must be greater than zero"),
        ("distance A B 10 sd=-2mm", "sd=-2mm", "cannot be negative"),
        ("distance A B 10 sd=2", "sd=2", "needs a unit"),
        ("distance A B 10 sd=2sec", "sd=2sec", "is an angle, but a distance standard deviation"),
        ("angle A B C 1:00:00 sd=2mm", "sd=2mm", "is a length, but an angle standard deviation"),
        ("azimuth A B 1:00:00 sd=2mm+1ppm", "sd=2mm+1ppm", "is a length"),
        ("distance A B 10 sd=1mm/sqrtkm", "sd=1mm/sqrtkm", "apply to leveling only"),
        ("level A B 1 sd=1mm+2ppm", "sd=1mm+2ppm", "ppm part applies to distances only"),
        ("distance A B 10 len=1km", "len=1km", "'len=' does not apply to distance"),
        ("distance A B 10 hi=1m", "hi=1m", "'hi=' does not apply to distance"),
        ("level A B 1 len=1km hi=1m", "hi=1m", "it is an option of slope and zenith"),
        ("distance A B 10 fix", "fix", "'fix' does not apply to distance"),
        ("distance A B 10 ignor", "ignor", "did you mean 'ignore'?"),
        ("distance A B 10 sdd=2mm", "sdd=2mm", "did you mean 'sd'?"),
        ("distance A B 10 sd=1mm sd=2mm", "sd=2mm", "given twice"),
        ("distance A B 10 ignore ignore", "ignore", "given twice"),
        ("distance A B 10 11", "11", "not expected here: distance takes FROM, TO and the distance"),
        ("distance A B ignore 12", "ignore", "must come after FROM, TO and the distance"),
        ("level A B len=1km 0.5", "len=1km", "must come after FROM, TO and the height difference"),
        ("level A B 0.5 len=0km", "len=0km", "greater than zero"),
        ("level A B 0.5 len=420", "len=420", "needs a length unit"),
        ("level A B 0.5 len=1km setups=0", "setups=0", "whole number, at least 1"),
        ("level A B 0.5 len=1km setups=2.5", "setups=2.5", "whole number, at least 1"),
        ("level A B 0.5 len=1km setups=\u00b2", "setups=\u00b2", "whole number, at least 1"),
        ("angle A B C " + "9" * 5000 + ":00:00", "9" * 39 + "…", "too long to be an angle"),
        ("slope A B 10 hi=1.5", "hi=1.5", "needs a length unit"),
        ("distance A B 10 sd=", "sd=", "needs a value"),
        ("distance A B 10 sd= 2mm", "sd=2mm", "write 'sd=2mm' without spaces around '='"),
        ("distance A B 10 sd =2mm", "sd=2mm", "without spaces"),
        ("distance A B 10 sd = 2mm", "sd=2mm", "without spaces"),
        ("distance A B 10 ignore sd = 2mm", "sd=2mm", "without spaces"),
        ("distance A B 10 11 12 13", "11", "not expected here"),
        ("distance A B 10 ignore 11 12", "11", "not expected here"),
        ("distance A B 10 =2mm", "=2mm", "no option name"),
        ('distance A B "10"', '"10"', "quotes are only for text"),
        ('distance A B 10 sd="2mm"', 'sd="2mm"', "quotes are only for text"),
    ],
)
def test_observation_errors(line: str, token: str, fragment: str) -> None:
    issue = only_issue(f"{ALL_DEFAULTS}{CRS}{line}\n")
    assert (issue.line, issue.token) == (3, token)
    assert fragment in issue.message


def test_observation_without_any_standard_deviation() -> None:
    issue = only_issue("defaults angle=1sec\n\ndistance A B 10\n")
    assert (issue.line, issue.token) == (3, "distance")
    assert "no standard deviation for this distance" in issue.message
    assert "defaults distance=" in issue.message


@pytest.mark.parametrize(
    ("text", "line", "fragment"),
    [
        ("defaults level=1mm/sqrtkm\n\nlevel A B 0.5\n", 3, "no len=, but its standard deviation"),
        (
            "defaults level=0.4mm/setup\nlevel A B 0.5\n",
            2,
            "no setups=, but its standard deviation",
        ),
        ("level A B 0.5 sd=1mm/sqrtkm\n", 1, "(its sd=) has a per-√km part"),
    ],
)
def test_level_sd_parts_need_their_length_or_setups(text: str, line: int, fragment: str) -> None:
    issue = only_issue(text)
    assert issue.line == line
    assert fragment in issue.message


def test_a_wrong_default_is_reported_once_not_at_every_observation() -> None:
    issue = only_issue("defaults distance=2\ndistance A B 10\ndistance A B 20\n")
    assert issue.line == 1
    assert issue.token == "distance=2"


def test_a_mistyped_sd_key_does_not_also_complain_about_the_missing_sd() -> None:
    issue = only_issue("distance A B 10 sdd=2mm\n")
    assert "did you mean 'sd'?" in issue.message


def test_a_wrong_angle_unit_is_reported_once() -> None:
    issue = only_issue(ALL_DEFAULTS + "units angle=degrees\nangle A B C 10.5\nazimuth A B 3\n")
    assert issue.line == 2
    assert "use dms" in issue.message


# --------------------------------------------------------------------------- header statements


@pytest.mark.parametrize(
    ("text", "line", "fragment"),
    [
        ('title "a"\nfieldbook 1\n', 2, "'fieldbook' must be the first statement"),
        ("fieldbook 2\n", 1, "version 2 is not supported"),
        ("fieldbook one\n", 1, "'one' is not a format version"),
        ("fieldbook \u00b9\n", 1, "is not a format version"),
        ("fieldbook\n", 1, "fieldbook needs the format version"),
        ("fieldbook 1\nfieldbook 1\n", 2, "already given on line 1"),
        ('title "a"\ntitle "b"\n', 2, "'title' is already given on line 1"),
        ("units length=m\nunits angle=gon\n", 2, "'units' is already given on line 1"),
        (
            "point A height=1\nunits length=ft\n",
            2,
            "must come before the first point or observation (line 1)",
        ),
        (ALL_DEFAULTS + "level A B 1 len=1km\ntests alpha=0.01\n", 3, "must come before the first"),
        ("point A height=1\ntolerance relative=2cm+50ppm\n", 2, "must come before"),
        ("title Big Survey\n", 1, "title takes the title in double quotes"),
        ("units length=feet\n", 1, "use m, ft (international foot, 0.3048 m) or usft"),
        (
            "units angle=grad\n",
            1,
            "use dms (degrees:minutes:seconds), deg (decimal degrees) or gon",
        ),
        ("units\n", 1, "units needs length="),
        ("units lenght=m\n", 1, "did you mean 'length'?"),
        ("defaults\n", 1, "defaults needs KIND=SD"),
        ("defaults directions=1sec\n", 1, "did you mean 'direction'?"),
        ("defaults centering=1sec\n", 1, "is an angle, but the centering standard deviation"),
        ("defaults centering=1mm+1ppm\n", 1, "ppm part applies to distances only"),
        ("defaults level=2mm+2ppm\n", 1, "ppm part applies to distances only"),
        ("defaults angle=0sec\n", 1, "must be greater than zero"),
        ("scale\n", 1, "scale needs factor=F"),
        ("tests\n", 1, "tests needs alpha="),
        ("tolerance\n", 1, "tolerance needs misclosure="),
        ("scale 0.9996\n", 1, "scale takes factor=F"),
        ("scale factor=abc\n", 1, "not a number"),
        ("tests alpha=1.5\n", 1, "strictly between 0 and 1"),
        ("tests power=0\n", 1, "strictly between 0 and 1"),
        ("tests confidence=nan\n", 1, "not a finite number"),
        ("tests alpa=0.05\n", 1, "did you mean 'alpha'?"),
        ("tolerance misclosure=4mm+50ppm\n", 1, "ppm part applies to distances only"),
        ("tolerance relative=2cm+1mm/sqrtkm\n", 1, "apply to leveling only"),
        ("tolerance relative=0cm\n", 1, "must be greater than zero"),
        ("tolerance misclosure=4\n", 1, "needs a unit"),
        ('title "unterminated\n', 1, "never closed"),
        ('title "a"b\n', 1, "put a space after the closing quote"),
        ('title a"b"\n', 1, "a double quote can only start a text value"),
    ],
)
def test_header_and_setting_errors(text: str, line: int, fragment: str) -> None:
    issue = only_issue(text)
    assert issue.line == line
    assert fragment in issue.message


def test_tests_and_tolerance_are_read() -> None:
    book = parse("tests alpha=0.01 power=0.9\ntolerance misclosure=4mm/sqrtkm relative=2cm+50ppm\n")
    assert (book.tests.alpha, book.tests.snooping, book.tests.power, book.tests.confidence) == (
        0.01,
        0.001,
        0.9,
        0.95,
    )
    assert book.misclosure_tolerance is not None and book.relative_tolerance is not None
    assert book.misclosure_tolerance.per_sqrtkm == pytest.approx(0.004)
    assert book.relative_tolerance.constant == pytest.approx(0.02)
    assert book.relative_tolerance.ppm == pytest.approx(50)


def test_header_defaults_when_absent() -> None:
    book = parse("point A height=1\n")
    assert (book.title, book.length_unit, book.angle_unit) == ("", "m", "dms")
    assert (book.tests.alpha, book.tests.snooping, book.tests.power, book.tests.confidence) == (
        0.05,
        0.001,
        0.80,
        0.95,
    )
    assert (book.misclosure_tolerance, book.relative_tolerance) == (None, None)


def test_defaults_and_scale_may_come_after_observations() -> None:
    book = parse(
        "defaults distance=1mm\ndistance A B 1\ndefaults distance=3mm\nscale factor=1.0001\n"
    )
    assert len(book.observations) == 1


def test_comments_and_blank_lines_may_precede_fieldbook() -> None:
    assert parse("# project 7\n\n   \nfieldbook 1\npoint A height=1\n").version == 1


# --------------------------------------------------------------------------- text and encoding


def test_quoted_text_with_escapes_and_hashes() -> None:
    book = parse('title "North \\"Ridge\\" # 2 \\\\ C:\\data"  # a real comment\n')
    assert book.title == 'North "Ridge" # 2 \\ C:\\data'


def test_single_word_text_needs_no_quotes() -> None:
    book = parse("title Ridge\npoint A height=1 note=spike\n")
    assert (book.title, book.points[0].note) == ("Ridge", "spike")


def test_hash_starts_a_comment_even_inside_a_word() -> None:
    assert parse("point A#1 height=5\n").points[0].name == "A"


def test_tabs_separate_tokens() -> None:
    assert parse("point\tA\theight=5\n").points[0].height == 5.0


@pytest.mark.parametrize(
    "raw",
    [
        b"\xef\xbb\xbfpoint A height=1\r\npoint B height=2\r\n",  # BOM and CRLF
        b"point A height=1\rpoint B height=2\r",  # CR only
        b"point A height=1\npoint B height=2",  # no final line end
        "\ufeffpoint A height=1\npoint B height=2\n",  # BOM in a str
    ],
)
def test_bom_and_line_ends_are_accepted(raw: bytes | str) -> None:
    assert [(p.line, p.name) for p in parse(raw).points] == [(1, "A"), (2, "B")]


def test_line_numbers_count_crlf_lines_like_an_editor() -> None:
    issue = only_issue(b"point A height=1\r\n\r\npoint A height=2\r\n")
    assert issue.line == 3


def test_non_utf8_bytes_are_an_error_on_their_line_and_other_lines_are_read() -> None:
    issues = issues_of(
        b"defaults distance=1mm\n"
        b'point A height=1 note="caf\xe9"\n'  # Latin-1, not UTF-8
        b"distance A A 10\n"
    )
    assert [issue.line for issue in issues] == [2, 3]
    assert "0xE9" in issues[0].message and "UTF-8" in issues[0].message
    assert "to itself" in issues[1].message


def test_utf8_names_and_notes_are_fine() -> None:
    book = parse('point Höhe-1 height=1 note="Straße, près du pont"\n'.encode())
    assert (book.points[0].name, book.points[0].note) == ("Höhe-1", "Straße, près du pont")


@pytest.mark.parametrize(
    ("raw", "fragment"),
    [
        (b"PK\x03\x04\x14\x00\x06\x00" + bytes(range(256)) * 20, "binary data"),
        ("point A height=1\n".encode("utf-16"), "UTF-16"),
        ("name,east,north\nBM1,100.0,200.0\nBM2,110.0,210.0\n" * 100, "table (CSV)"),
        ('{"points": [{"name": "A"}]}\n', "JSON"),
        ("<?xml version='1.0'?>\n<survey/>\n", "XML"),
        ("Dear colleague,\nplease find the survey attached.\n" * 200, "does not look like"),
    ],
)
def test_a_file_that_is_not_a_field_book_gets_one_message(raw: bytes | str, fragment: str) -> None:
    issue = only_issue(raw)
    assert "this does not look like a field book" in issue.message
    assert fragment in issue.message


@pytest.mark.parametrize("text", ["", "\n\n", "# only a comment\n", "\ufeff"])
def test_an_empty_file_is_an_error(text: str) -> None:
    assert "no statements" in only_issue(text).message


def test_a_field_book_with_only_misspelled_statements_still_gets_suggestions() -> None:
    issue = only_issue("pont A height=1\n")
    assert "did you mean 'point'?" in issue.message


# --------------------------------------------------------------------------- collecting errors


def test_every_error_is_reported_in_line_order_not_just_the_first() -> None:
    text = (
        "units length=m\n"  # 1
        "defaults distance=2mm angle=1sec\n"  # 2
        "point BM-1 height=1 fix\n"  # 3
        "distnce BM-1 A 10\n"  # 4
        "distance A B -3\n"  # 5
        "point BM-1 height=2\n"  # 6
        "angle A B A 12:75:00\n"  # 7
        "units length=ft\n"  # 8
    )
    issues = issues_of(text)
    assert [issue.line for issue in issues] == [4, 5, 6, 7, 7, 8]
    assert "did you mean 'distance'" in issues[0].message
    assert "already declared on line 3" in issues[2].message
    assert "minutes must be below 60" in issues[4].message


def test_error_list_stops_at_50_and_counts_the_rest() -> None:
    text = "defaults distance=1mm\n" + "distance A A 10\n" * 120
    issues = issues_of(text)
    assert len(issues) == 51
    assert [issue.line for issue in issues[:50]] == list(range(2, 52))
    assert issues[-1].line == 52
    assert issues[-1].message.startswith("70 more errors")


def test_error_prints_as_file_line_message() -> None:
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook("defaults distance=1mm\ndistnce A B 1\n", source="site.fieldbook")
    assert str(caught.value) == (
        "site.fieldbook:2: 'distnce' is not a statement; did you mean 'distance'?"
    )


def test_long_and_invisible_tokens_are_shown_readably() -> None:
    issue = only_issue("defaults distance=1mm\ndistance A B " + "9" * 500 + "x\n")
    assert len(issue.token) <= 40
    issue = only_issue("defaults distance=1mm\ndistance A B 1\x0c0\n")
    assert "\\u000c" in issue.message


# --------------------------------------------------------------------------- robustness and speed

STATEMENT_WORDS = st.sampled_from(
    [
        "point",
        "level",
        "distance",
        "angle",
        "azimuth",
        "slope",
        "zenith",
        "directions",
        "end",
        "defaults",
        "scale",
        "units",
        "tests",
        "tolerance",
        "title",
        "fieldbook",
        "A",
        "B",
    ]
)
TOKENS = st.one_of(
    st.sampled_from(
        [
            "A",
            "B",
            "C",
            "1",
            "-0:00:30",
            "12:75:00",
            "fix",
            "ignore",
            "sd=1mm",
            "sd=1sec",
            "len=1km",
            "east=1",
            "north=2",
            "height=3",
            'note="x"',
            '"',
            "#",
            "=",
            "nan",
            "end",
            "setups=2",
            "hi=1m",
            "factor=1",
            "alpha=0.5",
            "length=ft",
            "angle=gon",
            "0.5mm/sqrtkm",
            "fix=en",
            "sd_h=1mm",
            "0:00:00",
            "\u00b2",
            "sd=",
            "ht=-1m",
            "setups=\u00b2",
        ]
    ),
    st.text(max_size=8),
)
LINES = st.lists(
    st.builds(
        lambda word, rest: " ".join([word, *rest]), STATEMENT_WORDS, st.lists(TOKENS, max_size=6)
    ),
    max_size=25,
)


@settings(max_examples=examples(300))
@given(LINES)
def test_any_statement_soup_gives_a_field_book_or_line_numbered_errors(lines: list[str]) -> None:
    """Never a stack trace: every input ends as a Fieldbook or a FieldbookError."""
    text = "\n".join(lines)
    try:
        book = parse_fieldbook(text)
    except FieldbookError as error:
        assert error.issues
        line_count = len(text.replace("\r\n", "\n").replace("\r", "\n").split("\n"))
        assert all(1 <= issue.line <= line_count for issue in error.issues)
        assert all(issue.message for issue in error.issues)
    else:
        assert all(0.0 <= o.value < 2 * math.pi for o in book.observations if o.kind == "angle")


@settings(max_examples=examples(200))
@given(st.binary(max_size=300))
def test_arbitrary_bytes_never_crash(raw: bytes) -> None:
    try:
        parse_fieldbook(raw)
    except FieldbookError as error:
        assert error.issues


@settings(max_examples=examples(200))
@given(st.integers(0, 359), st.integers(0, 59), st.integers(0, 599_999), st.booleans())
def test_dms_matches_its_definition(
    degrees: int, minutes: int, centi_micro: int, negative: bool
) -> None:
    seconds = centi_micro / 10_000
    sign = "-" if negative else ""
    text = f"{sign}{degrees}:{minutes:02d}:{seconds:.4f}"
    expected = (degrees + minutes / 60 + seconds / 3600) * DEG * (-1 if negative else 1)
    value = single(f"azimuth A B {text}\n").value
    assert math.isclose(value, expected % (2 * math.pi), abs_tol=1e-12) or math.isclose(
        abs(value - expected % (2 * math.pi)), 2 * math.pi, abs_tol=1e-12
    )


def test_a_large_file_keeps_every_observation() -> None:
    """50,000 observations come through with their own line numbers (speed lives in bench/)."""
    body = "".join(
        f"distance P{i} P{i + 1} {100 + i % 50}.1234\nlevel P{i} P{i + 1} +0.{i % 9}123 len=0.3km\n"
        for i in range(25_000)
    )
    book = parse(ALL_DEFAULTS + body)
    assert len(book.observations) == 50_000
    first_line = len(ALL_DEFAULTS.splitlines()) + 1
    assert book.observations[0].line == first_line
    assert book.observations[-1].line == first_line + 49_999


# ------------------------------------------------------------- messages that lead to the fix


@pytest.mark.parametrize(
    ("sd", "written"),
    [
        ('5"', "5sec"),
        ("5''", "5sec"),
        ("5″", "5sec"),
        ("1.5s", "1.5sec"),
        ("5'", "300sec"),
        ("0.001deg", "3.6sec"),
        ("3cc", "0.3mgon"),
    ],
)
def test_an_angle_marked_as_on_a_field_sheet_is_written_in_sec_for_the_user(
    sd: str, written: str
) -> None:
    # 1' = 60", 1° = 3600", 1 cc (centesimal second) = 0.0001 gon = 0.1 mgon: definitions.
    issue = only_issue(f"defaults angle={sd} distance=2mm\nangle A B C 1:00:00\ndistance A B 10\n")
    assert (issue.line, issue.token) == (1, f"angle={sd}")
    assert f"write {written}" in issue.message


def test_a_seconds_mark_on_a_distance_is_not_turned_into_sec() -> None:
    issue = only_issue('defaults distance=5"\ndistance A B 10\n')
    assert issue.line == 1
    assert "sec" not in issue.message.replace("1.5sec", "")


def test_one_wrong_defaults_value_is_reported_once_and_the_rest_of_its_line_still_counts() -> None:
    text = (
        'defaults angle=5" distance=2mm\n'
        "angle A B C 60:00:00\nangle B C A 60:00:00\nangle C A B 60:00:00\n"
        "distance A B 94.34\n"
    )
    issue = only_issue(text)
    assert (issue.line, issue.token) == (1, 'angle=5"')
    assert "5sec" in issue.message
    # the fix suggested is accepted, and distance=2mm on the same line was read all along
    book = parse(text.replace('5"', "5sec"))
    assert [o.sigma.constant for o in book.observations[:3]] == [pytest.approx(5 * ARCSEC)] * 3
    assert book.observations[3].sigma.constant == pytest.approx(0.002)


@pytest.mark.parametrize(
    "defaults_line",
    [
        "defaults angel=5sec",  # a misspelt kind
        "defaults angle 5sec",  # no '='
        'defaults angle=5sec note="no end',  # a line that cannot be split into tokens
        "defaults angle=5",  # no unit
    ],
)
def test_a_broken_defaults_line_is_the_only_error_for_the_kinds_it_meant_to_set(
    defaults_line: str,
) -> None:
    issue = only_issue(f"{defaults_line}\n" + "angle A B C 1:00:00\n" * 4)
    assert issue.line == 1


def test_a_kind_the_broken_defaults_line_did_not_name_is_still_reported() -> None:
    issues = issues_of("defaults angel=5sec\nangle A B C 1:00:00\ndistance A B 10\n")
    assert [i.line for i in issues] == [1, 3]
    assert "no standard deviation for this distance" in issues[1].message


@pytest.mark.parametrize(
    ("text", "dms", "degrees"),
    [
        ("291.1650", "291:16:50", 291 + 16 / 60 + 50 / 3600),
        ("87.143155", "87:14:31.55", 87 + 14 / 60 + 31.55 / 3600),
        ("-5.0730", "-5:07:30", -(5 + 7 / 60 + 30 / 3600)),
        ("90", "90:00:00", 90.0),
    ],
)
def test_a_decimal_number_in_a_dms_file_is_offered_as_d_m_s(
    text: str, dms: str, degrees: float
) -> None:
    issue = only_issue(ALL_DEFAULTS + f"azimuth A B {text}\n")
    assert (issue.line, issue.token) == (2, text)
    assert f"write {dms}" in issue.message
    assert "deg" not in issue.message
    # the suggestion is the angle that D.MMSS means (degrees + minutes/60 + seconds/3600)
    assert single(f"azimuth A B {dms}\n").value == pytest.approx(
        math.radians(degrees) % (2 * math.pi), abs=1e-12
    )


@pytest.mark.parametrize("text", ["12.5", "291.7650", "291.1575", "400.1010", "1e2"])
def test_a_number_that_cannot_be_d_mm_ss_gets_no_d_m_s_guess(text: str) -> None:
    issue = only_issue(ALL_DEFAULTS + f"azimuth A B {text}\n")
    assert "is not in D:M:S" in issue.message
    assert not re.search(r"\d+:\d\d:\d\d", issue.message)


def test_an_angle_with_degree_minute_and_second_marks_is_offered_as_d_m_s() -> None:
    issue = only_issue(ALL_DEFAULTS + "azimuth A B 12°34'5.5\"\n")
    assert issue.line == 2
    assert "12:34:05.5" in issue.message


LEVEL_RUN = """\
defaults level=1mm/sqrtkm
point BM-21 height=100.000 fix
point BM-30 height=101.000 fix
level BM-21 TP1 +0.400 len=0.3km
level TP1 TP2 +0.300 len=0.3km
level TP2 BM-30 +0.301 len=0.3km
"""


def _near_misses(book: Fieldbook) -> list[Issue]:
    return [w for w in book.warnings if "did you mean" in w.message]


@pytest.mark.parametrize(
    ("name", "meant"),
    [
        ("BM-12", "BM-21"),
        ("bm-21", "BM-21"),
        ("BM21", "BM-21"),
        ("BM_21", "BM-21"),
        ("BMM-21", "BM-21"),
        ("BM-3O", "BM-30"),
        ("BM-2l", "BM-21"),
    ],
)
def test_a_point_named_once_like_a_declared_one_gets_a_did_you_mean(name: str, meant: str) -> None:
    book = parse(LEVEL_RUN + f"level TP2 {name} +0.500 len=0.2km\n")
    (warning,) = _near_misses(book)
    assert (warning.line, warning.token) == (7, name)
    assert f"did you mean '{meant}'" in warning.message
    assert len(book.observations) == 4  # a warning: the observation is kept


def test_every_close_declared_name_is_offered() -> None:
    book = parse(LEVEL_RUN.replace("BM-30", "BM12") + "level TP2 BM-12 +0.500 len=0.2km\n")
    (warning,) = _near_misses(book)
    assert "'BM-21' (declared on line 2) or 'BM12' (declared on line 3)" in warning.message


@pytest.mark.parametrize(
    "extra",
    [
        # a turning point read forward and back is named twice, however close its name is
        "level TP2 BM-12 +0.500 len=0.2km\nlevel BM-12 BM-30 -0.199 len=0.2km\n",
        # another number of a series, not a slip
        "level TP2 BM-22 +0.500 len=0.2km\n",
        "level TP2 BM-210 +0.500 len=0.2km\n",
        # far from any declared name
        "level TP2 NEW-7 +0.500 len=0.2km\n",
    ],
)
def test_no_did_you_mean_for_turning_points_series_numbers_and_unrelated_names(
    extra: str,
) -> None:
    assert _near_misses(parse(LEVEL_RUN + extra)) == []


def test_the_turning_points_of_a_run_get_no_warning_even_with_names_like_declared_ones() -> None:
    text = LEVEL_RUN.replace("TP1", "BM-12").replace("TP2", "BM-03")
    assert parse(text).warnings == ()


def test_the_did_you_mean_warning_reaches_the_result() -> None:
    from server.pipeline import adjust_fieldbook

    result = adjust_fieldbook(LEVEL_RUN + "level TP2 BM-12 +0.500 len=0.2km\n", source="run.fb")
    assert any(
        w.startswith("run.fb:7: point BM-12") and "did you mean 'BM-21'" in w
        for w in result.warnings
    )
