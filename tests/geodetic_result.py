"""A hand-made result of the geodetic model, for testing outputs before the adjustment exists.

Invented site and names.  Point figures come from ``server.results.geodetic`` for invented
Earth-centred positions and covariances on a site grid; observations are typed in.  One
point name carries characters that HTML must escape.
"""

from __future__ import annotations

import math

import numpy as np

from server.geodesy.crs import local_crs
from server.results.geodetic import point_values
from server.results.types import (
    AdjustmentResult,
    BaselineTestResult,
    Ellipse,
    GlobalTest,
    ObservationResult,
    PointResult,
    RelativeResult,
    Summary,
)

SITE_LAT, SITE_LON = 46.512, 7.231  # an invented site grid origin
CRS_LINE = "local lat=46.512 lon=7.231 east=1000 north=5000"
NAMES = ("GN-1", "GN-2", "TS<1>&")
GEOID = 47.85


def _points() -> tuple[PointResult, ...]:
    crs = local_crs(math.radians(SITE_LAT), math.radians(SITE_LON), 1000.0, 5000.0)
    lat = np.radians([SITE_LAT, SITE_LAT + 0.004, SITE_LAT - 0.002])
    lon = np.radians([SITE_LON, SITE_LON + 0.006, SITE_LON + 0.003])
    xyz = crs.geodetic_to_ecef(lat, lon, np.array([612.3, 640.9, 598.2]))
    cov = np.array(
        [
            np.zeros((3, 3)),
            np.diag([4e-6, 9e-6, 2.5e-5]),
            np.array([[6e-6, 2e-6, 1e-6], [2e-6, 5e-6, 0.0], [1e-6, 0.0, 2e-5]]),
        ]
    )
    got = point_values(crs, xyz, cov, np.full(3, GEOID), 2.4477)
    points = []
    for k, name in enumerate(NAMES):
        fixed = "enh" if k == 0 else ""
        ellipse = (
            None
            if fixed
            else Ellipse(
                semi_major=float(got.semi_major[k]),
                semi_minor=float(got.semi_minor[k]),
                azimuth=float(got.azimuth[k]),
                confidence=0.95,
            )
        )
        points.append(
            PointResult(
                name=name,
                east=float(got.east[k]),
                north=float(got.north[k]),
                height=float(got.height[k]),
                sd_east=float(got.sd_east[k]),
                sd_north=float(got.sd_north[k]),
                sd_height=float(got.sd_up[k]),
                fixed=fixed,
                weighted="",
                ellipse=ellipse,
                latitude=float(got.latitude[k]),
                longitude=float(got.longitude[k]),
                ellipsoidal_height=float(got.ellipsoidal_height[k]),
                geoid=GEOID,
                scale_factor=float(got.scale_factor[k]),
                convergence=float(got.convergence[k]),
            )
        )
    return tuple(points)


def _baseline(
    line: int,
    frm: str,
    to: str,
    values: tuple[float, float, float],
    w: tuple[float, float, float],
    flagged: int | None,
) -> list[ObservationResult]:
    return [
        ObservationResult(
            line=line,
            kind="baseline",
            from_point=frm,
            at=None,
            to=to,
            observed=value,
            adjusted=value + 0.001 * wk,
            residual=0.001 * wk,
            sd=0.004,
            redundancy=0.41,
            w=wk,
            mdb=0.026,
            flagged=index == flagged,
            ignored=False,
            booked=value,
            component=component,
        )
        for index, (component, value, wk) in enumerate(zip(("dx", "dy", "dz"), values, w))
    ]


def geodetic_result() -> AdjustmentResult:
    """Three points, two baselines (one with a flagged component), a slope and a zenith."""
    observations = (
        _baseline(12, "GN-1", "GN-2", (-412.3051, 389.9952, 311.0487), (0.4, -1.1, 0.7), None)
        + _baseline(13, "GN-1", "TS<1>&", (-98.7713, 236.4402, -151.5530), (0.2, 4.6, -0.9), 1)
        + [
            ObservationResult(
                line=20,
                kind="slope",
                from_point="TS<1>&",
                at=None,
                to="GN-2",
                observed=587.4321,
                adjusted=587.4302,
                residual=-0.0019,
                sd=0.002,
                redundancy=0.52,
                w=-1.32,
                mdb=0.011,
                flagged=False,
                ignored=False,
                booked=587.4321,
            ),
            ObservationResult(
                line=21,
                kind="zenith",
                from_point="TS<1>&",
                at=None,
                to="GN-2",
                observed=85.123456,
                adjusted=85.123901,
                residual=1.6,
                sd=1.0,
                redundancy=0.33,
                w=2.79,
                mdb=7.2,
                flagged=False,
                ignored=False,
                booked=85.123456,
            ),
        ]
    )
    summary = Summary(
        dimension=3,
        points=3,
        observations=4,
        used_observations=8,
        unknowns=6,
        redundancy=2,
        iterations=3,
        converged=True,
        variance_factor=2.9,
        global_test=GlobalTest(statistic=5.8, lower=0.05, upper=7.38, alpha=0.05, passed=True),
        critical_w=3.2905,
        lambda0=17.075,
        ellipse_factor=2.4477,
        alpha=0.05,
        snooping=0.001,
        power=0.80,
        confidence=0.95,
        model="geodetic",
        crs=CRS_LINE,
        refraction=0.13,
    )
    tests = (
        BaselineTestResult(
            line=12,
            from_point="GN-1",
            to_point="GN-2",
            statistic=1.93,
            critical=16.266,
            flagged=False,
        ),
        BaselineTestResult(
            line=13,
            from_point="GN-1",
            to_point="TS<1>&",
            statistic=22.4,
            critical=16.266,
            flagged=True,
        ),
    )
    relative = (
        RelativeResult(
            from_point="GN-2",
            to_point="TS<1>&",
            distance=466.2,
            semi_major=0.011,
            semi_minor=0.006,
            azimuth=41.0,
            confidence=0.95,
            allowed=None,
            passed=None,
            sd_distance=0.003,
        ),
    )
    return AdjustmentResult(
        title="Alder Combe <survey> & checks",
        source="alder_combe.fieldbook",
        length_unit="m",
        angle_unit="dms",
        text_sha256="cd" * 32,
        summary=summary,
        points=_points(),
        observations=tuple(observations),
        misclosures=(),
        relative=relative,
        warnings=(),
        baseline_tests=tests,
    )
