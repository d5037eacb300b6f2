"""Geodetic point figures (server.results.geodetic) against published values, pyproj's own
conversions, geographiclib and Monte Carlo draws.

Sources and their status: docs/references.md "Correlated blocks and geodetic output" and
"Geodetic model and projections".
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
from geographiclib.geodesic import Geodesic

from server.geodesy.crs import crs_from_epsg, local_crs
from server.geodesy.ellipsoid import GRS80
from server.results import geodetic
from server.statistics import quality as st


def dms(degrees: int, minutes: int, seconds: float, sign: int = 1) -> float:
    return sign * (degrees + minutes / 60.0 + seconds / 3600.0)


# SPCS83 New Mexico Central (EPSG:32113), NGS state plane program output printed in a trade
# magazine series on state plane and surface coordinates (read in a quotation):
NM_LAT = dms(32, 16, 52.33969)
NM_LON = dms(106, 45, 15.77636, -1)
NM_NORTH, NM_EAST = 142158.262, 452489.852
NM_CONVERGENCE = dms(0, 16, 9.78, -1)
NM_SCALE = 0.99992783


def _ecef(lat_deg: float, lon_deg: float, h: float) -> np.ndarray:
    return GRS80.to_ecef(math.radians(lat_deg), math.radians(lon_deg), h)[None, :]


def test_state_plane_example_grid_scale_and_convergence():
    crs = crs_from_epsg("EPSG:32113")
    xyz = _ecef(NM_LAT, NM_LON, 1203.4)
    got = geodetic.point_values(crs, xyz, np.eye(3)[None] * 1e-6, np.array([-21.5]), 2.4477)
    assert got.north[0] == pytest.approx(NM_NORTH, abs=0.0015)  # printed to the millimetre
    assert got.east[0] == pytest.approx(NM_EAST, abs=0.0015)
    assert got.convergence[0] == pytest.approx(NM_CONVERGENCE, abs=0.006 / 3600)  # 0.01″ printed
    assert got.scale_factor[0] == pytest.approx(NM_SCALE, abs=6e-9)
    assert got.latitude[0] == pytest.approx(NM_LAT, abs=1e-11)
    assert got.longitude[0] == pytest.approx(NM_LON, abs=1e-11)  # west is negative
    assert got.ellipsoidal_height[0] == pytest.approx(1203.4, abs=1e-6)
    assert got.height[0] == pytest.approx(1203.4 + 21.5, abs=1e-6)  # H = h − N
    assert got.geoid[0] == -21.5


def test_grid_and_heights_agree_with_pyproj_cart_and_projection():
    """pyproj's own inverse of +proj=cart and the EPSG projection, outside our ellipsoid code."""
    crs = crs_from_epsg("EPSG:32633")  # WGS 84 / UTM 33N
    rng = np.random.default_rng(2)
    lat = rng.uniform(40.0, 60.0, 20)
    lon = rng.uniform(10.0, 20.0, 20)
    h = rng.uniform(-50.0, 3000.0, 20)
    cart = pyproj.Transformer.from_pipeline("+proj=cart +ellps=WGS84")
    x, y, z = cart.transform(lon, lat, h)
    xyz = np.stack([x, y, z], axis=1)
    got = geodetic.point_values(
        crs,
        xyz,
        np.broadcast_to(np.eye(3) * 1e-6, (20, 3, 3)),
        np.zeros(20),
        2.4477,
        per_metre=1.0 / 0.3048,
    )
    to_grid = pyproj.Transformer.from_crs("EPSG:4326", "EPSG:32633", always_xy=True)
    east, north = to_grid.transform(lon, lat)
    np.testing.assert_allclose(got.east, east, atol=1e-6)
    np.testing.assert_allclose(got.north, north, atol=1e-6)
    np.testing.assert_allclose(got.latitude, lat, atol=1e-10)
    np.testing.assert_allclose(got.longitude, lon, atol=1e-10)
    np.testing.assert_allclose(got.ellipsoidal_height, h / 0.3048, atol=1e-5)  # in feet
    factors = pyproj.Proj("EPSG:32633").get_factors(lon, lat)
    np.testing.assert_allclose(got.scale_factor, factors.parallel_scale, rtol=1e-12)
    np.testing.assert_allclose(got.convergence, factors.meridian_convergence, atol=1e-12)


def test_scale_and_convergence_from_geodesics_on_a_site_grid():
    """geographiclib (Karney's geodesics): a 1 m step along the meridian has grid azimuth
    −γ; a 1 m step in any direction has grid length k·1 m."""
    lat0, lon0 = math.radians(47.25), math.radians(8.5)
    crs = local_crs(lat0, lon0, 5000.0, 8000.0)
    geod = Geodesic(GRS80.a, GRS80.f)
    lat, lon = 47.27, 8.56  # about 4.5 km east of the site meridian
    got = geodetic.point_values(
        crs, _ecef(lat, lon, 500.0), np.eye(3)[None] * 1e-6, np.zeros(1), 2.4477
    )
    e0, n0 = crs.geodetic_to_grid(np.radians([lat]), np.radians([lon]))
    for azimuth in (0.0, 60.0):
        step = geod.Direct(lat, lon, azimuth, 1.0)
        e1, n1 = crs.geodetic_to_grid(np.radians([step["lat2"]]), np.radians([step["lon2"]]))
        grid_azimuth = math.degrees(math.atan2(e1[0] - e0[0], n1[0] - n0[0]))
        # geodetic azimuth = grid azimuth + convergence
        assert grid_azimuth + got.convergence[0] == pytest.approx(azimuth, abs=2e-6)
        assert math.hypot(e1[0] - e0[0], n1[0] - n0[0]) == pytest.approx(
            got.scale_factor[0], abs=1e-8
        )
    assert got.convergence[0] > 0.0  # east of the central meridian, northern hemisphere
    assert got.scale_factor[0] - 1.0 == pytest.approx(4400.0**2 / (2 * 6.38e6**2), rel=0.1)


def _topocentric(origin: np.ndarray) -> str:
    x0, y0, z0 = (float(v) for v in origin)  # plain floats: a numpy repr is not PROJ text
    return f"+proj=topocentric +ellps=GRS80 +X_0={x0!r} +Y_0={y0!r} +Z_0={z0!r}"


def test_local_standard_deviations_and_ellipse_by_monte_carlo():
    """Draws of X, Y, Z from Σ_XYZ, each converted by pyproj's +proj=topocentric (an
    implementation of its own), must scatter in east, north, up as the figures say."""
    crs = crs_from_epsg("EPSG:32633")
    lat, lon = 52.1, 14.3
    xyz = _ecef(lat, lon, 80.0)
    # east-north ellipse: 12 mm along azimuth 30°, 5 mm across; up 20 mm, some correlation
    t = math.radians(30.0)
    axes = np.array([[math.sin(t), math.cos(t)], [math.cos(t), -math.sin(t)]])
    en = axes @ np.diag([0.012**2, 0.005**2]) @ axes.T
    enu = np.zeros((3, 3))
    enu[:2, :2] = en
    enu[2, 2] = 0.020**2
    enu[0, 2] = enu[2, 0] = 0.3 * 0.012 * 0.020
    lat_r, lon_r = math.radians(lat), math.radians(lon)
    sl, cl, sp, cp = math.sin(lon_r), math.cos(lon_r), math.sin(lat_r), math.cos(lat_r)
    rot = np.array([[-sl, cl, 0], [-sp * cl, -sp * sl, cp], [cp * cl, cp * sl, sp]])
    cov = rot.T @ enu @ rot
    factor = st.ellipse_factor(0.95, 12)
    got = geodetic.point_values(crs, xyz, cov[None], np.zeros(1), factor)
    rng = np.random.default_rng(17)
    draws = rng.multivariate_normal(xyz[0], cov, size=20000)
    topo = pyproj.Transformer.from_pipeline(_topocentric(xyz[0]))
    e, n, u = topo.transform(draws[:, 0], draws[:, 1], draws[:, 2])
    sample = np.cov(np.stack([e, n, u]))
    assert got.sd_east[0] == pytest.approx(math.sqrt(sample[0, 0]), rel=0.03)
    assert got.sd_north[0] == pytest.approx(math.sqrt(sample[1, 1]), rel=0.03)
    assert got.sd_up[0] == pytest.approx(math.sqrt(sample[2, 2]), rel=0.03)
    assert got.azimuth[0] == pytest.approx(30.0, abs=1e-6)  # clockwise from true north
    _, vectors = np.linalg.eigh(sample[:2, :2])
    major = vectors[:, 1]
    sample_azimuth = math.degrees(math.atan2(major[0], major[1])) % 180.0
    assert sample_azimuth == pytest.approx(30.0, abs=2.0)
    assert got.standard_major[0] == pytest.approx(0.012, rel=1e-9)
    assert got.standard_minor[0] == pytest.approx(0.005, rel=1e-9)
    assert got.semi_major[0] == pytest.approx(0.012 * factor, rel=1e-9)
    # confidence: the share of draws inside the 95 % ellipse of σ known is 95 % (χ²(2))
    known = geodetic.point_values(crs, xyz, cov[None], np.zeros(1), st.ellipse_factor(0.95, 0))
    inside = (
        np.einsum("ni,ij,nj->n", np.stack([e, n], 1), np.linalg.inv(en), np.stack([e, n], 1))
        <= (known.semi_major[0] / 0.012) ** 2
    )
    assert inside.mean() == pytest.approx(0.95, abs=0.006)


def test_relative_ellipse_of_the_difference_in_local_axes_at_the_first_point():
    crs = local_crs(math.radians(-33.9), math.radians(151.2), 1000.0, 2000.0)
    a = _ecef(-33.9, 151.2, 30.0)
    b = _ecef(-33.9045, 151.2054, 35.0)  # about 500 m south-east
    rng = np.random.default_rng(4)
    m = rng.normal(size=(6, 6)) * 0.004
    joint = m @ m.T + np.eye(6) * 1e-6
    got = geodetic.pair_values(
        crs, a, b, joint[None, :3, :3], joint[None, 3:, 3:], joint[None, :3, 3:], 2.0
    )
    # by Monte Carlo: difference of joint draws, rotated to A's east-north-up by pyproj
    draws = rng.multivariate_normal(np.concatenate([a[0], b[0]]), joint, size=20000)
    topo = pyproj.Transformer.from_pipeline(_topocentric(a[0]))
    ea, na, _ = topo.transform(draws[:, 0], draws[:, 1], draws[:, 2])
    eb, nb, _ = topo.transform(draws[:, 3], draws[:, 4], draws[:, 5])
    sample = np.cov(np.stack([eb - ea, nb - na]))
    major, minor, azimuth = st.standard_ellipse(sample)
    assert got.semi_major[0] == pytest.approx(2.0 * major, rel=0.03)
    assert got.semi_minor[0] == pytest.approx(2.0 * minor, rel=0.03)
    assert (got.azimuth[0] - azimuth + 90.0) % 180.0 - 90.0 == pytest.approx(0.0, abs=3.0)
    # grid distance: geographiclib's ellipsoid distance times the site grid's scale (≈ 1)
    line = Geodesic(GRS80.a, GRS80.f).Inverse(-33.9, 151.2, -33.9045, 151.2054)
    assert got.distance[0] == pytest.approx(line["s12"], rel=2e-7)
    direction = np.array(
        [math.sin(math.radians(line["azi1"])), math.cos(math.radians(line["azi1"]))]
    )
    along = np.sqrt(direction @ sample @ direction)
    assert got.sd_distance[0] == pytest.approx(along, rel=0.03)
