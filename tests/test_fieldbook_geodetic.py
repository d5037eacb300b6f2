"""The field book side of the geodetic 3D model: crs, geoid, refraction, epoch, points by
latitude and longitude, baselines with their covariance, planned values, and the rule that
3D statements need a crs line.

Unit factors are checked against their definitions, not against the code: the
international foot is 0.3048 m exactly and the US survey foot 1200/3937 m (NIST; the
1959 notice in the US Federal Register on the yard and the pound, 24 FR 5348, which kept
1200/3937 m for the survey foot; docs/references.md "Units" gives the status of each).
1 gon = π/200 rad (ISO 80000-3). The positive-definiteness of a baseline's correlations is
held against numpy's Cholesky factorization, an independent test of the same property.
"""

from __future__ import annotations

import math
import subprocess
import sys
from datetime import UTC, date, datetime
from pathlib import Path

import numpy as np
import pyproj
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from server.errors import FieldbookError, Issue
from server.fieldbook import parser as parser_module
from server.fieldbook.baselines import MIN_CORRELATION_DETERMINANT
from server.fieldbook.edits import ObservationEdit, apply_edits, booked_value
from server.fieldbook.model import DEFAULT_REFRACTION, Fieldbook, Observation
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from tests.hypothesis_profiles import examples

ROOT = Path(__file__).resolve().parents[1]
FOOT_M = 0.3048  # exact, by definition
US_FOOT_M = 1200.0 / 3937.0  # exact, by definition
DEG = math.pi / 180.0
GON = math.pi / 200.0
CRS = "crs EPSG:32633\n"

#: An invented GNSS control job on a site grid (the manual shows it with standard deviations
#: that match its noise; here the processor's figures are scaled by 3).
#: The vectors were made from the marks' latitudes, longitudes and heights on GRS80 with
#: N = -23.84 m and a few millimetres of noise added, so they agree as real ones would.
HARBOR_HILL = """\
fieldbook 1
title "Harbor Hill - GNSS control on a site grid"
units length=m angle=dms
crs local lat=47:03:00 lon=-122:53:30 east=5000m north=5000m
geoid undulation=-23.84m
epoch 2026-03-14T18:20Z
defaults baseline=4mm centering=1mm
scale baseline=3

point RIDGE lat=47:03:12.48731 lon=-122:54:08.11902 height=142.318 fix
point CEDAR lat=47:04:01.22518 lon=-122:52:47.60374 height=118.902 fix
point FERRY lat=47:02:20.90142 lon=-122:52:31.44055 height=61.447 fix

baseline RIDGE CEDAR +2033.7831 +15.9119 +1008.1797 sd=1.8mm,1.1mm,2.4mm corr=0.21,-0.43,-0.18
baseline RIDGE FERRY +1110.4684 -2040.9608 -1144.7031 sd=2.1mm,1.6mm,2.9mm corr=0.18,-0.51,-0.22
baseline CEDAR FERRY -923.3142 -2056.8731 -2152.8806 sd=2.0mm,1.4mm,2.6mm corr=0.25,-0.47,-0.20
baseline RIDGE K-7 +1212.3638 +8.4031 +554.7086
baseline CEDAR K-7 -821.4187 -7.5079 -453.4719
baseline FERRY K-7 +101.8934 +2049.3660 +1699.4097 note="second session"
"""


def parse(text: str) -> Fieldbook:
    return parse_fieldbook(text, source="job.fieldbook")


def issues_of(text: str) -> tuple[Issue, ...]:
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    return caught.value.issues


def only_issue(text: str) -> Issue:
    issues = issues_of(text)
    assert len(issues) == 1, "\n".join(map(str, issues))
    return issues[0]


def baselines(book: Fieldbook) -> list[Observation]:
    return [o for o in book.observations if o.kind == "baseline"]


# --------------------------------------------------------------------------- the header


def test_the_example_job_reads_every_geodetic_statement_into_si() -> None:
    book = parse(HARBOR_HILL)
    crs = book.crs
    assert crs is not None and crs.local and crs.epsg is None
    assert crs.line == 4
    assert crs.text == "local lat=47:03:00 lon=-122:53:30 east=5000m north=5000m"
    assert crs.latitude == pytest.approx((47 + 3 / 60) * DEG, abs=1e-15)
    assert crs.longitude == pytest.approx(-(122 + 53 / 60 + 30 / 3600) * DEG, abs=1e-15)
    assert (crs.false_east, crs.false_north) == (5000.0, 5000.0)
    assert book.geoid_undulation == -23.84
    assert book.refraction == DEFAULT_REFRACTION == 0.13
    assert book.epoch == datetime(2026, 3, 14, 18, 20, tzinfo=UTC)
    ridge = book.points[0]
    assert (ridge.east, ridge.north) == (None, None)
    assert ridge.latitude == pytest.approx((47 + 3 / 60 + 12.48731 / 3600) * DEG, abs=1e-15)
    assert ridge.longitude == pytest.approx(-(122 + 54 / 60 + 8.11902 / 3600) * DEG, abs=1e-15)
    assert (ridge.height, ridge.fixed) == (142.318, "enh")
    assert len(baselines(book)) == 6
    assert baselines(book)[-1].note == "second session"


@pytest.mark.parametrize(
    ("text", "code"),
    [("EPSG:32633", 32633), ("epsg:6447", 6447), ("Epsg:2193", 2193), ("EPSG:4326", 4326)],
)
def test_crs_by_epsg_code_keeps_the_code_and_the_canonical_text(text: str, code: int) -> None:
    book = parse(f"crs {text}\ndefaults distance=2mm\ndistance A B 10\n")
    assert book.crs is not None
    assert (book.crs.epsg, book.crs.text, book.crs.local) == (code, f"EPSG:{code}", False)


@pytest.mark.parametrize(
    ("units", "lat", "lon", "lat_rad", "lon_rad"),
    [
        (
            "angle=dms",
            "-33:52:04.5",
            "151:12:36",
            -(33 + 52 / 60 + 4.5 / 3600) * DEG,
            (151 + 12 / 60 + 36 / 3600) * DEG,
        ),
        ("angle=dms", "-0:30:00", "-0:15:00", -0.5 * DEG, -0.25 * DEG),
        ("angle=deg", "47.05", "-122.8916667", 47.05 * DEG, -122.8916667 * DEG),
        ("angle=gon", "52.2777778", "-136.5462963", 52.2777778 * GON, -136.5462963 * GON),
        ("angle=dms", "47.05deg", "-136.5462963gon", 47.05 * DEG, -136.5462963 * GON),
    ],
)
def test_crs_local_reads_its_origin_in_the_files_angle_unit(
    units: str, lat: str, lon: str, lat_rad: float, lon_rad: float
) -> None:
    book = parse(
        f"units {units}\ncrs local lat={lat} lon={lon}\ndefaults distance=2mm\ndistance A B 10\n"
    )
    assert book.crs is not None and book.crs.local
    assert book.crs.latitude == pytest.approx(lat_rad, abs=1e-15)
    assert book.crs.longitude == pytest.approx(lon_rad, abs=1e-15)
    assert (book.crs.false_east, book.crs.false_north) == (0.0, 0.0)  # the default origin


@pytest.mark.parametrize(
    ("written", "metres"),
    [
        ("5000m", 5000.0),
        ("16404.2ft", 16404.2 * FOOT_M),
        ("16404.2usft", 16404.2 * US_FOOT_M),
        ("2.5km", 2500.0),
    ],
)
def test_the_false_origin_of_a_site_grid_is_a_length_with_its_unit(
    written: str, metres: float
) -> None:
    book = parse(
        f"units length=usft\ncrs local lat=10:00:00 lon=20:00:00 east={written} "
        f"north={written}\ndefaults distance=2mm\ndistance A B 10\n"
    )
    assert book.crs is not None
    assert book.crs.false_east == pytest.approx(metres, rel=1e-15)
    assert book.crs.false_north == pytest.approx(metres, rel=1e-15)


@pytest.mark.parametrize(
    ("written", "metres"),
    [
        ("-28.41m", -28.41),
        ("-93.2ft", -93.2 * FOOT_M),
        ("-93.2usft", -93.2 * US_FOOT_M),
        ("12cm", 0.12),
        ("0m", 0.0),
    ],
)
def test_geoid_undulation_in_any_length_unit(written: str, metres: float) -> None:
    book = parse(f"geoid undulation={written}\npoint A height=1 geoid={written}\n")
    assert book.geoid_undulation == pytest.approx(metres, rel=1e-15, abs=0)
    assert book.points[0].geoid == pytest.approx(metres, rel=1e-15, abs=0)


def test_without_geoid_statements_the_undulation_is_left_unset() -> None:
    book = parse("point A height=1\n")
    assert book.geoid_undulation is None and book.points[0].geoid is None
    assert book.crs is None and book.epoch is None
    assert book.refraction == 0.13


@pytest.mark.parametrize("k", ["0", "0.13", "-0.5", "1", "-1", "0.07"])
def test_refraction_coefficient_within_the_plausible_range(k: str) -> None:
    assert parse(f"refraction k={k}\npoint A height=1\n").refraction == float(k)


@pytest.mark.parametrize(
    ("text", "expected"),
    [
        ("2026-03-14", date(2026, 3, 14)),
        ("2024-02-29", date(2024, 2, 29)),
        ("2026-03-14T10:30Z", datetime(2026, 3, 14, 10, 30, tzinfo=UTC)),
        ("2026-03-14t10:30z", datetime(2026, 3, 14, 10, 30, tzinfo=UTC)),
        ("2026-03-14T10:30:15Z", datetime(2026, 3, 14, 10, 30, 15, tzinfo=UTC)),
        ("2026-03-14T10:30:15.25Z", datetime(2026, 3, 14, 10, 30, 15, 250000, tzinfo=UTC)),
        ("2026-03-14T10:30+00:00", datetime(2026, 3, 14, 10, 30, tzinfo=UTC)),
    ],
)
def test_epoch_is_a_date_or_a_utc_time(text: str, expected: date) -> None:
    epoch = parse(f"epoch {text}\npoint A height=1\n").epoch
    assert epoch == expected and type(epoch) is type(expected)


# --------------------------------------------------------------------------- points


@pytest.mark.parametrize(
    ("units", "lat", "lon", "lat_deg", "lon_deg"),
    [
        ("dms", "-45:00:00", "-180:00:00", -45.0, -180.0),
        ("dms", "90:00:00", "180:00:00", 90.0, 180.0),
        ("deg", "-90", "0.5", -90.0, 0.5),
        ("gon", "100", "-200", 90.0, -180.0),
    ],
)
def test_points_by_latitude_and_longitude_up_to_the_ends_of_their_ranges(
    units: str, lat: str, lon: str, lat_deg: float, lon_deg: float
) -> None:
    book = parse(f"units angle={units}\n{CRS}point P lat={lat} lon={lon} height=5 fix=en\n")
    (point,) = book.points
    assert point.latitude == pytest.approx(lat_deg * DEG, abs=1e-15)
    assert point.longitude == pytest.approx(lon_deg * DEG, abs=1e-15)
    assert abs(point.latitude) <= math.pi / 2 and abs(point.longitude) <= math.pi
    assert (point.east, point.north, point.fixed) == (None, None, "en")


def test_latitude_and_longitude_are_the_horizontal_position_for_fixing_and_weighting() -> None:
    book = parse(
        CRS + "point P lat=10:00:00 lon=20:00:00 height=5 sd_en=2cm fix=h\n"
        "point Q lat=10:00:01 lon=20:00:01 sd=1cm\n"
    )
    p, q = book.points
    assert (p.fixed, p.weighted, p.sd_en) == ("h", "en", pytest.approx(0.02))
    assert (q.fixed, q.weighted, q.sd_en) == ("", "en", pytest.approx(0.01))


# --------------------------------------------------------------------------- baselines


@pytest.mark.parametrize(
    ("unit", "metres_per_unit"),
    [("m", 1.0), ("ft", FOOT_M), ("usft", US_FOOT_M)],
)
def test_baseline_components_are_in_the_files_unit_unless_they_carry_their_own(
    unit: str, metres_per_unit: float
) -> None:
    book = parse(
        f"units length={unit}\n{CRS}defaults baseline=3mm\n"
        "baseline A B 1212.3638 -8.4031 554.7086\n"
        "baseline A C 1212.3638m -8.4031ft 554.7086usft\n"
    )
    plain, suffixed = baselines(book)
    assert plain.baseline is not None and suffixed.baseline is not None
    assert plain.baseline.components == pytest.approx(
        (1212.3638 * metres_per_unit, -8.4031 * metres_per_unit, 554.7086 * metres_per_unit),
        rel=1e-15,
    )
    assert suffixed.baseline.components == pytest.approx(
        (1212.3638, -8.4031 * FOOT_M, 554.7086 * US_FOOT_M), rel=1e-15
    )
    # the value listed for a baseline is its length: |(dx, dy, dz)|
    assert plain.value == pytest.approx(math.hypot(*plain.baseline.components), rel=1e-15)


def test_baseline_covariance_is_s_r_s_with_the_scale_on_the_standard_deviations() -> None:
    book = parse(
        CRS + "scale baseline=2.5\nbaseline A B 100 200 300 sd=2mm,0.01ft,5mm corr=0.1,-0.2,0.3\n"
    )
    (obs,) = baselines(book)
    vector = obs.baseline
    assert vector is not None
    assert vector.sd == pytest.approx((0.002, 0.01 * FOOT_M, 0.005), rel=1e-15)
    assert (vector.correlations, vector.sd_scale) == ((0.1, -0.2, 0.3), 2.5)
    s = np.diag([2.5 * 0.002, 2.5 * 0.01 * FOOT_M, 2.5 * 0.005])
    r = np.array([[1.0, 0.1, -0.2], [0.1, 1.0, 0.3], [-0.2, 0.3, 1.0]])
    np.testing.assert_allclose(np.array(vector.covariance), s @ r @ s, rtol=1e-14)
    np.linalg.cholesky(np.array(vector.covariance))  # positive definite, as promised
    assert obs.sigma.constant == pytest.approx(math.sqrt(np.trace(s @ s) / 3), rel=1e-14)
    assert (obs.scale, obs.booked, obs.planned, obs.ignored) == (1.0, None, False, False)


def test_a_baseline_without_sd_takes_the_default_for_each_component_and_no_correlation() -> None:
    book = parse(
        CRS + "defaults baseline=4mm centering=1.5mm\nbaseline A B 1 2 3\n"
        "baseline A C 1 2 3 corr=0.5,0,0\n"
    )
    plain, correlated = baselines(book)
    assert plain.baseline is not None and correlated.baseline is not None
    assert plain.baseline.sd == (0.004, 0.004, 0.004)
    np.testing.assert_allclose(plain.baseline.covariance, np.eye(3) * 0.004**2, rtol=1e-15)
    assert correlated.baseline.covariance[0][1] == pytest.approx(0.5 * 0.004**2, rel=1e-15)
    assert plain.centering == pytest.approx(0.0015)  # added at each end by the model


def test_each_scale_option_keeps_its_own_value() -> None:
    book = parse(
        CRS + "defaults baseline=2mm distance=2mm\n"
        "scale factor=0.9996\n"
        "scale baseline=3\n"  # the grid factor stays 0.9996
        "distance A B 100\nbaseline A B 1 2 3\n"
        "scale factor=1.0002\n"  # the baseline factor stays 3
        "distance A B 100\nbaseline A B 1 2 3\n"
        "scale factor=1 baseline=1\n"
        "distance A B 100\nbaseline A B 1 2 3\n"
    )
    distances = [o for o in book.observations if o.kind == "distance"]
    assert [d.scale for d in distances] == [0.9996, 1.0002, 1.0]
    scales = [b.baseline.sd_scale for b in baselines(book) if b.baseline is not None]
    assert scales == [3.0, 3.0, 1.0]
    # the baseline factor never touches a baseline's value
    assert {b.value for b in baselines(book)} == {math.sqrt(14.0)}


def test_baseline_flags_notes_and_the_names_of_its_ends() -> None:
    (obs,) = baselines(
        parse(
            CRS + "defaults baseline=3mm\nbaseline P1 P2 1 2 3 ignore "
            'note="session 2, antenna swap"\n'
        )
    )
    assert (obs.from_point, obs.at, obs.to) == ("P1", None, "P2")
    assert obs.ignored and obs.note == "session 2, antenna swap"


# positive definiteness: the parser's Sylvester test against numpy's Cholesky
_CORRELATION = st.floats(min_value=-0.999999, max_value=0.999999, allow_nan=False)


def _cholesky_succeeds(rxy: float, rxz: float, ryz: float) -> bool:
    r = np.array([[1.0, rxy, rxz], [rxy, 1.0, ryz], [rxz, ryz, 1.0]])
    try:
        np.linalg.cholesky(r)
    except np.linalg.LinAlgError:
        return False
    return True


def _accepted(rxy: float, rxz: float, ryz: float) -> bool:
    text = f"{CRS}baseline A B 1 2 3 sd=1mm,1mm,1mm corr={rxy!r},{rxz!r},{ryz!r}\n"
    try:
        parse(text)
    except FieldbookError as exc:
        assert [(i.line, "is not positive definite" in i.message) for i in exc.issues] == [
            (2, True)
        ]
        return False
    return True


@settings(max_examples=examples(300), deadline=None)
@given(_CORRELATION, _CORRELATION, _CORRELATION)
def test_correlations_are_accepted_exactly_when_cholesky_factors_them(
    rxy: float, rxz: float, ryz: float
) -> None:
    eigenvalues = np.linalg.eigvalsh(np.array([[1.0, rxy, rxz], [rxy, 1.0, ryz], [rxz, ryz, 1.0]]))
    # The parser also refuses the numerically singular sliver 0 < det R <= 1e-9 (documented);
    # there and at the rounding edge of det = 0 the two tests may rightly differ.
    if abs(float(np.prod(eigenvalues))) <= 10 * MIN_CORRELATION_DETERMINANT:
        return
    assert _accepted(rxy, rxz, ryz) == _cholesky_succeeds(rxy, rxz, ryz)


@pytest.mark.parametrize(
    ("corr", "positive_definite"),
    [
        ("0.21,-0.43,-0.18", True),
        ("0.9,0.9,0.9", True),  # strongly but consistently correlated
        ("0.9,0.9,-0.9", False),  # X~Y and X~Z strongly, yet Y against Z: impossible
        ("0.7,0.7,-0.1", False),  # det R = 1 - 0.49 - 0.49 - 0.01 - 0.098 < 0
        ("-0.6,-0.6,-0.6", False),  # three mutually anticorrelated: det R = -0.296
        ("0.5,0.5,0.5", True),
    ],
)
def test_worked_correlation_triples_agree_with_cholesky(corr: str, positive_definite: bool) -> None:
    values = [float(v) for v in corr.split(",")]
    assert _cholesky_succeeds(*values) is positive_definite
    assert _accepted(*values) is positive_definite


# --------------------------------------------------------------------------- planned values


def test_planned_values_are_read_with_their_standard_deviation_and_no_value() -> None:
    book = parse(
        CRS + "defaults level=1mm/sqrtkm distance=2mm+2ppm angle=1sec azimuth=2sec "
        "direction=1sec slope=2mm zenith=1sec baseline=3mm\n"
        "level A B ? len=0.4km\ndistance A B ?\nangle A B C ?\nazimuth A B ?\n"
        "slope A B ? hi=1.5m\nzenith A B ?\nbaseline A B ? ? ?\n"
        "directions A\n  B 0:00:00\n  C ?\nend\n"
    )
    planned = [o for o in book.observations if o.planned]
    assert [o.kind for o in planned] == [
        "level",
        "distance",
        "angle",
        "azimuth",
        "slope",
        "zenith",
        "baseline",
        "direction",
    ]
    assert all(math.isnan(o.value) and math.isnan(o.booked) for o in planned)  # type: ignore[arg-type]
    assert planned[0].length_km == pytest.approx(0.4)
    assert planned[1].sigma.ppm == 2.0
    vector = planned[6].baseline
    assert vector is not None and all(math.isnan(c) for c in vector.components)
    assert vector.covariance[2][2] == pytest.approx(0.003**2)
    measured = [o for o in book.observations if not o.planned]
    assert [(o.kind, o.line) for o in measured] == [("direction", 11)]


def test_adjusting_planned_observations_is_an_error_naming_each_line() -> None:
    text = (
        "defaults distance=2mm direction=1sec\npoint A east=0 north=0 fix\n"
        "point B east=100 north=0 fix\ndistance A B ?\ndistance A C 50\n"
        "directions A\n  B 0:00:00\n  C ?\nend\n"
    )
    with pytest.raises(FieldbookError) as caught:
        adjust_fieldbook(text, source="plan.fieldbook")
    assert [issue.line for issue in caught.value.issues] == [4, 8]
    assert str(caught.value).startswith("plan.fieldbook:4: '?' marks a planned observation")


# --------------------------------------------------------------------------- not adjusted yet


def test_the_gnss_control_book_adjusts_in_the_geodetic_model() -> None:
    """The baselines place K-7 from three held marks; its grid position must sit where the
    vectors put it (within the millimetres of noise the invented job carries), and the
    held marks keep their given heights."""
    result = adjust_fieldbook(HARBOR_HILL)
    points = {p.name: p for p in result.points}
    assert points["RIDGE"].height == pytest.approx(142.318)
    k7 = points["K-7"]
    assert k7.sd_east is not None and 0.0 < k7.sd_east < 0.01
    assert result.summary.used_observations == 18  # a baseline counts as three
    assert result.summary.converged


def test_ignored_3d_lines_stay_in_the_book_and_the_rest_adjusts() -> None:
    text = (
        CRS + "defaults level=1mm/sqrtkm baseline=3mm slope=2mm\npoint A height=10 fix\n"
        "level A B 1.0 len=1km\nlevel B A -1.002 len=1km\n"
        "baseline A B 1 2 3 ignore\nslope A B 3.8 ignore\n"
    )
    result = adjust_fieldbook(text)
    assert result.to_json_dict()["summary"]["used_observations"] == 2


def test_a_point_given_by_latitude_and_longitude_is_placed_on_the_grid() -> None:
    """A plane file with a crs line may give control by lat/lon: it is projected through
    pyproj (the reference library) before the plane adjustment."""
    text = (
        CRS + "defaults distance=2mm\npoint A lat=45:00:00 lon=15:00:00 fix\n"
        "point B east=500100 north=4982950 fix\ndistance A C 60\ndistance B C 60\n"
        "distance A B 100.000\npoint C east=500050 north=4982990\n"
    )
    result = adjust_fieldbook(text)
    a = next(p for p in result.points if p.name == "A")
    east, north = pyproj.Transformer.from_crs(4326, 32633, always_xy=True).transform(15.0, 45.0)
    assert (a.east, a.north) == (pytest.approx(east, abs=1e-6), pytest.approx(north, abs=1e-6))


def test_the_command_line_adjusts_a_geodetic_book(tmp_path: Path) -> None:
    book = tmp_path / "harbor.fieldbook"
    book.write_text(HARBOR_HILL, encoding="utf-8")
    proc = subprocess.run(
        [sys.executable, "-m", "server", "adjust", str(book), "--json"],
        cwd=ROOT,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )
    assert proc.returncode == 0, proc.stderr
    assert '"K-7"' in proc.stdout and "Traceback" not in proc.stderr


# --------------------------------------------------------------------------- the crs rule


@pytest.mark.parametrize(
    "kind_line",
    ["slope A B 100", "zenith A B 90:00:00", "baseline A B 1 2 3", "baseline A B 1 2 3 ignore"],
)
def test_a_3d_statement_without_crs_is_an_error_on_the_first_one_showing_both_forms(
    kind_line: str,
) -> None:
    text = (
        "defaults slope=2mm zenith=1sec baseline=3mm distance=2mm\n"
        f"distance A B 10\n{kind_line}\n{kind_line}\nzenith A B 90:00:00\n"
    )
    issue = only_issue(text)
    assert (issue.line, issue.token) == (3, kind_line.split()[0])
    assert "needs a 'crs' line" in issue.message
    assert "crs EPSG:CODE" in issue.message and "crs local lat=LAT lon=LON" in issue.message


def test_a_crs_line_in_a_plane_file_is_allowed_and_adjusts_as_before() -> None:
    plain = (
        "defaults level=1mm/sqrtkm\npoint A height=10 fix\nlevel A B 1 len=1km\n"
        "level B A -1.001 len=1km\n"
    )
    with_crs = CRS + plain
    before = adjust_fieldbook(plain).to_json_dict()
    after = adjust_fieldbook(with_crs).to_json_dict()
    added = {"latitude", "longitude", "ellipsoidal_height", "geoid", "scale_factor", "convergence"}
    for old, new in zip(before["points"], after["points"], strict=True):
        assert {k: v for k, v in new.items() if k not in added} == old
        assert new["latitude"] is None  # a height alone has no place on the grid


def test_a_wrong_crs_line_is_reported_once_not_again_at_the_3d_lines() -> None:
    issue = only_issue("crs EPSG:UTM33\ndefaults slope=2mm\nslope A B 10\n")
    assert (issue.line, issue.token) == (1, "EPSG:UTM33")


def test_a_crs_after_the_first_point_is_reported_where_it_stands() -> None:
    issue = only_issue("defaults slope=2mm\npoint A east=1 north=2\ncrs EPSG:32633\nslope A B 10\n")
    assert issue.line == 3 and "must come before the first point" in issue.message


# --------------------------------------------------------------------------- errors


@pytest.mark.parametrize(
    ("line", "token", "fragment"),
    [
        # crs
        ("crs 32633", "32633", "write the code with its authority, crs EPSG:32633"),
        ("crs UTM33", "UTM33", "crs local lat=LAT lon=LON"),
        ("crs EPSG:", "EPSG:", "'crs EPSG:CODE'"),
        ("crs EPSG:32633 lat=45:00:00", "lat=45:00:00", "belongs to a site grid"),
        ("crs", "crs", "crs needs EPSG:CODE or local"),
        ("crs EPSG:32633 EPSG:32634", "EPSG:32634", "crs takes EPSG:CODE"),
        ("crs local lat=45:00:00", "local", "crs local needs lon="),
        ("crs local", "local", "crs local needs lat= and lon="),
        ("crs local lat=95:00:00 lon=10:00:00", "lat=95:00:00", "latitude lies between -90°"),
        ("crs local lat=45:00:00 lon=-181:00:00", "lon=-181:00:00", "longitude lies between"),
        ("crs local lat=45.5 lon=10:00:00", "lat=45.5", "is not in D:M:S"),
        ("crs local lat=45:00:00 lon=10:00:00 east=5000", "east=5000", "needs a length unit"),
        ("crs local lat=45:00:00 lon=10:00:00 zone=33", "zone=33", "not an option of crs"),
        # geoid
        ("geoid undulation=-28.41", "undulation=-28.41", "needs a length unit"),
        ("geoid undulation=-280m", "undulation=-280m", "less than 150 m everywhere"),
        ("geoid", "geoid", "geoid needs undulation=N"),
        ("geoid N=-28m", "N=-28m", "not an option of geoid"),
        # refraction
        ("refraction k=13", "k=13", "values outside -1 to 1 are not plausible"),
        ("refraction k=-1.5", "k=-1.5", "not plausible"),
        ("refraction k=0,13", "k=0,13", "not a number"),
        ("refraction", "refraction", "refraction needs k=K"),
        # epoch
        ("epoch 2026-02-30", "2026-02-30", "there is no such day"),
        ("epoch 14.03.2026", "14.03.2026", "write a date as 2026-03-14"),
        ("epoch 2026-03-14T10:30", "2026-03-14T10:30", "write 2026-03-14T10:30Z if this is UTC"),
        (
            "epoch 2026-03-14T11:30+01:00",
            "2026-03-14T11:30+01:00",
            "write the same moment as 2026-03-14T10:30Z",
        ),
        ("epoch 2026-03-14T24:00Z", "2026-03-14T24:00Z", "out of range"),
        ("epoch", "epoch", "epoch needs the date"),
        # misspelt keywords get the nearest
        ("epcoh 2026-03-14", "epcoh", "did you mean 'epoch'?"),
        ("refration k=0.13", "refration", "did you mean 'refraction'?"),
        ("geiod undulation=1m", "geiod", "did you mean 'geoid'?"),
    ],
)
def test_header_errors_name_their_line_and_the_fix(line: str, token: str, fragment: str) -> None:
    issue = only_issue(f"units angle=dms\n{line}\npoint A height=1\n")
    assert (issue.line, issue.token) == (2, token)
    assert fragment in issue.message


@pytest.mark.parametrize(
    "statement", ["crs EPSG:32633", "geoid undulation=1m", "refraction k=0.1", "epoch 2026-03-14"]
)
def test_each_geodetic_header_statement_appears_once_before_the_body(statement: str) -> None:
    twice = only_issue(f"{statement}\n{statement}\npoint A height=1\n")
    assert twice.line == 2 and "already given on line 1; it may appear once" in twice.message
    late = only_issue(f"point A height=1\n{statement}\n")
    assert late.line == 2 and "must come before the first point" in late.message


@pytest.mark.parametrize(
    ("line", "token", "fragment"),
    [
        ("point P lat=45:00:00", "lat=45:00:00", "has lat= but no lon="),
        ("point P lon=15:00:00 height=3", "lon=15:00:00", "has lon= but no lat="),
        (
            "point P lat=45:00:00 lon=15:00:00 east=1 north=2",
            "lat=45:00:00",
            "give its position one way only",
        ),
        ("point P lat=90:00:00.1 lon=15:00:00", "lat=90:00:00.1", "latitude lies between"),
        ("point P lat=-91:00:00 lon=15:00:00", "lat=-91:00:00", "(south negative)"),
        ("point P lat=45:00:00 lon=180:00:01", "lon=180:00:01", "(west negative)"),
        ("point P lat=45:00:00 lon=15.5", "lon=15.5", "is not in D:M:S"),
        ("point P height=3 geoid=-23.9", "geoid=-23.9", "needs a length unit"),
        ("point P height=3 geoid=-230m", "geoid=-230m", "less than 150 m"),
        ("point P lat=45:00:00 lon=15:00:00 sd_h=1cm", "sd_h=1cm", "needs height="),
    ],
)
def test_point_errors(line: str, token: str, fragment: str) -> None:
    issue = only_issue(f"{CRS}{line}\n")
    assert (issue.line, issue.token) == (2, token)
    assert fragment in issue.message


def test_latitude_and_longitude_need_a_crs_line() -> None:
    issue = only_issue("point P lat=45:00:00 lon=15:00:00 fix\n")
    assert (issue.line, issue.token) == (1, "lat=45:00:00")
    assert "need a 'crs' line" in issue.message and "crs EPSG:CODE" in issue.message


@pytest.mark.parametrize(
    ("line", "token", "fragment"),
    [
        ("baseline A B 1 2", "baseline", "baseline needs FROM, TO, DX, DY and DZ"),
        ("baseline A A 1 2 3", "A", "baseline from A to itself"),
        ("baseline A B 1 2 3 4", "4", "sd= and corr= list three values with commas"),
        ("baseline A B 1 2 3 sd=2mm", "sd=2mm", "three standard deviations, one for each"),
        ("baseline A B 1 2 3 sd=2mm,2mm", "sd=2mm,2mm", "e.g. sd=3mm,3mm,6mm"),
        ("baseline A B 1 2 3 sd=2,2,5", "sd=2,2,5", "needs a unit"),
        ("baseline A B 1 2 3 sd=2mm,2sec,5mm", "sd=2mm,2sec,5mm", "is an angle"),
        ("baseline A B 1 2 3 sd=2mm,0mm,5mm", "sd=2mm,0mm,5mm", "must be greater than zero"),
        (
            "baseline A B 1 2 3 sd=2mm+1ppm,2mm,5mm",
            "sd=2mm+1ppm,2mm,5mm",
            "ppm part applies to distances only",
        ),
        ("baseline A B 1 2 3 corr=1,0,0", "corr=1,0,0", "strictly between -1 and 1"),
        ("baseline A B 1 2 3 corr=-1,0,0", "corr=-1,0,0", "strictly between -1 and 1"),
        (
            "baseline A B 1 2 3 corr=0.9,0.9,-0.9",
            "corr=0.9,0.9,-0.9",
            "not positive definite (determinant -2.89)",
        ),
        ("baseline A B 1 2 3 corr=0.1,0.2", "corr=0.1,0.2", "corr= takes three correlations"),
        ("baseline A B 1 2 3 corr=a,b,c", "corr=a,b,c", "is not a number"),
        ("baseline A B 1 2 3 hi=1.5m", "hi=1.5m", "antenna heights are applied when"),
        ("baseline A B 1 2 3 ht=0.1m", "ht=0.1m", "runs from mark to mark"),
        ("baseline A B 1 2 3 len=1km", "len=1km", "'len=' does not apply to baseline"),
        ("baseline A B ? 2 3", "?", "a planned baseline has '?' for all three"),
        ("baseline A B 0 0 0.0005", "0", "shorter than 1 mm"),
        ("baseline A B 1e7 1e7 1e7", "1e7", "longer than the Earth's diameter"),
        ("baseline A B 1 2 3sec", "3sec", "'sec' is not a length unit"),
        ("baseline A B 1 2 nan", "nan", "not a finite number"),
        ('baseline A B 1 2 "3"', '"3"', "quotes are only for text"),
        ("bsaeline A B 1 2 3", "bsaeline", "did you mean 'baseline'?"),
    ],
)
def test_baseline_errors(line: str, token: str, fragment: str) -> None:
    issue = only_issue(f"{CRS}defaults baseline=3mm\n{line}\n")
    assert (issue.line, issue.token) == (3, token)
    assert fragment in issue.message


def test_spaces_inside_sd_are_reported_with_the_way_to_write_it() -> None:
    issues = issues_of(f"{CRS}defaults baseline=3mm\nbaseline A B 1 2 3 sd=2mm, 2mm, 5mm\n")
    assert {issue.line for issue in issues} == {3}
    assert "commas and no spaces, as sd=3mm,3mm,6mm" in issues[0].message
    assert "three standard deviations" in issues[1].message


def test_a_baseline_with_no_standard_deviation_in_force_says_where_to_give_one() -> None:
    issue = only_issue(CRS + "baseline A B 1 2 3\n")
    assert issue.line == 2
    assert "give sd=SX,SY,SZ or put a 'defaults baseline=...' line before it" in issue.message


def test_defaults_baseline_takes_one_length_and_a_wrong_one_is_reported_once() -> None:
    issue = only_issue(
        CRS + "defaults baseline=2mm,2mm,5mm\nbaseline A B 1 2 3\nbaseline A C 1 2 3\n"
    )
    assert (issue.line, issue.token) == (2, "baseline=2mm,2mm,5mm")
    assert "takes one length, used for each of DX, DY and DZ" in issue.message
    issue = only_issue(CRS + "defaults baseline=2sec\nbaseline A B 1 2 3\n")
    assert issue.line == 2 and "is an angle" in issue.message


@pytest.mark.parametrize(
    ("line", "token", "fragment"),
    [
        ("scale baseline=0", "baseline=0", "0.001 to 1000 is accepted"),
        ("scale baseline=-2", "baseline=-2", "by a factor above zero"),
        ("scale baseline=5000", "baseline=5000", "usually 1 to 10"),
        ("scale baseline=3x", "baseline=3x", "not a number"),
        ("scale", "scale", "scale needs factor=F and/or baseline=F"),
    ],
)
def test_scale_baseline_errors(line: str, token: str, fragment: str) -> None:
    issue = only_issue(f"{CRS}defaults baseline=3mm\n{line}\nbaseline A B 1 2 3\n")
    assert (issue.line, issue.token) == (3, token)
    assert fragment in issue.message


# --------------------------------------------------------------------------- the fast path


def test_new_statements_read_the_same_with_and_without_the_fast_path(
    monkeypatch: pytest.MonkeyPatch,
) -> None:
    text = HARBOR_HILL + (
        "defaults distance=2mm direction=1sec level=1mm/sqrtkm\n"
        "distance RIDGE K-7 ?\nlevel RIDGE K-7 ? len=1.3km\n"
        "directions RIDGE\n  CEDAR 0:00:00\n  K-7 ?\nend\n"
    )
    books = []
    for fast in (False, True):
        monkeypatch.setattr(parser_module, "_FAST_LINES", fast)
        books.append(parse(text))
    assert books[0] == books[1]
    assert sum(o.planned for o in books[1].observations) == 3


# --------------------------------------------------------------------------- review edits


BOOK_WITH_BASELINE = (
    CRS + "defaults baseline=3mm level=1mm/sqrtkm\npoint A height=10 fix\n"
    "level A B 1.0 len=1km\nlevel B A -1.002 len=1km\n"
    "baseline A B 1.0 2.0 3.0 corr=0.1,0.2,0.3  # session 1\n"
)


def _edit(action: str, **kwargs: str) -> ObservationEdit:
    return ObservationEdit(line=6, action=action, reason="check", date="2026-12-04", **kwargs)


def test_leaving_out_and_bringing_back_a_baseline_edits_its_line() -> None:
    out = apply_edits(BOOK_WITH_BASELINE, [_edit("exclude")])
    line = out.splitlines()[5]
    assert line.startswith("baseline A B 1.0 2.0 3.0 corr=0.1,0.2,0.3 ignore")
    assert line.endswith("# session 1; 2026-12-04 left out: check")
    assert baselines(parse(out))[0].ignored
    back = apply_edits(out, [_edit("include")])
    assert not baselines(parse(back))[0].ignored


def test_a_baseline_value_is_corrected_as_three_components() -> None:
    assert booked_value(BOOK_WITH_BASELINE, 6) == "1.0,2.0,3.0"
    out = apply_edits(
        BOOK_WITH_BASELINE, [_edit("correct", value="1.0,2.1,3.0", previous="1.0,2.0,3.0")]
    )
    assert out.splitlines()[5].startswith("baseline A B 1.0 2.1 3.0 corr=0.1,0.2,0.3")
    assert "corrected from 1.0,2.0,3.0 on 2026-12-04" in out
    vector = baselines(parse(out))[0].baseline
    assert vector is not None and vector.components == (1.0, 2.1, 3.0)
    with pytest.raises(Exception, match="three components as DX,DY,DZ"):
        apply_edits(BOOK_WITH_BASELINE, [_edit("correct", value="2.1")])


def test_a_baseline_sd_edit_takes_three_lengths_or_one_for_all() -> None:
    one = apply_edits(BOOK_WITH_BASELINE, [_edit("sd", sd="5mm")])
    vector = baselines(parse(one))[0].baseline
    assert vector is not None and vector.sd == pytest.approx((0.005, 0.005, 0.005))
    three = apply_edits(BOOK_WITH_BASELINE, [_edit("sd", sd="2mm,3mm,6mm")])
    vector = baselines(parse(three))[0].baseline
    assert vector is not None and vector.sd == pytest.approx((0.002, 0.003, 0.006))
    with pytest.raises(Exception, match="takes one standard deviation"):
        apply_edits(
            BOOK_WITH_BASELINE,
            [ObservationEdit(line=4, action="sd", reason="r", date="2026-12-04", sd="1mm,1mm,1mm")],
        )
