"""Start values of the geodetic 3D model, held to invented true networks.

The true positions are latitude, longitude and ellipsoidal height on GRS80 around 47° N,
8° E; their Earth-centred coordinates and the local east, north, up vectors of every sight
come from PROJ (pyproj pipelines ``cart`` and ``topocentric``), an outside computation, not
the module's own formulas.  Observations are synthesized exactly from them.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from pyproj import Transformer

from server.geodesy.start3d import (
    EARTH_RADIUS,
    Baseline,
    DirectionRound,
    GridDistance,
    HeightDifference,
    KnownHeight,
    KnownPoint,
    SlopeDistance,
    UnreachablePointsError,
    ZenithAngle,
    start_positions,
    trigonometric_height_difference,
)

K = 0.13
TRUE = {  # name: (lat°, lon°, h m)
    "A": (47.000, 8.000, 452.0),
    "B": (47.009, 8.004, 478.5),
    "P1": (47.004, 8.012, 503.2),
    "P2": (46.995, 8.010, 560.7),
    "P3": (47.010, 8.018, 421.9),
    "P4": (46.991, 8.001, 598.0),
}
_CART = Transformer.from_pipeline(
    "+proj=pipeline +step +proj=axisswap +order=2,1 +step +proj=unitconvert +xy_in=deg "
    "+xy_out=rad +step +proj=cart +ellps=GRS80"
)


def ecef(name: str, lift: float = 0.0) -> np.ndarray:
    lat, lon, h = TRUE[name]
    return np.array(_CART.transform(lat, lon, h + lift))


def topocentric(station: str, target: str, hi: float, ht: float) -> np.ndarray:
    """East, north, up of target + ht seen from station + hi (PROJ topocentric)."""
    lat, lon, h = TRUE[station]
    t = Transformer.from_pipeline(
        "+proj=pipeline +step +proj=axisswap +order=2,1 +step +proj=unitconvert +xy_in=deg "
        f"+xy_out=rad +step +proj=cart +ellps=GRS80 +step +proj=topocentric +ellps=GRS80 "
        f"+lat_0={lat} +lon_0={lon} +h_0={h + hi}"
    )
    tl, tn, th = TRUE[target]
    return np.array(t.transform(tl, tn, th + ht))


def sight(station, target, hi=1.55, ht=1.8, noise=None):
    """Slope distance and refracted zenith angle, and the azimuth, by PROJ's frame."""
    e, n, u = topocentric(station, target, hi, ht)
    s = math.sqrt(e * e + n * n + u * u)
    z = math.atan2(math.hypot(e, n), u) - K * s / (2 * EARTH_RADIUS)
    if noise is not None:
        s += noise.normal(0, 0.02)
        z += noise.normal(0, 0.02 / s)
    return (
        SlopeDistance(station, target, s, hi, ht),
        ZenithAngle(station, target, z, hi, ht, K),
        math.atan2(e, n),
    )


def round_from(station, targets, zero=1.234, noise=None):
    dirs = []
    for t in targets:
        e, n, _ = topocentric(station, t, 0.0, 0.0)
        r = math.atan2(e, n) - zero
        if noise is not None:
            r += noise.normal(0, 0.02 / math.hypot(e, n))
        dirs.append((t, r))
    return DirectionRound(station, tuple(dirs))


def control(*names):
    return [KnownPoint(n, tuple(ecef(n)), control=True) for n in names]


def error(result, name):
    return float(np.linalg.norm(np.array(result.positions[name]) - ecef(name)))


def polar_network(noise=None):
    obs = [round_from("A", ["B", "P1", "P2"], noise=noise)]
    for t in ("P1", "P2"):
        s, z, _ = sight("A", t, noise=noise)
        obs += [s, z]
    obs.append(round_from("P1", ["A", "P3"], zero=-0.4, noise=noise))
    s, z, _ = sight("P1", "P3", noise=noise)
    return obs + [s, z]


def test_polar_ties_with_trigonometric_heights_reach_exact_positions():
    result = start_positions(control("A", "B"), polar_network())
    for name in ("P1", "P2", "P3"):
        assert error(result, name) < 0.003, name
    assert result.methods["P3"] == "polar tie from P1"


def test_polar_ties_with_2cm_noise_stay_within_decimetres():
    rng = np.random.default_rng(7)
    result = start_positions(control("A", "B"), polar_network(rng))
    for name in ("P1", "P2", "P3"):
        assert error(result, name) < 0.15, name


def test_baselines_alone_chain_out_of_control_both_ways():
    def bl(f, t):
        d = ecef(t) - ecef(f)
        return Baseline(f, t, *d)

    obs = [bl("A", "P1"), bl("P2", "P1"), bl("P2", "P3"), bl("P4", "A")]
    result = start_positions(control("A"), obs)
    for name in ("P1", "P2", "P3", "P4"):
        assert error(result, name) < 1e-6, name
    assert result.methods["P2"] == "baseline from P1"


def test_unreachable_points_are_named():
    obs = polar_network() + [HeightDifference("P4", "B", 1.0)]
    with pytest.raises(UnreachablePointsError) as caught:
        start_positions(control("A", "B"), obs + [Baseline("P5", "P4", 1.0, 2.0, 3.0)])
    assert isinstance(caught.value, ValueError)
    assert caught.value.points == ("P4", "P5")
    assert "cannot compute approximate positions for: P4, P5" in str(caught.value)


def test_grid_distance_and_leveling_reach_a_point_with_undulations():
    """Direction + ellipsoidal distance gives φ, λ; a leveled ΔH gives the height."""
    from pyproj import Geod

    lat_a, lon_a, _ = TRUE["A"]
    lat_4, lon_4, h_4 = TRUE["P4"]
    _, _, dist = Geod(ellps="GRS80").inv(lon_a, lat_a, lon_4, lat_4)
    und = {"A": 47.9, "P4": 48.3}
    dh = (h_4 - und["P4"]) - (TRUE["A"][2] - und["A"])
    obs = [
        round_from("A", ["B", "P4"]),
        GridDistance("A", "P4", dist * 0.9996, 0.9996),
        HeightDifference("A", "P4", dh),
    ]
    result = start_positions(control("A", "B"), obs, undulations=und)
    assert error(result, "P4") < 0.005


def test_trigonometric_heighting_gives_a_horizontally_known_point_its_height():
    """P2 is given by latitude and longitude only; a sight from A (known height) heights it."""
    s, z, _ = sight("A", "P2")
    h_true = TRUE["P2"][2]
    known = control("A") + [KnownPoint("P2", tuple(ecef("P2", lift=-h_true)), height_known=False)]
    result = start_positions(known, [s, z])
    assert error(result, "P2") < 0.003


def test_a_benchmark_without_a_horizontal_position_is_named():
    s, z, _ = sight("P2", "A")
    known = [KnownPoint("P2", tuple(ecef("P2")), control=True)]
    with pytest.raises(UnreachablePointsError) as caught:
        start_positions(known, [s, z], heights=[KnownHeight("A", TRUE["A"][2])])
    assert caught.value.points == ("A",)


def test_curvature_and_refraction_on_a_one_kilometre_sight():
    """(1 − k)·D²/(2R) with k = 0.13, D = 1000 m, R = 6 371 000 m: 0.06828 m.

    The standard curvature-and-refraction correction of trigonometric heighting
    (docs/references.md "Trigonometric heighting"); hand arithmetic 0.87e6 / 12.742e6.
    """
    v = math.pi / 2
    assert trigonometric_height_difference(1000.0, v, k=0.13) == pytest.approx(0.068278, abs=1e-6)
    # and against PROJ: a target 1 km away at the station's ellipsoidal height
    TRUE["Q"] = (
        47.0,
        8.0 + 1000.0 / (6_378_137.0 * math.cos(math.radians(47))) * 180 / math.pi,
        452.0,
    )
    try:
        s, z, _ = sight("A", "Q", hi=0.0, ht=0.0)
        dh = trigonometric_height_difference(s.value, z.value, k=K)
        assert abs(dh) < 0.002
        assert s.value * math.cos(z.value) == pytest.approx(-0.068, abs=0.002)
    finally:
        del TRUE["Q"]


def test_slope_and_zenith_to_different_target_heights():
    """The zenith is read to a target 1.8 m up and the distance to a prism 0.3 m up."""
    s, _, _ = sight("A", "P1", hi=1.55, ht=0.3)
    _, z, _ = sight("A", "P1", hi=1.55, ht=1.8)
    obs = [round_from("A", ["B", "P1"]), s, z]
    result = start_positions(control("A", "B"), obs)
    assert error(result, "P1") < 0.003


def test_geodetic_to_earth_centred_matches_a_published_example():
    """53°36′43.1653″N, 1°39′51.9920″W, h 299.800 m on GRS80 → X 3790644.900,
    Y −110149.210, Z 5111482.970 (docs/references.md "Geodetic model and projections").
    """
    from server.geodesy.start3d import GRS80_A, GRS80_F, _Ellipsoid

    ell = _Ellipsoid(GRS80_A, GRS80_F)
    lat = math.radians(53 + 36 / 60 + 43.1653 / 3600)
    lon = -math.radians(1 + 39 / 60 + 51.9920 / 3600)
    xyz = ell.to_ecef(lat, lon, 299.800)
    assert xyz == pytest.approx([3790644.900, -110149.210, 5111482.970], abs=0.001)
    back = ell.from_ecef(xyz)
    assert back[:2] == pytest.approx((lat, lon), abs=1e-12)
    assert back[2] == pytest.approx(299.800, abs=1e-6)
