"""Traverse closures before adjustment (``server/model/traverse.py``) and
``tolerance angular= ratio=``.

Outside references used here:

* Purdue University, ASM 215 course notes, traverse closure example:
  misclosure in latitude −0.71 ft and in departure +0.53 ft over a perimeter
  of 2466.05 ft give a linear misclosure of 0.89 ft and a precision of
  1 : 2771 (with the unrounded 0.883 ft, 1 : 2792).
* Washington Administrative Code WAC 332-130-090: a traverse closes within
  1 : 10,000 with an angular closure of 10″·√n, or within 1 : 5,000 with
  30″·√n (n the number of angle stations).
* Plane geometry: the interior angles of an n-sided polygon sum to
  (n − 2)·180°, the exterior ones to (n + 2)·180°.
"""

from __future__ import annotations

import itertools
import math

import pytest

from server.errors import FieldbookError
from server.fieldbook.parser import parse_fieldbook
from server.model.traverse import closure, traverse_misclosures
from server.pipeline import adjust_parsed
from server.units import ARCSEC_PER_RAD

FT = 0.3048


def _dms(degrees: float) -> str:
    """Decimal degrees as D:M:S with 0.01″ (enough for these checks)."""
    total = round(degrees * 360000.0)
    d, rest = divmod(total, 360000)
    m, s = divmod(rest, 6000)
    return f"{d}:{m:02d}:{s / 100:05.2f}"


# ---------------------------------------------------------------- the published closure

# A four-legged loop whose latitudes sum to −0.71 ft and departures to +0.53 ft
# over 2466.05 ft (north 600, east 632.935, south 600.71, west 632.405).
PURDUE_LEGS_FT = [(0.0, 600.0), (90.0, 632.935), (180.0, 600.71), (270.0, 632.405)]


def test_published_closure_from_latitudes_and_departures() -> None:
    azimuths = [math.radians(a) for a, _ in PURDUE_LEGS_FT]
    fit = closure(azimuths, [d for _, d in PURDUE_LEGS_FT], (0.0, 0.0), (0.0, 0.0))
    assert fit.misclosure_north == pytest.approx(-0.71, abs=1e-9)
    assert fit.misclosure_east == pytest.approx(0.53, abs=1e-9)
    assert fit.length == pytest.approx(2466.05, abs=1e-9)
    assert round(fit.linear, 2) == 0.89  # Purdue ASM 215: 0.89 ft
    assert round(fit.length / round(fit.linear, 2)) == 2771  # Purdue ASM 215: 1 : 2771


def test_published_ratio_with_the_unrounded_misclosure() -> None:
    # latitude −0.707, departure +0.529 → 0.883 ft, which the course turns into 1 : 2792
    fit = closure([0.0, math.pi], [1233.025 - 0.707, 1233.025], (0.0, 0.0), (0.529, 0.0))
    fit = type(fit)(0.529, -0.707, 2466.05)
    assert round(fit.linear, 3) == 0.883
    assert math.floor(fit.ratio) == 2792  # Purdue ASM 215: 1 : 2792


def _purdue_fieldbook(tolerance: str = "", error_sec: float = 0.0) -> str:
    """The published loop run from fixed A (backsight BS due west) and closed on A and BS."""
    return f"""fieldbook 1
units length=ft angle=dms
{tolerance}
defaults angle=3sec distance=0.01ft
point A  east=1000 north=5000 fix
point BS east=0 north=5000 fix
angle BS A B 90:00:00
distance A B 600.0
angle A B C 270:00:{error_sec:05.2f}
distance B C 632.935
angle B C D 270:00:00
distance C D 600.71
angle C D A 270:00:00
distance D A 632.405
angle D A BS 180:00:00
"""


def test_published_closure_as_a_field_book_traverse() -> None:
    [entry] = traverse_misclosures(parse_fieldbook(_purdue_fieldbook()))
    assert entry.kind == "traverse"
    assert entry.points == ("A", "B", "C", "D", "A")
    assert entry.angle_stations == 5
    assert entry.angular == pytest.approx(0.0, abs=1e-9)
    assert entry.misclosure_north / FT == pytest.approx(-0.71, abs=1e-6)
    assert entry.misclosure_east / FT == pytest.approx(0.53, abs=1e-6)
    assert entry.length / FT == pytest.approx(2466.05, abs=1e-6)
    assert round(entry.misclosure / FT, 2) == 0.89
    assert entry.exceeds is False  # no allowance stated


# ---------------------------------------------------------------- WAC 332-130-090 presets

WAC_STRICT = "tolerance angular=10sec/sqrtn ratio=1:10000"
WAC_PLAIN = "tolerance angular=30sec/sqrtn ratio=1:5000"


def test_wac_allowances_read_from_the_tolerance_line() -> None:
    strict = parse_fieldbook(_purdue_fieldbook(WAC_STRICT)).traverse_tolerance
    plain = parse_fieldbook(_purdue_fieldbook(WAC_PLAIN)).traverse_tolerance
    assert strict.angular_per_sqrtn * ARCSEC_PER_RAD == pytest.approx(10.0)
    assert strict.ratio == 10000.0
    assert plain.angular_per_sqrtn * ARCSEC_PER_RAD == pytest.approx(30.0)
    assert plain.ratio == 5000.0
    mgon = parse_fieldbook(_purdue_fieldbook("tolerance angular=3mgon/sqrtn")).traverse_tolerance
    assert mgon.angular_per_sqrtn == pytest.approx(3e-3 * math.pi / 200.0)
    assert mgon.ratio is None


@pytest.mark.parametrize(
    ("tolerance", "error_sec", "angular_exceeds"),
    [(WAC_STRICT, 30.0, True), (WAC_PLAIN, 30.0, False), (WAC_STRICT, 20.0, False)],
)
def test_wac_angular_allowance_is_k_root_n(
    tolerance: str, error_sec: float, angular_exceeds: bool
) -> None:
    # 5 angle stations: 10″·√5 = 22.4″ and 30″·√5 = 67.1″ (WAC 332-130-090)
    [entry] = traverse_misclosures(parse_fieldbook(_purdue_fieldbook(tolerance, error_sec)))
    k = 10.0 if tolerance == WAC_STRICT else 30.0
    assert entry.angular_allowed * ARCSEC_PER_RAD == pytest.approx(k * math.sqrt(5))
    assert entry.angular * ARCSEC_PER_RAD == pytest.approx(error_sec, abs=1e-6)
    # the published loop misses 1 : 5000 as well (1 : 2783), so the linear part always fails
    assert entry.allowed / FT == pytest.approx(2466.05 / (10000 if k == 10.0 else 5000))
    assert entry.exceeds is True
    assert (abs(entry.angular) > entry.angular_allowed) is angular_exceeds


def test_a_good_traverse_passes_the_plain_allowance_but_not_the_strict_one() -> None:
    # shorten the south leg so the loop misses by 0.35 ft: 2466.05 / 0.35 = 1 : 7046
    text = _purdue_fieldbook(WAC_PLAIN).replace("600.71", "600.35").replace("632.405", "632.935")
    [plain] = traverse_misclosures(parse_fieldbook(text))
    [strict] = traverse_misclosures(parse_fieldbook(text.replace(WAC_PLAIN, WAC_STRICT)))
    assert plain.ratio == pytest.approx((600 + 632.935 * 2 + 600.35) / 0.35)
    assert plain.exceeds is False
    assert strict.exceeds is True


# ---------------------------------------------------------------- polygons closed on themselves


def _square(reverse: bool, error_sec: float) -> str:
    """A 100 m square of free stations; run counterclockwise the angles are interior."""
    corners = {"P1": (0.0, 0.0), "P2": (100.0, 0.0), "P3": (100.0, 100.0), "P4": (0.0, 100.0)}
    names = list(corners)[::-1] if reverse else list(corners)
    lines = ["fieldbook 1", "units length=m angle=dms", "defaults angle=1sec distance=1mm"]
    for i, at in enumerate(names):
        back, fore = names[i - 1], names[(i + 1) % 4]
        az = {
            name: math.degrees(
                math.atan2(corners[name][0] - corners[at][0], corners[name][1] - corners[at][1])
            )
            for name in (back, fore)
        }
        angle = (az[fore] - az[back]) % 360.0 + error_sec / 4 / 3600.0  # the same error at each
        lines.append(f"angle {back} {at} {fore} {_dms(angle)}")
        lines.append(f"distance {at} {fore} 100.000")
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("reverse", [False, True])
def test_closed_polygon_angle_sum(reverse: bool) -> None:
    fb = parse_fieldbook(_square(reverse, 12.0))
    angles = [o.value for o in fb.observations if o.kind == "angle"]
    # interior angles sum to (4 − 2)·180°, exterior ones to (4 + 2)·180°
    expected = (4 + 2 if reverse else 4 - 2) * math.pi
    assert sum(angles) - expected == pytest.approx(12.0 / ARCSEC_PER_RAD, abs=1e-9)
    [entry] = traverse_misclosures(fb)
    assert entry.points[0] == entry.points[-1]
    assert len(entry.points) == 5
    assert entry.angle_stations == 4
    assert entry.angular * ARCSEC_PER_RAD == pytest.approx(12.0, abs=1e-6)
    # 3″ too much at every corner is balanced out exactly, so the square closes to the micrometre
    assert entry.misclosure < 1e-6
    assert entry.length == pytest.approx(400.0)


# ------------------------------------------------------------ link traverse between fixed points

LINK = {
    "S": (2000.0, 1000.0),
    "R": (2000.0, 1500.0),
    "P1": (2150.0, 1080.0),
    "P2": (2330.0, 1040.0),
    "E": (2480.0, 1120.0),
    "F": (2700.0, 1400.0),
}


def _azimuth(a: str, b: str) -> float:
    (ea, na), (eb, nb) = LINK[a], LINK[b]
    return math.degrees(math.atan2(eb - ea, nb - na)) % 360.0


def _link_fieldbook(
    angle_error_sec: float = 0.0, distance_error: float = 0.0, closing: str = "angle"
) -> str:
    route = ["R", "S", "P1", "P2", "E", "F"]
    lines = [
        "fieldbook 1",
        "units length=m angle=dms",
        "defaults angle=2sec distance=2mm azimuth=2sec",
    ]
    for name in ("S", "R", "E", "F"):
        lines.append(f"point {name} east={LINK[name][0]} north={LINK[name][1]} fix")
    for i in range(1, 5):
        back, at, fore = route[i - 1], route[i], route[i + 1]
        if at == "E" and closing != "angle":
            continue
        angle = (_azimuth(at, fore) - _azimuth(at, back)) % 360.0
        angle += angle_error_sec / 3600.0 if at == "P1" else 0.0
        lines.append(f"angle {back} {at} {fore} {_dms(angle)}")
    for a, b in (("S", "P1"), ("P1", "P2"), ("P2", "E")):
        (ea, na), (eb, nb) = LINK[a], LINK[b]
        extra = distance_error if a == "P1" else 0.0
        lines.append(f"distance {a} {b} {math.hypot(eb - ea, nb - na) + extra:.6f}")
    if closing == "azimuth":
        lines.append(f"azimuth P2 E {_dms(_azimuth('P2', 'E'))}")
    return "\n".join(lines) + "\n"


def test_link_traverse_angular_misclosure_against_the_closing_azimuth() -> None:
    [entry] = traverse_misclosures(parse_fieldbook(_link_fieldbook(angle_error_sec=6.0)))
    assert entry.points == ("S", "P1", "P2", "E")
    assert entry.angle_stations == 4  # at S (from R), P1, P2 and E (to F)
    assert entry.angular * ARCSEC_PER_RAD == pytest.approx(6.0, abs=0.02)  # D:M:S booked to 0.01″


def test_link_traverse_linear_misclosure_is_the_distance_error_along_its_leg() -> None:
    [entry] = traverse_misclosures(parse_fieldbook(_link_fieldbook(distance_error=0.05)))
    leg = math.radians(_azimuth("P1", "P2"))
    assert entry.angular * ARCSEC_PER_RAD == pytest.approx(0.0, abs=0.02)
    assert entry.misclosure == pytest.approx(0.05, abs=2e-5)
    assert entry.misclosure_east == pytest.approx(0.05 * math.sin(leg), abs=2e-5)
    assert entry.misclosure_north == pytest.approx(0.05 * math.cos(leg), abs=2e-5)
    legs = sum(math.dist(LINK[a], LINK[b]) for a, b in (("S", "P1"), ("P1", "P2"), ("P2", "E")))
    assert entry.length == pytest.approx(legs + 0.05, abs=1e-6)


def test_link_traverse_closed_by_an_observed_azimuth_of_the_last_leg() -> None:
    [entry] = traverse_misclosures(
        parse_fieldbook(_link_fieldbook(angle_error_sec=-8.0, closing="azimuth"))
    )
    assert entry.angle_stations == 3  # S, P1, P2: the azimuth is not an angle station
    assert entry.angular * ARCSEC_PER_RAD == pytest.approx(-8.0, abs=0.02)


def test_link_traverse_without_a_closing_orientation_has_only_the_linear_part() -> None:
    text = "\n".join(
        line
        for line in _link_fieldbook(distance_error=0.02).splitlines()
        if not line.startswith("angle P2 E F")
    )
    [entry] = traverse_misclosures(parse_fieldbook(text))
    assert entry.angular is None
    assert entry.misclosure == pytest.approx(0.02, abs=2e-5)


# ---------------------------------------------------------------- JSON and the demo


def adjust_text(text: str):
    return adjust_parsed(parse_fieldbook(text))  # the pipeline as the CLI runs it


def test_result_json_keys_for_a_traverse() -> None:
    result = adjust_text(_purdue_fieldbook(WAC_STRICT))
    [entry] = [m for m in result.to_json_dict()["misclosures"] if m["kind"] == "traverse"]
    assert entry["angular_misclosure"] == pytest.approx(0.0, abs=1e-6)
    assert entry["angular_allowed"] == pytest.approx(10.0 * math.sqrt(5))
    assert entry["angle_stations"] == 5
    assert entry["misclosure_north"] == pytest.approx(-0.71, abs=1e-6)  # feet, as the file
    assert entry["ratio_allowed"] == 10000
    assert entry["allowed"] == pytest.approx(0.246605)
    assert entry["exceeds"] is True  # 1 : 2783 misses 1 : 10,000
    assert entry["ratio"] == pytest.approx(entry["length"] / entry["misclosure"])


def test_demo_closed_traverse_gains_its_traverse_entry() -> None:
    from pathlib import Path

    text = (
        Path(__file__).parent.parent / "demo_projects" / "closed_traverse.fieldbook"
    ).read_text()
    data = adjust_text(text).to_json_dict()
    [entry] = data["misclosures"]
    assert entry["kind"] == "traverse"
    assert entry["points"][0] == "MON-3" and entry["points"][-1] == "MON-4"
    assert entry["angle_stations"] == 12
    # an ordinary clean traverse: a few seconds and far better than 1 : 10,000
    assert abs(entry["angular_misclosure"]) < 10.0
    assert entry["ratio"] > 10000


# ---------------------------------------------------------------- bad syntax


@pytest.mark.parametrize(
    ("option", "words"),
    [
        ("angular=10sec", "10sec/sqrtn"),
        ("angular=10mm/sqrtn", "sec or mgon"),
        ("angular=7200sec/sqrtn", "not plausible"),
        ("ratio=10000", "1:N"),
        ("ratio=1:abc", "1:N"),
        ("ratio=2:10000", "1:N"),
        ("ratio=1:0", "between 1 and"),
    ],
)
def test_bad_traverse_tolerance_names_the_line(option: str, words: str) -> None:
    text = _purdue_fieldbook(f"tolerance {option}")
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    [issue] = caught.value.issues
    assert issue.line == 3
    assert words in issue.message


def test_unknown_tolerance_option_lists_the_new_ones() -> None:
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(_purdue_fieldbook("tolerance angualr=10sec/sqrtn"))
    [issue] = caught.value.issues
    assert issue.line == 3
    assert "angular" in issue.message


def test_stored_result_keeps_the_traverse_figures() -> None:

    from server.store.sqlite import _result_from_detail

    result = adjust_text(_purdue_fieldbook(WAC_PLAIN))
    again = _result_from_detail(result.detail_dict())
    assert again.misclosures == result.misclosures
    assert again.to_json_dict()["misclosures"] == result.to_json_dict()["misclosures"]


def test_reports_show_the_traverse_closure() -> None:
    from server.report.html import report_html
    from server.report.text import report_text

    result = adjust_text(_purdue_fieldbook(WAC_PLAIN))
    text = report_text(result)
    assert "Traverse closures before adjustment" in text
    assert "1 : 2,783" in text  # 2466.05 / 0.886, rounded down
    assert "1 : 5,000" in text
    html = report_html(result)
    assert "Traverse closures before adjustment" in html
    assert "✕ exceeds" in html


def test_a_traverse_of_1500_stations_is_closed_without_running_out_of_stack() -> None:
    # a straight line east with every angle 180°: the closure is exact, so any error
    # would be in the bookkeeping; 1500 stations is deeper than Python's recursion limit
    stations = ["S", *(f"T{i}" for i in range(1, 1500)), "E"]
    lines = [
        "fieldbook 1",
        "units length=m angle=dms",
        "defaults angle=1sec distance=1mm",
        "point R east=-100 north=0 fix",
        "point S east=0 north=0 fix",
        f"point E east={100 * (len(stations) - 1)} north=0 fix",
        f"point F east={100 * len(stations)} north=0 fix",
    ]
    route = ["R", *stations, "F"]
    for back, at, fore in zip(route, route[1:], route[2:]):
        lines.append(f"angle {back} {at} {fore} 180:00:00")
    for a, b in itertools.pairwise(stations):
        lines.append(f"distance {a} {b} 100.000")
    [entry] = traverse_misclosures(parse_fieldbook("\n".join(lines) + "\n"))
    assert entry.points[0] == "S" and entry.points[-1] == "E"
    assert entry.angle_stations == len(stations)
    assert entry.angular == pytest.approx(0.0, abs=1e-9)
    assert entry.misclosure < 1e-6
