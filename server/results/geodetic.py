"""What a surveyor reads for a point of the geodetic model, from its Earth-centred position.

Given a ``Crs``, positions X, Y, Z (metres, on the CRS's ellipsoid) and their 3×3
covariances (already scaled by the σ₀² chosen for precisions), this module gives, for
every point at once:

- grid east and north in the CRS's unit (its own projection of φ, λ);
- latitude and longitude in decimal degrees (south and west negative), the ellipsoidal
  height h and the orthometric height H = h − N with the geoid undulation N of the book;
- standard deviations along local east, north and up (the ellipsoid normal), from
  Σ_ENU = R·Σ_XYZ·Rᵀ, R the rows ê, n̂, û at the point (``geodesy.frames``);
- the horizontal error ellipse of the east-north part of Σ_ENU, azimuth clockwise from
  geodetic (true) north in [0°, 180°), standard and scaled to the confidence level by the
  same factor as the plane model's ellipses (``statistics.quality``);
- the point scale factor and the meridian convergence (grid north minus true north) of
  the projection, in decimal degrees.

A relative pair gets the ellipse of the difference B − A in the local axes at A:
Σ_Δ = Σ_AA + Σ_BB − Σ_AB − Σ_BA rotated by A's R; its distance is the grid distance.

Lengths other than grid coordinates are multiplied by ``per_metre`` (the output length
unit per metre); grid coordinates stay in the CRS's own unit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from server.geodesy.crs import Crs
from server.geodesy.frames import ecef_to_enu_covariance, enu_rotation
from server.statistics import quality as st

_DEG_PER_RAD = 180.0 / math.pi


@dataclass(frozen=True, slots=True)
class PointValues:
    """Arrays of shape (n,); lengths in the output unit except ``east``/``north``."""

    east: np.ndarray  # grid, CRS unit
    north: np.ndarray
    latitude: np.ndarray  # decimal degrees
    longitude: np.ndarray
    ellipsoidal_height: np.ndarray
    geoid: np.ndarray  # undulation N used
    height: np.ndarray  # orthometric, h − N
    sd_east: np.ndarray  # along local east, north, up
    sd_north: np.ndarray
    sd_up: np.ndarray
    standard_major: np.ndarray  # standard ellipse (1σ)
    standard_minor: np.ndarray
    semi_major: np.ndarray  # confidence ellipse
    semi_minor: np.ndarray
    azimuth: np.ndarray  # of the major axis, degrees clockwise from true north, [0, 180)
    scale_factor: np.ndarray
    convergence: np.ndarray  # degrees, grid north minus true north


@dataclass(frozen=True, slots=True)
class PairValues:
    """Relative ellipses of n pairs in the local axes at their first point: arrays (n,)."""

    distance: np.ndarray  # grid distance, CRS unit
    semi_major: np.ndarray  # confidence ellipse, output unit
    semi_minor: np.ndarray
    azimuth: np.ndarray
    sd_distance: np.ndarray  # along the line A→B in the horizon plane at A, output unit


def point_values(
    crs: Crs,
    xyz: np.ndarray,
    covariance: np.ndarray,
    geoid: np.ndarray,
    ellipse_factor: float,
    per_metre: float = 1.0,
) -> PointValues:
    """The point figures above for positions (n, 3), covariances (n, 3, 3), undulations (n,)."""
    xyz = np.atleast_2d(np.asarray(xyz, dtype=float))
    lat, lon, h = crs.ecef_to_geodetic(xyz)
    east, north = crs.geodetic_to_grid(lat, lon)
    enu = ecef_to_enu_covariance(lat, lon, np.reshape(covariance, (-1, 3, 3)))
    sd = np.sqrt(np.maximum(np.einsum("nii->ni", enu), 0.0)) * per_metre
    major, minor, azimuth = st.standard_ellipses(enu[:, 0, 0], enu[:, 0, 1], enu[:, 1, 1])
    factors = crs.factors(lat, lon)
    undulation = np.broadcast_to(np.asarray(geoid, dtype=float), h.shape)
    return PointValues(
        east=east,
        north=north,
        latitude=lat * _DEG_PER_RAD,
        longitude=lon * _DEG_PER_RAD,
        ellipsoidal_height=h * per_metre,
        geoid=undulation * per_metre,
        height=(h - undulation) * per_metre,
        sd_east=sd[:, 0],
        sd_north=sd[:, 1],
        sd_up=sd[:, 2],
        standard_major=major * per_metre,
        standard_minor=minor * per_metre,
        semi_major=major * ellipse_factor * per_metre,
        semi_minor=minor * ellipse_factor * per_metre,
        azimuth=azimuth,
        scale_factor=np.asarray(factors.scale, dtype=float),
        convergence=np.asarray(factors.convergence, dtype=float) * _DEG_PER_RAD,
    )


def pair_values(
    crs: Crs,
    xyz_a: np.ndarray,
    xyz_b: np.ndarray,
    cov_aa: np.ndarray,
    cov_bb: np.ndarray,
    cov_ab: np.ndarray,
    ellipse_factor: float,
    per_metre: float = 1.0,
) -> PairValues:
    """Relative ellipses of B − A (positions (n, 3), covariance blocks (n, 3, 3), Σ_AB =
    cov(A, B)) in the local east, north at A, and the grid distances."""
    xyz_a = np.atleast_2d(np.asarray(xyz_a, dtype=float))
    xyz_b = np.atleast_2d(np.asarray(xyz_b, dtype=float))
    cov_ab = np.reshape(cov_ab, (-1, 3, 3))
    delta = (
        np.reshape(cov_aa, (-1, 3, 3))
        + np.reshape(cov_bb, (-1, 3, 3))
        - cov_ab
        - np.swapaxes(cov_ab, 1, 2)
    )
    lat, lon, _ = crs.ecef_to_geodetic(xyz_a)
    enu = ecef_to_enu_covariance(lat, lon, delta)
    major, minor, azimuth = st.standard_ellipses(enu[:, 0, 0], enu[:, 0, 1], enu[:, 1, 1])
    east_a, north_a, _ = crs.ecef_to_grid(xyz_a)
    east_b, north_b, _ = crs.ecef_to_grid(xyz_b)
    # the direction A→B in A's horizon plane, for the precision along the line
    rows = _horizontal_unit(lat, lon, xyz_b - xyz_a)
    along = np.einsum("ni,nij,nj->n", rows, enu[:, :2, :2], rows)
    return PairValues(
        distance=np.hypot(east_b - east_a, north_b - north_a),
        semi_major=major * ellipse_factor * per_metre,
        semi_minor=minor * ellipse_factor * per_metre,
        azimuth=azimuth,
        sd_distance=np.sqrt(np.maximum(along, 0.0)) * per_metre,
    )


def _horizontal_unit(lat: np.ndarray, lon: np.ndarray, difference: np.ndarray) -> np.ndarray:
    """Unit (east, north) of an Earth-centred difference in the horizon at φ, λ; 0 if vertical."""
    local = (enu_rotation(lat, lon)[:, :2, :] @ difference[:, :, None])[:, :, 0]
    length = np.hypot(local[:, 0], local[:, 1])
    safe = np.where(length > 0.0, length, 1.0)
    return local / safe[:, None] * (length > 0.0)[:, None]
