"""The batched start values hold, number for number, to the point-by-point placement.

``server/geodesy/start3d.py`` decides which method places which point on names alone and
then computes the numbers level by level in numpy batches.  The same formulas are applied
to the same numbers in the same order, so every start position must equal, to the last
bit, what ``tests/start3d_reference.py`` (the placement as first written, one point at a
time) gives: for a network that goes through every method, for the two geodetic demos and
for a benchmark network.  A batch that mixed up its rows, an orientation taken after its
own round had placed points, or a formula written in another order would show here.

The synthetic network's observations are computed from invented true positions through
PROJ (``cart`` and ``topocentric``), and the start positions are also held to that truth
within the accuracy start values need.
"""

from __future__ import annotations

import math
import sys
from pathlib import Path

import numpy as np
import pytest
from pyproj import Geod, Transformer

from server.fieldbook.parser import parse_fieldbook
from server.geodesy import start3d
from server.geodesy.start3d import (
    EARTH_RADIUS,
    Azimuth,
    Baseline,
    DirectionRound,
    GridDistance,
    HeightDifference,
    HorizontalAngle,
    KnownHeight,
    KnownPoint,
    SlopeDistance,
    ZenithAngle,
    start_positions,
)
from server.model import geodetic
from tests.start3d_reference import reference_start_positions

ROOT = Path(__file__).resolve().parent.parent
K = 0.13
TRUE = {  # invented marks: (lat°, lon°, h m) on GRS80
    "A": (47.000, 8.000, 452.0),
    "B": (47.009, 8.004, 478.5),
    "C": (46.996, 7.992, 431.0),
    "D": (47.006, 7.995, 470.3),
    "E": (46.998, 8.009, 440.8),
    "P1": (47.004, 8.012, 503.2),
    "P2": (47.012, 8.015, 512.9),
    "P3": (46.990, 8.003, 598.0),
    "P4": (47.003, 8.006, 466.1),
    "P5": (46.994, 8.004, 447.7),
    "P6": (47.007, 8.010, 489.4),
    "P7": (47.001, 8.013, 472.6),
    "P8": (46.989, 8.011, 455.5),
    "P9": (46.993, 7.986, 420.2),
    "G1": (47.016, 8.001, 501.0),
    "G2": (47.020, 7.993, 520.4),
}
UND = {"B": 47.9, "G1": 48.1, "G2": 48.4}
_CART = Transformer.from_pipeline(
    "+proj=pipeline +step +proj=axisswap +order=2,1 +step +proj=unitconvert +xy_in=deg "
    "+xy_out=rad +step +proj=cart +ellps=GRS80"
)


def ecef(name: str, lift: float = 0.0) -> tuple[float, float, float]:
    lat, lon, h = TRUE[name]
    x, y, z = _CART.transform(lat, lon, h + lift)
    return float(x), float(y), float(z)


def topocentric(station: str, target: str, hi: float, ht: float) -> np.ndarray:
    lat, lon, h = TRUE[station]
    t = Transformer.from_pipeline(
        "+proj=pipeline +step +proj=axisswap +order=2,1 +step +proj=unitconvert +xy_in=deg "
        f"+xy_out=rad +step +proj=cart +ellps=GRS80 +step +proj=topocentric +ellps=GRS80 "
        f"+lat_0={lat} +lon_0={lon} +h_0={h + hi}"
    )
    tl, tn, th = TRUE[target]
    return np.array(t.transform(tl, tn, th + ht))


def sight(station: str, target: str, hi: float = 1.55, ht: float = 1.8):
    e, n, u = topocentric(station, target, hi, ht)
    s = math.sqrt(e * e + n * n + u * u)
    z = math.atan2(math.hypot(e, n), u) - K * s / (2 * EARTH_RADIUS)
    return SlopeDistance(station, target, s, hi, ht), ZenithAngle(station, target, z, hi, ht, K)


def azimuth(station: str, target: str) -> float:
    e, n, _ = topocentric(station, target, 0.0, 0.0)
    return math.atan2(e, n)


def every_method() -> tuple[list[KnownPoint], list[KnownHeight], list[start3d.Observation]]:
    """Control, a point known in latitude and longitude only and a benchmark; baselines
    both ways and chained; rounds with polar ties (one distance booked from the far end);
    an angle, a grid azimuth with its convergence, direction plus grid distance, leveling
    with undulations, and trigonometric heighting of a point that no round reaches."""
    known = [
        KnownPoint("A", ecef("A"), control=True),
        KnownPoint("B", ecef("B"), control=True),
        KnownPoint("C", ecef("C")),
        KnownPoint("D", ecef("D", lift=-TRUE["D"][2]), height_known=False),
    ]
    heights = [KnownHeight("E", TRUE["E"][2] - 0.0)]
    obs: list[start3d.Observation] = [
        Baseline("A", "P1", *np.subtract(ecef("P1"), ecef("A"))),
        Baseline("P1", "P2", *np.subtract(ecef("P2"), ecef("P1"))),
        Baseline("P3", "A", *np.subtract(ecef("A"), ecef("P3"))),
    ]
    zero = 0.8
    obs.append(
        DirectionRound("A", tuple((t, azimuth("A", t) - zero) for t in ("B", "C", "P4", "P5", "E")))
    )
    for t in ("P4", "P5", "E"):
        obs += sight("A", t)
    obs.append(DirectionRound("P4", tuple((t, azimuth("P4", t) + 2.0) for t in ("A", "P6", "P7"))))
    back, _ = sight("P6", "P4", hi=1.6, ht=1.7)  # the distance is booked from the far end
    obs += [back, sight("P4", "P6", hi=1.7, ht=1.6)[1], *sight("P4", "P7")]
    angle = (azimuth("P5", "P8") - azimuth("P5", "A")) % (2 * math.pi)
    obs += [HorizontalAngle("P5", "A", "P8", angle), *sight("P5", "P8")]
    convergence = -0.0021
    obs += [Azimuth("C", "P9", azimuth("C", "P9") - convergence, convergence), *sight("C", "P9")]
    geod = Geod(ellps="GRS80")
    for s, t in (("B", "G1"), ("G1", "G2")):
        _, _, distance = geod.inv(TRUE[s][1], TRUE[s][0], TRUE[t][1], TRUE[t][0])
        back_to = "A" if s == "B" else "B"
        obs.append(DirectionRound(s, tuple((x, azimuth(s, x) - 0.3) for x in (back_to, t))))
        obs.append(GridDistance(s, t, distance * 0.9996, 0.9996))
        dh = (TRUE[t][2] - UND[t]) - (TRUE[s][2] - UND.get(s, 0.0))
        obs.append(HeightDifference(s, t, dh))
    obs += sight("A", "D")  # D has no round: trigonometric heighting only
    return known, heights, obs


def assert_same(result: start3d.StartValues, reference: start3d.StartValues) -> None:
    assert list(result.positions) == list(reference.positions)
    different = [n for n in reference.positions if result.positions[n] != reference.positions[n]]
    assert not different, f"start positions differ in their bits: {different[:5]}"
    assert result.methods == reference.methods


def test_every_method_gives_the_numbers_of_the_point_by_point_placement():
    known, heights, obs = every_method()
    result = start_positions(known, obs, heights=heights, undulations=UND)
    reference = reference_start_positions(known, obs, heights=heights, undulations=UND)
    assert_same(result, reference)
    assert set(result.positions) == set(TRUE)
    assert result.methods["P2"] == "baseline from P1"
    assert result.methods["P8"] == "polar tie from P5"
    assert result.methods["G2"] == "direction and grid distance from G1"
    # and the start values are where the marks truly are (start values need decimetres)
    for name in TRUE:
        error = np.subtract(result.positions[name], ecef(name))
        assert float(np.linalg.norm(error)) < 0.05, name


def _inputs(text: str):
    """The start-value inputs ``geodetic_frame`` hands to ``start3d`` for a field book."""
    book = parse_fieldbook(text)
    crs = geodetic.resolve_crs(book)
    assert crs is not None
    und = geodetic.undulations(book)
    known, heights = geodetic._given_points(book.points, crs, und)
    known += geodetic._height_only(book, crs, known)
    observations = geodetic._start_observations(book, crs, known)
    ell = {"a": crs.ellipsoid.a, "f": crs.ellipsoid.f}
    return known, observations, {"heights": heights, "undulations": und, **ell}


@pytest.mark.parametrize("demo", ["dam_control_3d", "dam_control_3d_blunder"])
def test_the_geodetic_demos_start_where_the_point_by_point_placement_starts(demo):
    text = (ROOT / "demo_projects" / f"{demo}.fieldbook").read_text()
    known, observations, options = _inputs(text)
    assert_same(
        start_positions(known, observations, **options),
        reference_start_positions(known, observations, **options),
    )


def test_a_benchmark_network_of_400_points_starts_where_the_point_by_point_placement_starts():
    sys.path.insert(0, str(ROOT / "bench"))
    try:
        import networks  # bench/networks.py: the benchmark field books
    finally:
        sys.path.remove(str(ROOT / "bench"))
    known, observations, options = _inputs(networks.geodetic(400, seed=3))
    result = start_positions(known, observations, **options)
    assert_same(result, reference_start_positions(known, observations, **options))
    assert len(result.positions) == 400


@pytest.mark.parametrize("seed", range(4))
def test_any_order_of_the_observations_gives_the_numbers_of_the_point_by_point_placement(seed):
    """The order of the observations decides which point is placed from which: shuffled,
    the placement changes, and the batched numbers must still follow it bit for bit."""
    import random

    known, heights, obs = every_method()
    random.Random(seed).shuffle(obs)
    result = start_positions(known, obs, heights=heights, undulations=UND)
    assert_same(result, reference_start_positions(known, obs, heights=heights, undulations=UND))
