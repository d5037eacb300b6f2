"""Local-frame observations and covariances: closed forms, PROJ, geographiclib, finite differences.

Published values are listed with their sources in docs/references.md,
"Geodetic model and projections".
"""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
from geographiclib.geodesic import Geodesic
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy.optimize._numdiff import approx_derivative

from server.geodesy import frames
from server.geodesy.crs import local_crs
from server.geodesy.ellipsoid import GRS80, Ellipsoid
from tests.hypothesis_profiles import examples

SPHERE = Ellipsoid(6_371_000.0, 0.0, "sphere")
FOOT = 0.3048


def _pairs(count: int, seed: int, spread: float = 0.02) -> tuple[np.ndarray, np.ndarray, dict]:
    """Random instrument and target marks on GRS80, from the poles' edges to the equator."""
    rng = np.random.default_rng(seed)
    lat = rng.uniform(-1.45, 1.45, count)
    lon = rng.uniform(-np.pi, np.pi, count)
    frm = GRS80.to_ecef(lat, lon, rng.uniform(-50, 3000, count))
    to = GRS80.to_ecef(
        lat + rng.uniform(-spread, spread, count),
        lon + rng.uniform(-spread, spread, count),
        rng.uniform(-50, 3000, count),
    )
    heights = {"hi": rng.uniform(0.0, 2.0, count), "ht": rng.uniform(0.0, 2.5, count)}
    return frm, to, heights


# --- partial derivatives ------------------------------------------------------------------------


@pytest.mark.parametrize("kind", ["slope", "zenith", "zenith_refracted", "azimuth"])
def test_partial_derivatives_agree_with_finite_differences(kind):
    """Central differences (scipy's approx_derivative, steps of 1 mm) of the value with respect
    to the six coordinates of the two marks, for 24 random lines with instrument and target
    heights; the analytic partials include the turning of the frame with the instrument."""
    frm, to, heights = _pairs(24, seed=7)
    options = dict(heights)
    if kind == "zenith_refracted":
        options["k"] = 0.13
    function = {"slope": frames.slope_distance, "azimuth": frames.horizon_azimuth}.get(
        kind, frames.zenith_angle
    )
    equation = function(GRS80, frm, to, **options)
    for row in range(len(frm)):
        one = {key: value[row] for key, value in options.items() if key != "k"}
        if "k" in options:
            one["k"] = options["k"]

        def value(x, one=one):
            return function(GRS80, x[:3], x[3:], **one).value

        numeric = approx_derivative(
            value, np.concatenate([frm[row], to[row]]), method="3-point", abs_step=1e-3
        )
        analytic = np.concatenate([equation.d_from[row], equation.d_to[row]])
        scale = np.abs(analytic).max()
        assert np.abs(numeric.ravel() - analytic).max() < 1e-6 * scale, (kind, row)


@settings(max_examples=examples(40))
@given(
    lat=st.floats(-85.0, 85.0),
    lon=st.floats(-180.0, 180.0),
    azimuth=st.floats(0.0, 360.0),
    distance=st.floats(2.0, 20_000.0),
    rise=st.floats(-0.5, 0.5),
    hi=st.floats(0.0, 2.0),
    ht=st.floats(0.0, 3.0),
)
def test_partials_of_surveying_lines_agree_with_finite_differences(
    lat, lon, azimuth, distance, rise, hi, ht
):
    """Lines of 2 m to 20 km, rising or falling up to half their length, anywhere but the
    poles: slope, refracted zenith and azimuth partials against central differences."""
    line = Geodesic.WGS84.Direct(lat, lon, azimuth, distance)
    frm = GRS80.to_ecef(math.radians(lat), math.radians(lon), 200.0)
    to = GRS80.to_ecef(
        math.radians(line["lat2"]), math.radians(line["lon2"]), 200.0 + rise * distance
    )
    x0 = np.concatenate([frm, to])
    for function, options in [
        (frames.slope_distance, {}),
        (frames.zenith_angle, {"k": 0.13}),
        (frames.horizon_azimuth, {}),
    ]:
        equation = function(GRS80, frm, to, hi, ht, **options)
        analytic = np.concatenate([equation.d_from[0], equation.d_to[0]])

        def change(x, f=function, o=options, start=equation.value[0]):
            # differences of an azimuth are taken across north (0 = 2π)
            return (
                np.remainder(f(GRS80, x[:3], x[3:], hi, ht, **o).value - start + np.pi, 2 * np.pi)
                - np.pi
            )

        # steps of 1 mm: rounding of the 6e6 m coordinates (1e-9 m) stays below 1e-6 of the
        # result and the truncation, (step/distance)², below 3e-7 on a 2 m line
        numeric = approx_derivative(change, x0, method="3-point", abs_step=1e-3)
        scale = np.abs(analytic).max()
        assert np.abs(numeric.ravel() - analytic).max() < 1e-5 * scale, function.__name__


def test_turning_of_the_horizon_is_in_the_partials():
    """Without the frame's turning the zenith partials would be off by about S/R relative:
    the sum of the partials to the two ends is not zero (a rigid shift along the Earth turns
    the normal), and equals that of the finite differences."""
    frm, to, heights = _pairs(4, seed=3, spread=0.05)
    equation = frames.zenith_angle(GRS80, frm, to, **heights)
    total = equation.d_from + equation.d_to
    assert np.abs(total).max() > 1e-9
    for row in range(4):

        def shifted(t, row=row):
            delta = np.asarray(t)
            return frames.zenith_angle(
                GRS80,
                frm[row] + delta,
                to[row] + delta,
                hi=heights["hi"][row],
                ht=heights["ht"][row],
            ).value

        numeric = approx_derivative(shifted, np.zeros(3), method="3-point", abs_step=1e-2)
        assert numeric.ravel() == pytest.approx(total[row], abs=1e-12)


# --- closed forms on a sphere -------------------------------------------------------------------


@pytest.mark.parametrize("theta", [1e-4, 1e-3, 8e-3])
def test_sphere_law_of_cosines(theta):
    """On a sphere (f = 0) the instrument at radius r₁ and the target at r₂, central angle θ:
    S² = r₁² + r₂² − 2 r₁ r₂ cos θ and cos z = (r₂ cos θ − r₁)/S (the triangle with the
    centre; written with sin²(θ/2), which does not cancel), and the azimuth is the great
    circle's, tan α = sin Δλ cos φ₂ / (cos φ₁ sin φ₂ − sin φ₁ cos φ₂ cos Δλ)."""
    lat1, lon1, azimuth = 0.7, 0.3, math.radians(37.0)
    # destination on the sphere along the great circle (closed form)
    lat2 = math.asin(
        math.sin(lat1) * math.cos(theta) + math.cos(lat1) * math.sin(theta) * math.cos(azimuth)
    )
    lon2 = lon1 + math.atan2(
        math.sin(azimuth) * math.sin(theta) * math.cos(lat1),
        math.cos(theta) - math.sin(lat1) * math.sin(lat2),
    )
    h1, h2, hi, ht = 120.0, 480.0, 1.55, 1.80
    frm, to = SPHERE.to_ecef(lat1, lon1, h1), SPHERE.to_ecef(lat2, lon2, h2)
    r1, r2 = SPHERE.a + h1 + hi, SPHERE.a + h2 + ht
    half = math.sin(theta / 2) ** 2
    slope = math.sqrt((r1 - r2) ** 2 + 4 * r1 * r2 * half)
    zenith = math.acos((r2 - r1 - 2 * r2 * half) / slope)
    assert frames.slope_distance(SPHERE, frm, to, hi, ht).value[0] == pytest.approx(
        slope, rel=1e-12
    )
    assert frames.zenith_angle(SPHERE, frm, to, hi, ht).value[0] == pytest.approx(zenith, abs=1e-11)
    dlon = lon2 - lon1
    great_circle = math.atan2(
        math.sin(dlon) * math.cos(lat2),
        math.cos(lat1) * math.sin(lat2) - math.sin(lat1) * math.cos(lat2) * math.cos(dlon),
    )
    assert frames.horizon_azimuth(SPHERE, frm, to, hi, ht).value[0] == pytest.approx(
        great_circle % (2 * math.pi), abs=1e-11
    )
    assert great_circle == pytest.approx(azimuth, abs=1e-11)


def test_same_height_line_on_a_sphere_dips_by_half_the_central_angle():
    """Two points at the same height on a sphere: the chord leaves the instrument θ/2 below
    its horizon, so z = 90° + θ/2 exactly (isosceles triangle with the centre)."""
    theta = 2e-3
    frm = SPHERE.to_ecef(0.0, 0.0, 35.0)
    to = SPHERE.to_ecef(0.0, theta, 35.0)
    z = frames.zenith_angle(SPHERE, frm, to).value[0]
    assert z == pytest.approx(math.pi / 2 + theta / 2, abs=1e-13)


def test_trigonometric_heighting_curvature_and_refraction():
    """Lecture notes after Wolf and Ghilani, *Elementary Surveying*: at D = 1000 ft with
    R = 20,906,000 ft the curvature is 0.023917 ft, the refraction 0.003348 ft and the
    combined correction 0.020568 ft (that is (1 − k)·D²/(2R) with k = 0.14; k from the ratio
    of the printed numbers, computed).  On a sphere of that radius, a target at the
    instrument's height lies S·|cos z| below the line of sight: the curvature with k = 0,
    the combined correction with refraction (the model's refraction radius is 6,371,000 m,
    0.02 % shorter than R: 6e-7 ft here)."""
    earth = Ellipsoid(20_906_000 * FOOT, 0.0)
    theta = 1000 * FOOT / earth.a
    frm, to = earth.to_ecef(0.4, 0.1, 0.0), earth.to_ecef(0.4 + theta, 0.1, 0.0)
    slope = frames.slope_distance(earth, frm, to).value[0]
    drop = -slope * math.cos(frames.zenith_angle(earth, frm, to).value[0]) / FOOT
    seen = -slope * math.cos(frames.zenith_angle(earth, frm, to, k=0.14).value[0]) / FOOT
    assert drop == pytest.approx(0.023917, abs=1e-6)
    assert drop - seen == pytest.approx(0.003348, abs=1e-6)
    assert seen == pytest.approx(0.020568, abs=1.5e-6)


def test_point_straight_above_and_below():
    """A target on the instrument's normal: zenith 0 above, 180° below, slope = the height
    difference; the azimuth is undefined and refused."""
    lat, lon = 0.0, 0.0  # on the X axis the vertical has exactly zero east and north
    mark = GRS80.to_ecef(lat, lon, 100.0)
    above = GRS80.to_ecef(lat, lon, 160.0)
    assert frames.zenith_angle(GRS80, mark, above).value[0] == pytest.approx(0.0, abs=1e-9)
    assert frames.zenith_angle(GRS80, above, mark).value[0] == pytest.approx(math.pi, abs=1e-9)
    assert frames.slope_distance(GRS80, mark, above, hi=1.5).value[0] == pytest.approx(
        58.5, abs=1e-9
    )
    with pytest.raises(ZeroDivisionError, match="straight above"):
        frames.horizon_azimuth(GRS80, mark, GRS80.to_ecef(lat, lon, 130.0))
    with pytest.raises(ZeroDivisionError, match="coincide"):
        frames.slope_distance(GRS80, mark, mark)


def test_lifted_points_keep_latitude_and_longitude():
    frm, _, heights = _pairs(50, seed=2)
    lat, lon, h = GRS80.from_ecef(frm)
    up = frames.lifted(GRS80, frm, heights["hi"])
    lat2, lon2, h2 = GRS80.from_ecef(up)
    assert np.abs(lat2 - lat).max() < 1e-14 and np.abs(lon2 - lon).max() < 1e-14
    assert np.abs(h2 - h - heights["hi"]).max() < 1e-8


# --- the ellipsoid: PROJ's topocentric frame and geodesics --------------------------------------


def test_local_vector_agrees_with_proj_topocentric_conversion():
    """PROJ's topocentric conversion (east, north, up of a point about an origin on the
    ellipsoid) gives the same local components as ``local_vector``."""
    frm, to, _ = _pairs(30, seed=9, spread=0.2)
    vector = frames.local_vector(GRS80, frm, to)
    for row in range(len(frm)):
        x0, y0, z0 = (float(v) for v in frm[row])
        topo = pyproj.Transformer.from_pipeline(
            f"+proj=topocentric +ellps=GRS80 +X_0={x0!r} +Y_0={y0!r} +Z_0={z0!r}"
        )
        e, n, u = topo.transform(*to[row])
        assert vector.enu[row] == pytest.approx([e, n, u], abs=1e-6)


@pytest.mark.parametrize("distance", [2_000.0, 10_000.0])
def test_short_lines_against_geodesics_of_geographiclib(distance):
    """Marks on the ellipsoid (h = 0) joined by a geodesic of length s (geographiclib's
    direct problem): the horizon azimuth is the geodesic's starting azimuth to within the
    normal-section/geodesic difference (below e²s²/(12N²) ≈ 1.5e-9 rad at 10 km), the chord
    is s − s³/(24R_α²) with R_α Euler's radius in the azimuth α, and the zenith angle of
    the chord is 90° + s/(2R_α) to first order."""
    geod = Geodesic(GRS80.a, GRS80.f)
    for lat_deg, azimuth_deg in [(0.0, 45.0), (47.5, 10.0), (-33.9, 128.0), (71.0, 271.0)]:
        line = geod.Direct(lat_deg, 20.0, azimuth_deg, distance)
        frm = GRS80.to_ecef(math.radians(lat_deg), math.radians(20.0), 0.0)
        to = GRS80.to_ecef(math.radians(line["lat2"]), math.radians(line["lon2"]), 0.0)
        azimuth = frames.horizon_azimuth(GRS80, frm, to).value[0]
        bound = 1.2 * GRS80.e2 * distance**2 / (12 * GRS80.a**2)
        gap = math.remainder(azimuth - math.radians(azimuth_deg), 2 * math.pi)
        assert abs(gap) <= bound + 1e-12
        lat = math.radians(lat_deg)
        m, n = GRS80.meridian_radius(lat), GRS80.prime_vertical_radius(lat)
        alpha = math.radians(azimuth_deg)
        euler = 1.0 / (math.cos(alpha) ** 2 / m + math.sin(alpha) ** 2 / n)
        chord = frames.slope_distance(GRS80, frm, to).value[0]
        assert chord == pytest.approx(distance - distance**3 / (24 * euler**2), abs=1e-6)
        zenith = frames.zenith_angle(GRS80, frm, to).value[0]
        assert zenith == pytest.approx(math.pi / 2 + distance / (2 * euler), abs=2e-8)


def test_geodetic_azimuth_is_grid_azimuth_plus_convergence_near_the_site():
    """In the site grid, over 300 m lines within 150 m of the meridian, the horizon azimuth
    equals the grid azimuth plus the convergence, to within the arc-to-chord correction of
    a transverse Mercator, |ΔN|(2|x₁| + |x₂|)/(6R²) ≤ 300·(3·450)/(6·6.37e6²) ≈ 1.7e-9 rad."""
    grid = local_crs(math.radians(52.1), math.radians(5.2))
    rng = np.random.default_rng(4)
    east0, north0 = rng.uniform(-150, 150, 20), rng.uniform(-2000, 2000, 20)
    angle = rng.uniform(0, 2 * np.pi, 20)
    east1, north1 = east0 + 300 * np.sin(angle), north0 + 300 * np.cos(angle)
    frm = grid.grid_to_ecef(east0, north0, np.zeros(20))
    to = grid.grid_to_ecef(east1, north1, np.zeros(20))
    lat, lon = grid.grid_to_geodetic(east0, north0)
    gamma = grid.factors(lat, lon).convergence
    azimuth = frames.horizon_azimuth(GRS80, frm, to).value
    gap = np.angle(np.exp(1j * (azimuth - (angle + gamma))))
    assert np.abs(gap).max() < 2e-9


# --- covariances --------------------------------------------------------------------------------


def test_local_covariance_round_trip_and_axes():
    """Σ_X = Rᵀ Σ_enu R and back; an up-only variance lies along the ellipsoid normal."""
    rng = np.random.default_rng(8)
    lat, lon = rng.uniform(-1.5, 1.5, 10), rng.uniform(-3, 3, 10)
    factor = rng.normal(size=(10, 3, 3))
    cov = factor @ np.transpose(factor, (0, 2, 1))
    back = frames.ecef_to_enu_covariance(lat, lon, frames.enu_to_ecef_covariance(lat, lon, cov))
    assert np.abs(back - cov).max() < 1e-12
    up_only = frames.enu_sd_to_ecef_covariance(lat, lon, np.tile([0.0, 0.0, 0.01], (10, 1)))
    normal = frames.enu_rotation(lat, lon)[:, 2, :]
    expected = 1e-4 * normal[:, :, None] * normal[:, None, :]
    assert np.abs(up_only - expected).max() < 1e-18


def test_monte_carlo_local_errors_to_earth_centred_and_through_a_zenith_angle():
    """Simulated local errors (east 4 mm, north 3 mm, up 9 mm) at both ends of a line: their
    Earth-centred sample covariance matches Rᵀ diag(σ²) R, and the spread of the zenith
    angles matches the propagation g Σ gᵀ with the analytic partials (200,000 draws:
    sampling error of a variance about 0.3 %)."""
    rng = np.random.default_rng(21)
    draws = 200_000
    lat, lon = math.radians(-23.5), math.radians(-46.6)
    frm = GRS80.to_ecef(lat, lon, 760.0)
    to = GRS80.to_ecef(lat + 2e-4, lon - 1e-4, 790.0)
    sd = np.array([0.004, 0.003, 0.009])
    cov_from = frames.enu_sd_to_ecef_covariance(lat, lon, sd)[0]
    lat_to, lon_to, _ = GRS80.from_ecef(to)
    cov_to = frames.enu_sd_to_ecef_covariance(lat_to, lon_to, sd)[0]
    rot_from = frames.enu_rotation(lat, lon)[0]
    rot_to = frames.enu_rotation(lat_to, lon_to)[0]
    err_from = (rng.normal(size=(draws, 3)) * sd) @ rot_from
    err_to = (rng.normal(size=(draws, 3)) * sd) @ rot_to
    assert np.cov(err_from.T) == pytest.approx(cov_from, abs=0.01 * sd.max() ** 2)
    zeniths = frames.zenith_angle(GRS80, frm + err_from, to + err_to, hi=1.5, ht=1.7, k=0.13).value
    eq = frames.zenith_angle(GRS80, frm, to, hi=1.5, ht=1.7, k=0.13)
    predicted = eq.d_from[0] @ cov_from @ eq.d_from[0] + eq.d_to[0] @ cov_to @ eq.d_to[0]
    assert np.var(zeniths) == pytest.approx(predicted, rel=0.015)


def test_baseline_centering_is_horizontal_at_each_end():
    """Centering c adds c² in east and north at both ends and nothing along either normal."""
    lat = np.array([0.9, 0.9])
    lon = np.array([0.1, 0.1001])
    cov = frames.baseline_centering_covariance(lat[0], lon[0], lat[1], lon[1], 0.002)[0]
    local = frames.ecef_to_enu_covariance(lat[:1], lon[:1], cov[None])[0]
    assert local[0, 0] == pytest.approx(2 * 0.002**2, rel=1e-6)
    assert local[1, 1] == pytest.approx(2 * 0.002**2, rel=1e-6)
    assert abs(local[2, 2]) < 1e-12  # the normals 600 m apart differ by 1e-4 rad
    value, d_from, d_to = frames.baseline(
        GRS80.to_ecef(lat, lon, 0.0)[:1], GRS80.to_ecef(lat, lon, 0.0)[1:]
    )
    assert value.shape == (1, 3) and (d_from == -np.eye(3)).all() and (d_to == np.eye(3)).all()


def test_ellipse_azimuth_is_clockwise_from_geodetic_north():
    """A covariance elongated along the local direction 30° east of north comes back with its
    major axis at azimuth 30° when carried to Earth-centred axes and back."""
    lat, lon = np.array([0.5]), np.array([-1.2])
    alpha = math.radians(30.0)
    axis = np.array([math.sin(alpha), math.cos(alpha), 0.0])
    cov_enu = (0.01**2 * np.outer(axis, axis) + 0.002**2 * np.eye(3))[None]
    cov = frames.ecef_to_enu_covariance(lat, lon, frames.enu_to_ecef_covariance(lat, lon, cov_enu))
    see, sen, snn = cov[0, 0, 0], cov[0, 0, 1], cov[0, 1, 1]
    azimuth = math.degrees(0.5 * math.atan2(2 * sen, snn - see)) % 180.0
    assert azimuth == pytest.approx(30.0, abs=1e-9)


def test_baseline_covariance_from_sd_and_correlations_and_its_refusals():
    """Σ = diag(σ) ρ diag(σ); draws from it (200,000, Cholesky) give back the σ and the
    correlations.  Correlations of ±1 and sets no three errors can have are refused."""
    sd = np.array(
        [
            [0.003, 0.004, 0.008],
            [0.002, 0.002, 0.002],
            [0.003, 0.003, 0.003],
            [0.003, 0.003, 0.003],
            [0.003, 0.0, 0.003],
        ]
    )
    corr = np.array(
        [[0.4, -0.3, 0.6], [0.0, 0.0, 0.0], [1.0, 0.0, 0.0], [0.9, 0.9, -0.9], [0.1, 0.1, 0.1]]
    )
    cov, positive = frames.baseline_covariance(sd, corr)
    assert positive.tolist() == [True, True, False, False, False]
    draws = np.random.default_rng(17).normal(size=(200_000, 3)) @ np.linalg.cholesky(cov[0]).T
    assert draws.std(axis=0) == pytest.approx(sd[0], rel=0.01)
    sample = np.corrcoef(draws.T)
    assert [sample[0, 1], sample[0, 2], sample[1, 2]] == pytest.approx(corr[0], abs=0.01)


def test_horizon_distance_is_the_horizontal_part_of_the_slope_distance():
    """On a sphere, the horizon distance to a point at central angle θ and radius r₂ is
    r₂ sin θ, whatever the instrument's height."""
    theta = 1.5e-4
    frm = SPHERE.to_ecef(0.3, 0.2, 10.0)
    to = SPHERE.to_ecef(0.3 + theta, 0.2, 250.0)
    expected = (SPHERE.a + 250.0) * math.sin(theta)
    assert frames.horizon_distance(SPHERE, frm, to)[0] == pytest.approx(expected, rel=1e-12)


def test_the_pieces_fit_a_gauss_newton_adjustment_of_a_small_3d_network():
    """How the kinds table will use these functions: rows of values and partials placed in
    the columns of the marks' X, Y, Z.  Observations computed from known positions on a
    site grid (slope distances, refracted zeniths, azimuths, two baselines) bring start
    positions 0.5 m off back to those positions in a few Gauss–Newton steps."""
    grid = local_crs(math.radians(-33.9), math.radians(18.4), 10_000.0, 50_000.0)
    names = ["A", "B", "C", "D"]
    truth = grid.grid_to_ecef(
        np.array([10_000.0, 10_480.0, 9_620.0, 10_150.0]),
        np.array([50_000.0, 50_310.0, 50_420.0, 50_900.0]),
        np.array([31.0, 45.5, 12.2, 80.9]),
    )
    lines = [("A", "B"), ("A", "C"), ("B", "C"), ("C", "D"), ("B", "D"), ("A", "D")]
    frm = [names.index(a) for a, _ in lines]
    to = [names.index(b) for _, b in lines]
    hi, ht = 1.55, 1.70

    def observe(xyz):
        rows = [
            frames.slope_distance(GRS80, xyz[frm], xyz[to], hi, ht),
            frames.zenith_angle(GRS80, xyz[frm], xyz[to], hi, ht, k=0.13),
            frames.horizon_azimuth(GRS80, xyz[frm], xyz[to]),
        ]
        values = np.concatenate([r.value for r in rows])
        design = np.zeros((len(values) + 6, 12))
        for block, r in enumerate(rows):
            for i, (f, t) in enumerate(zip(frm, to, strict=True)):
                design[block * len(lines) + i, 3 * f : 3 * f + 3] += r.d_from[i]
                design[block * len(lines) + i, 3 * t : 3 * t + 3] += r.d_to[i]
        base, d_from, d_to = frames.baseline(xyz[[0, 1]], xyz[[3, 3]])
        for i, (f, t) in enumerate(((0, 3), (1, 3))):
            design[len(values) + 3 * i : len(values) + 3 * i + 3, 3 * f : 3 * f + 3] = d_from[i]
            design[len(values) + 3 * i : len(values) + 3 * i + 3, 3 * t : 3 * t + 3] = d_to[i]
        return np.concatenate([values, base.ravel()]), design

    observed, _ = observe(truth)
    position = truth + np.random.default_rng(12).normal(scale=0.5, size=truth.shape)
    position[0] = truth[0]  # A held
    for _ in range(6):
        computed, design = observe(position)
        misclosure = observed - computed
        rows = len(lines)
        misclosure[2 * rows : 3 * rows] = (
            np.remainder(misclosure[2 * rows : 3 * rows] + np.pi, 2 * np.pi) - np.pi
        )
        weights = np.concatenate(
            [np.full(rows, 1 / 0.003), np.full(2 * rows, 1 / 5e-6), np.full(6, 1 / 0.005)]
        )
        step, *_ = np.linalg.lstsq(
            design[:, 3:] * weights[:, None], misclosure * weights, rcond=None
        )
        position[1:] += step.reshape(3, 3)
    assert np.abs(position - truth).max() < 1e-7
