"""Ellipsoid and CRS conversions against published values, pyproj's conversions, geographiclib.

Published values are listed with their sources and how sure we are of them in
docs/references.md, "Geodetic model and projections".
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
from geographiclib.geodesic import Geodesic
from scipy.optimize._numdiff import approx_derivative

from server.geodesy.crs import CrsError, _require_conversion, crs_from_epsg, local_crs
from server.geodesy.ellipsoid import GRS80, Ellipsoid
from server.geodesy.grid import grid_position


def dms(degrees: int, minutes: int, seconds: float, sign: int = 1) -> float:
    """Radians from degrees, minutes and seconds."""
    return sign * math.radians(degrees + minutes / 60.0 + seconds / 3600.0)


# --- ellipsoid: geodetic <-> Earth-centred ------------------------------------------------------


def test_geodetic_to_earth_centred_ordnance_survey_worked_example():
    """Ordnance Survey, *A guide to coordinate systems in Great Britain*, worked example on
    GRS80: 53°36′43.1653″N, 1°39′51.9920″W, h 299.800 m → X 3790644.900, Y −110149.210,
    Z 5111482.970 m (printed to the millimetre)."""
    xyz = GRS80.to_ecef(dms(53, 36, 43.1653), dms(1, 39, 51.9920, -1), 299.800)
    assert xyz == pytest.approx([3790644.900, -110149.210, 5111482.970], abs=1e-3)
    # the same guide prints e² = 6.6943800355E-03 and ν = 6.3920173768E+06 m for this point;
    # its e² comes from the semi-minor axis rounded to 0.1 mm (computed: 1.3e-11 more than
    # f(2 − f) with 1/f = 298.257222101), which moves ν by 3e-5 m
    assert GRS80.e2 == pytest.approx(6.6943800355e-03, abs=2e-11)
    assert GRS80.prime_vertical_radius(dms(53, 36, 43.1653)) == pytest.approx(
        6.3920173768e6, abs=1e-4
    )
    lat, lon, h = GRS80.from_ecef(np.array([3790644.900, -110149.210, 5111482.970]))
    assert math.degrees(lat) * 3600 == pytest.approx((53 * 60 + 36) * 60 + 43.1653, abs=1e-4)
    assert math.degrees(lon) * 3600 == pytest.approx(-((1 * 60 + 39) * 60 + 51.9920), abs=1e-4)
    assert h == pytest.approx(299.800, abs=1e-3)


def test_geodetic_to_earth_centred_ngs_datasheet_station():
    """NGS datasheet of CORS station PID DI2263, NAD83(2011) (GRS80): 47°07′00.14491″N,
    104°41′06.39476″W, h 668.450 m → X −1,102,409.924, Y −4,206,590.343, Z 4,651,093.534 m."""
    xyz = GRS80.to_ecef(dms(47, 7, 0.14491), dms(104, 41, 6.39476, -1), 668.450)
    assert xyz == pytest.approx([-1102409.924, -4206590.343, 4651093.534], abs=1e-3)


def test_ellipsoid_agrees_with_pyproj_cartesian_conversion_everywhere():
    """pyproj's geocentric conversion (+proj=cart) on 20,000 random points from pole to pole,
    heights from the Dead Sea to above aircraft; the inverse returns the input."""
    rng = np.random.default_rng(11)
    count = 20_000
    lat = rng.uniform(-np.pi / 2, np.pi / 2, count)
    lon = rng.uniform(-np.pi, np.pi, count)
    h = rng.uniform(-500.0, 12_000.0, count)
    lat[:4] = [np.pi / 2, -np.pi / 2, 0.0, 0.0]  # poles and the equator
    cart = pyproj.Transformer.from_pipeline("+proj=cart +ellps=GRS80")
    x, y, z = cart.transform(np.degrees(lon), np.degrees(lat), h)
    xyz = GRS80.to_ecef(lat, lon, h)
    assert np.abs(xyz - np.stack([x, y, z], axis=-1)).max() < 1e-7
    back_lat, back_lon, back_h = GRS80.from_ecef(xyz)
    assert np.abs(back_lat - lat).max() < 1e-14
    assert np.abs(back_h - h).max() < 1e-7
    away = np.abs(lat) < np.radians(89.9)  # longitude is undefined at the poles
    assert np.abs(np.angle(np.exp(1j * (back_lon - lon)))[away]).max() < 1e-14


def test_radii_of_curvature_are_the_rates_of_the_position():
    """∂X/∂φ has length M + h and ∂X/∂λ length (N + h)cos φ (central differences)."""
    lat, lon, h, step = 0.83, -1.9, 250.0, 1e-7
    d_lat = (GRS80.to_ecef(lat + step, lon, h) - GRS80.to_ecef(lat - step, lon, h)) / (2 * step)
    d_lon = (GRS80.to_ecef(lat, lon + step, h) - GRS80.to_ecef(lat, lon - step, h)) / (2 * step)
    assert np.linalg.norm(d_lat) == pytest.approx(GRS80.meridian_radius(lat) + h, rel=1e-9)
    assert np.linalg.norm(d_lon) == pytest.approx(
        (GRS80.prime_vertical_radius(lat) + h) * math.cos(lat), rel=1e-9
    )


# --- projected CRSs ---------------------------------------------------------------------------


def test_british_national_grid_against_epsg_guidance_note_example():
    """EPSG Guidance Note 7-2, transverse Mercator example on the British National Grid:
    50°30′N, 0°30′E → E 577274.99, N 69740.50 m, computed there with k₀ = 0.9996013 as
    printed.  EPSG:27700 uses k₀ = 0.9996012717; TM coordinates from the false origin scale
    with k₀, so ours are rescaled by the ratio before comparing (printed to the centimetre)."""
    grid = crs_from_epsg("EPSG:27700")
    east, north = grid.geodetic_to_grid(dms(50, 30, 0), dms(0, 30, 0))
    ratio = 0.9996013 / 0.9996012717
    assert 400000 + (east - 400000) * ratio == pytest.approx(577274.99, abs=0.006)
    assert -100000 + (north + 100000) * ratio == pytest.approx(69740.50, abs=0.006)
    lat, lon = grid.grid_to_geodetic(east, north)
    assert (lat, lon) == pytest.approx((dms(50, 30, 0), dms(0, 30, 0)), abs=1e-12)
    assert grid.ellipsoid.name == "Airy 1830" and grid.ellipsoid.a == 6377563.396


NM_LAT, NM_LON = dms(32, 16, 52.33969), dms(106, 45, 15.77636, -1)


def test_state_plane_new_mexico_central_coordinates_scale_and_convergence():
    """NGS state plane output for SPCS83 New Mexico Central (EPSG:32113), quoted in a trade
    magazine series on state plane and surface coordinates: 32°16′52.33969″N,
    106°45′15.77636″W → N 142158.262 m, E 452489.852 m, convergence −0°16′09.78″,
    scale factor 0.99992783.  The convergence is negative west of the central meridian
    (NOAA Manual NOS NGS 5, fig. 2.5)."""
    grid = crs_from_epsg("EPSG:32113")
    east, north = grid.geodetic_to_grid(NM_LAT, NM_LON)
    assert east == pytest.approx(452489.852, abs=1e-3)
    assert north == pytest.approx(142158.262, abs=1e-3)
    factors = grid.factors(NM_LAT, NM_LON)
    assert factors.scale == pytest.approx(0.99992783, abs=5e-9)
    assert factors.meridional_scale == pytest.approx(factors.scale, abs=1e-9)
    assert math.degrees(factors.convergence) * 3600 == pytest.approx(-(16 * 60 + 9.78), abs=0.006)
    lat, lon = grid.grid_to_geodetic(452489.852, 142158.262)
    assert lat == pytest.approx(NM_LAT, abs=2e-10) and lon == pytest.approx(NM_LON, abs=2e-10)


def test_convergence_is_the_grid_direction_of_true_north():
    """Geodetic azimuth = grid azimuth + convergence: the grid azimuth of a short step due
    north (from the inverse geodesic problem, geographiclib) is minus the convergence, on both
    sides of the central meridian; and γ ≈ Δλ·sin φ to first order (NOAA Manual NOS NGS 5)."""
    grid = crs_from_epsg("EPSG:32113")  # central meridian 106°15′W
    for lon in (NM_LON, dms(105, 40, 0, -1)):
        end = Geodesic.WGS84.Direct(math.degrees(NM_LAT), math.degrees(lon), 0.0, 10.0)
        east, north = grid.geodetic_to_grid(
            np.array([NM_LAT, math.radians(end["lat2"])]),
            np.array([lon, math.radians(end["lon2"])]),
        )
        grid_azimuth = math.atan2(east[1] - east[0], north[1] - north[0])
        gamma = float(grid.factors(NM_LAT, lon).convergence)
        assert grid_azimuth + gamma == pytest.approx(0.0, abs=1e-8)
        first_order = (lon - math.radians(-106.25)) * math.sin(NM_LAT)
        assert gamma == pytest.approx(first_order, rel=2e-3)


def test_us_survey_feet_and_international_feet():
    """US survey foot 1200/3937 m, international foot 0.3048 m (85 FR 62698).  The ftUS
    version of New Mexico Central (EPSG:2258) places the point of the NGS example at the metre
    version's coordinates divided by 1200/3937; its false easting is 1,640,416.667 ftUS,
    which is 0.1 mm more than 500,000 m.  Arizona Central in international feet (EPSG:2223,
    false easting 700,000 ft = 213,360 m exactly) agrees with its metre version (EPSG:26949)."""
    usft = crs_from_epsg("EPSG:2258")
    assert usft.metres_per_unit == 1200 / 3937 and usft.unit == "usft"
    assert usft.unit_name == "US survey foot"
    east, north = usft.geodetic_to_grid(NM_LAT, NM_LON)
    assert east * usft.metres_per_unit == pytest.approx(452489.852, abs=1e-3)
    assert north * usft.metres_per_unit == pytest.approx(142158.262, abs=1e-3)
    ft = crs_from_epsg("EPSG:2223")
    assert ft.metres_per_unit == 0.3048 and ft.unit == "ft" and ft.unit_name == "foot"
    metres = crs_from_epsg("EPSG:26949")
    lat, lon = dms(34, 10, 0), dms(111, 35, 0, -1)
    east_ft, north_ft = ft.geodetic_to_grid(lat, lon)
    east_m, north_m = metres.geodetic_to_grid(lat, lon)
    assert east_ft * 0.3048 == pytest.approx(east_m, abs=1e-6)
    assert north_ft * 0.3048 == pytest.approx(north_m, abs=1e-6)
    # scale factors do not depend on the unit
    assert ft.factors(lat, lon).scale == pytest.approx(metres.factors(lat, lon).scale, abs=1e-12)


def test_northing_first_crs_still_gives_east_then_north():
    """EPSG:2193 (New Zealand TM 2000) lists northing first.  Compared with the same
    projection written as a PROJ pipeline in east, north order (TM, central meridian 173°E,
    k₀ 0.9996, false origin 1,600,000 E, 10,000,000 N on GRS80; parameters from memory and
    confirmed by the agreement)."""
    grid = crs_from_epsg("EPSG:2193")
    lat, lon = np.radians([-41.2865, -36.8485]), np.radians([174.7762, 174.7633])
    east, north = grid.geodetic_to_grid(lat, lon)
    tm = pyproj.Transformer.from_pipeline(
        "+proj=pipeline +step +proj=unitconvert +xy_in=deg +xy_out=rad +step +proj=tmerc "
        "+lat_0=0 +lon_0=173 +k=0.9996 +x_0=1600000 +y_0=10000000 +ellps=GRS80"
    )
    ref_east, ref_north = tm.transform(np.degrees(lon), np.degrees(lat))
    assert east == pytest.approx(ref_east, abs=1e-6) and north == pytest.approx(ref_north, abs=1e-6)
    assert (east > 1.7e6).all() and (north > 5.4e6).all()
    back_lat, back_lon = grid.grid_to_geodetic(east, north)
    assert back_lat == pytest.approx(lat, abs=1e-12) and back_lon == pytest.approx(lon, abs=1e-12)


def test_grid_to_earth_centred_is_a_conversion_on_the_datum_ellipsoid():
    """UTM 33N on WGS 84: grid → Earth-centred equals pyproj's own conversion from the
    geographic to the geocentric WGS 84 CRS (EPSG:4326 → EPSG:4978, a conversion)."""
    grid = crs_from_epsg("EPSG:32633")
    east = np.array([500000.0, 412345.678, 687654.321])
    north = np.array([5000000.0, 5412345.678, 6012345.0])
    h = np.array([0.0, 312.5, 1450.25])
    xyz = grid.grid_to_ecef(east, north, h)
    lat, lon = grid.grid_to_geodetic(east, north)
    geocentric = pyproj.Transformer.from_crs("EPSG:4979", "EPSG:4978", always_xy=True)
    x, y, z = geocentric.transform(np.degrees(lon), np.degrees(lat), h)
    assert np.abs(xyz - np.stack([x, y, z], axis=-1)).max() < 1e-6
    back_east, back_north, back_h = grid.ecef_to_grid(xyz)
    assert back_east == pytest.approx(east, abs=1e-6)
    assert back_north == pytest.approx(north, abs=1e-6)
    assert back_h == pytest.approx(h, abs=1e-6)


def test_an_operation_with_a_datum_change_is_refused():
    """Offline, pyproj reaches WGS 84 from OSGB36 by an operation that changes datum (a
    Helmert or a ballpark shift of metres); the check accepts conversions only."""
    to_wgs84 = pyproj.Transformer.from_crs("EPSG:27700", "EPSG:4326", always_xy=True)
    with pytest.raises(CrsError, match="not a pure conversion"):
        _require_conversion("EPSG:27700", pyproj.CRS("EPSG:27700"), to_wgs84)
    own = pyproj.Transformer.from_crs("EPSG:27700", pyproj.CRS("EPSG:27700").geodetic_crs)
    _require_conversion("EPSG:27700", pyproj.CRS("EPSG:27700"), own)


@pytest.mark.parametrize(
    "text, words",
    [
        ("EPSG:4326", "geographic CRS"),
        ("EPSG:4978", "geocentric CRS"),
        ("EPSG:5703", "vertical CRS"),
        ("EPSG:7405", "compound CRS with heights; give its horizontal part, EPSG:27700"),
        ("EPSG:2053", "axes pointing west, south"),
        ("EPSG:3031", "axes pointing north, north"),
        ("EPSG:27572", "Paris meridian"),
        ("EPSG:3857", "not a conformal projection"),
        ("EPSG:5071", "not a conformal projection"),  # Albers equal-area
        ("EPSG:32600", "give the code of a single zone"),  # UTM zones, northern hemisphere
        ("EPSG:999999", "not a coordinate reference system in the EPSG database"),
        ("32633", "not an EPSG code"),
        ("EPSG:", "not an EPSG code"),
        ("ESRI:102003", "not an EPSG code"),
    ],
)
def test_unusable_crs_is_refused_with_a_sentence(text, words):
    with pytest.raises(CrsError, match=words.replace("(", r"\(")) as caught:
        crs_from_epsg(text)
    assert isinstance(caught.value, ValueError)
    assert "Traceback" not in str(caught.value) and "proj_create" not in str(caught.value)


def test_epsg_code_spelling_is_forgiving_and_cached():
    assert crs_from_epsg(" epsg:32633 ") is crs_from_epsg("EPSG:32633")
    assert crs_from_epsg("EPSG:32633").definition == "EPSG:32633"


def test_points_pyproj_cannot_convert_come_back_as_nan():
    grid = crs_from_epsg("EPSG:32633")
    lat, lon = grid.grid_to_geodetic(np.array([500000.0, 1e30]), np.array([5e6, 1e30]))
    assert np.isfinite(lat[0]) and np.isnan(lat[1]) and np.isnan(lon[1])


# --- the site grid ------------------------------------------------------------------------------

SITE_LAT, SITE_LON = dms(46, 57, 8.66), dms(7, 26, 22.5)


@pytest.mark.parametrize("unit, factor", [("m", 1.0), ("ft", 0.3048), ("usft", 1200 / 3937)])
def test_site_grid_origin_scale_and_units(unit, factor):
    """The site point is at (E0, N0) in the grid's unit, with scale 1 and convergence 0."""
    grid = local_crs(SITE_LAT, SITE_LON, 5000.0, 10000.0, unit)
    assert grid.metres_per_unit == factor and grid.unit == unit
    assert grid.ellipsoid is GRS80
    east, north = grid.geodetic_to_grid(SITE_LAT, SITE_LON)
    # PROJ subtracts the meridian arc to the origin (5.2e6 m): rounding of order 1e-8
    assert east == pytest.approx(5000.0, abs=1e-7) and north == pytest.approx(10000.0, abs=1e-7)
    factors = grid.factors(SITE_LAT, SITE_LON)
    # pyproj's factors come from numerical derivatives, good to about 1e-10
    assert factors.scale == pytest.approx(1.0, abs=1e-10)
    assert factors.convergence == pytest.approx(0.0, abs=1e-10)


def test_site_grid_distances_are_ellipsoid_distances():
    """Within a kilometre of the site the grid distance equals the geodesic distance on
    GRS80 (geographiclib) to 1e-8 relative: a transverse Mercator's scale grows as
    1 + x²/(2R²), 1.2e-8 at x = 1 km."""
    grid = local_crs(SITE_LAT, SITE_LON)
    geod = Geodesic(GRS80.a, GRS80.f)
    rng = np.random.default_rng(5)
    east, north = rng.uniform(-700, 700, (2, 40)), rng.uniform(-700, 700, (2, 40))
    lat0, lon0 = grid.grid_to_geodetic(east[0], north[0])
    lat1, lon1 = grid.grid_to_geodetic(east[1], north[1])
    for i in range(40):
        line = geod.Inverse(*np.degrees([lat0[i], lon0[i], lat1[i], lon1[i]]))
        plane = math.hypot(east[1, i] - east[0, i], north[1, i] - north[0, i])
        assert plane == pytest.approx(line["s12"], rel=1e-8)
    # the scale at x = 1 km east of the meridian, against 1 + x²/(2 ν ρ) (the x⁴ term is
    # 1e-16); pyproj's factors come from numerical derivatives, good to about 1e-10
    lat, lon = grid.grid_to_geodetic(1000.0, 0.0)
    radius2 = float(GRS80.prime_vertical_radius(lat) * GRS80.meridian_radius(lat))
    assert grid.factors(lat, lon).scale == pytest.approx(1 + 1000.0**2 / (2 * radius2), abs=1e-10)


def test_site_grid_refuses_impossible_origins():
    for args, words in [
        ((math.radians(89.5), 0.0), "not between -89° and 89°"),
        ((0.5, math.radians(181.0)), "not between -180° and 180°"),
        ((float("nan"), 0.0), "finite numbers"),
        ((0.5, 0.2, 0.0, 0.0, "yd"), "not a length unit"),
    ]:
        with pytest.raises(CrsError, match=words):
            local_crs(*args)


def test_ellipsoid_is_a_frozen_value():
    sphere = Ellipsoid(6371000.0, 0.0)
    assert sphere.b == sphere.a and sphere.e2 == 0.0
    with pytest.raises(AttributeError):
        sphere.a = 1.0  # type: ignore[misc]


# --- grid coordinates of Earth-centred points, with partials ------------------------------------


@pytest.mark.parametrize(
    "code, lat, lon",
    [
        ("EPSG:32113", 32.28, -106.75),
        ("EPSG:2258", 32.28, -106.75),
        ("EPSG:32633", 60.0, 17.9),
        ("EPSG:2193", -41.3, 174.8),
        ("EPSG:2223", 34.2, -111.6),
    ],
)
def test_grid_partials_agree_with_finite_differences_through_pyproj(code, lat, lon):
    """∂(E, N, h)/∂X from the scale factor and convergence against central differences of
    the whole chain Earth-centred → geodetic → pyproj's projection (1 cm steps; pyproj's
    coordinates are good to about 1e-9 m, so about 1e-7 relative), in metres and feet."""
    grid = crs_from_epsg(code)
    rng = np.random.default_rng(int(code[5:]))
    lats = np.radians(lat + rng.uniform(-0.3, 0.3, 3))
    lons = np.radians(lon + rng.uniform(-0.3, 0.3, 3))
    xyz = grid.geodetic_to_ecef(lats, lons, rng.uniform(0, 3000, 3))
    position = grid_position(grid, xyz)
    east, _north, h = grid.ecef_to_grid(xyz)
    assert position.east == pytest.approx(east, abs=0) and position.h == pytest.approx(h, abs=0)
    for row in range(3):
        numeric = approx_derivative(
            lambda x: np.concatenate(grid.ecef_to_grid(x[None])),
            xyz[row],
            method="3-point",
            abs_step=1e-2,
        )
        analytic = np.vstack([position.d_east[row], position.d_north[row], position.d_h[row]])
        assert np.abs(numeric - analytic).max() < 3e-7 * np.abs(analytic).max()


def test_every_projected_epsg_crs_is_either_usable_or_refused_with_a_sentence():
    """A quarter of the projected CRSs in pyproj's EPSG database (every fourth code): each
    one is refused with a CrsError or converts its area's centre to grid and back to within
    a micrometre; most are usable (in this database about 5,000 of 5,300)."""
    from pyproj.database import query_crs_info
    from pyproj.enums import PJType

    from server.geodesy.crs import _area_centre

    infos = query_crs_info(auth_name="EPSG", pj_types=[PJType.PROJECTED_CRS])[::4]
    usable = 0
    for info in infos:
        try:
            grid = crs_from_epsg(f"EPSG:{info.code}")
        except CrsError as refused:
            assert str(refused).startswith(f"EPSG:{info.code} ("), str(refused)
            continue
        usable += 1
        assert grid.metres_per_unit > 0
        lon, lat = _area_centre(pyproj.CRS.from_epsg(int(info.code)))
        east, north = grid.geodetic_to_grid(math.radians(lat), math.radians(lon))
        back_lat, back_lon = grid.grid_to_geodetic(east, north)
        assert grid.geodetic_to_grid(back_lat, back_lon)[0] == pytest.approx(east, abs=1e-6)
        assert abs(back_lat - math.radians(lat)) < 1e-12, info.code
    assert usable > 0.9 * len(infos)
