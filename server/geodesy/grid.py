"""Grid coordinates of Earth-centred points, with partial derivatives, for the geodetic model.

Weighted control weights grid east, north and the height, and grid distances and azimuths
are computed from the projected positions; both need ∂(E, N)/∂X.  For a conformal
projection with point scale factor k and meridian convergence γ (grid north minus true
north), a small step of length ds at geodetic azimuth α on the ellipsoid becomes a grid step
k·ds at grid azimuth α − γ, so with the step's local east and north parts (dₑ, dₙ)::

    dE = k (dₑ cos γ − dₙ sin γ)
    dN = k (dₑ sin γ + dₙ cos γ)

A step dX of a point at height h moves its foot on the ellipsoid by dₑ = N/(N + h)·êᵀdX and
dₙ = M/(M + h)·n̂ᵀdX (``frames.py``: ∂λ/∂X = êᵀ/((N + h) cos φ), ∂φ/∂X = n̂ᵀ/(M + h), and
the ellipsoid's own rates are N cos φ and M), and its ellipsoidal height by ûᵀdX.  Dividing
by the CRS's metres per unit gives the partials in the CRS's unit per metre.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from server.geodesy.crs import Crs
from server.geodesy.frames import local_frames


@dataclass(frozen=True, slots=True)
class GridPosition:
    """Grid east, north (CRS's unit) and ellipsoidal height (m) of n points, with partials."""

    east: np.ndarray  # (n,)
    north: np.ndarray  # (n,)
    h: np.ndarray  # (n,) metres
    d_east: np.ndarray  # (n, 3): ∂E/∂(X, Y, Z), CRS unit per metre
    d_north: np.ndarray  # (n, 3)
    d_h: np.ndarray  # (n, 3): the ellipsoid normal


def grid_position(crs: Crs, xyz: np.ndarray) -> GridPosition:
    """Grid coordinates and ellipsoidal heights of Earth-centred points (n, 3), with partials."""
    at = local_frames(crs.ellipsoid, xyz)
    east, north = crs.geodetic_to_grid(at.lat, at.lon)
    factors = crs.factors(at.lat, at.lon)
    ell = crs.ellipsoid
    d_e = at.east * (ell.prime_vertical_radius(at.lat) / at.prime_vertical)[:, None]
    d_n = at.north * (ell.meridian_radius(at.lat) / at.meridian)[:, None]
    scale = (np.atleast_1d(factors.scale) / crs.metres_per_unit)[:, None]
    cos_g = np.cos(np.atleast_1d(factors.convergence))[:, None]
    sin_g = np.sin(np.atleast_1d(factors.convergence))[:, None]
    return GridPosition(
        east=np.atleast_1d(east),
        north=np.atleast_1d(north),
        h=at.h,
        d_east=scale * (d_e * cos_g - d_n * sin_g),
        d_north=scale * (d_e * sin_g + d_n * cos_g),
        d_h=at.up,
    )
