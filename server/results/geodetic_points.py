"""Latitude, longitude, ellipsoidal height, undulation, scale factor and convergence of points.

Written whenever the field book has a ``crs`` line.  In the geodetic model a point's
Earth-centred position comes from the solution; in a plane file with a ``crs`` line it is
the grid east/north with the ellipsoidal height h = H + N (N the point's undulation, 0 when
none is given), converted through pyproj.  A point with a height only (no grid position)
gets its ellipsoidal height and undulation, and nothing horizontal.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import replace

import numpy as np

from server.engine.gauss_newton import Solution
from server.geodesy.crs import Crs
from server.model.geodetic import resolve_crs, undulations
from server.model.network import Network
from server.results.geodetic import point_values
from server.results.types import PointResult


def with_geodetic_figures(
    network: Network, solution: Solution, points: Sequence[PointResult], per_m: float
) -> tuple[PointResult, ...]:
    """``points`` with their geodetic figures when the book has a crs line, else unchanged."""
    fieldbook = network.fieldbook
    if fieldbook.crs is None:
        return tuple(points)
    points = tuple(points)  # a column store makes its rows on each pass: once here
    crs = network.geodetic.crs if network.geodetic is not None else resolve_crs(fieldbook)
    assert crs is not None
    und = network.geodetic.undulation if network.geodetic is not None else undulations(fieldbook)
    geoid = np.array([und.get(p.name, 0.0) for p in points], dtype=float)
    height = np.array([np.nan if p.height is None else p.height / per_m for p in points])
    placed = np.array([p.east is not None and p.north is not None for p in points], dtype=bool)
    xyz = _positions(network, solution, crs, points, placed, height + geoid, per_m)
    out = []
    values = point_values(crs, xyz, np.zeros((len(points), 3, 3)), geoid, 1.0, per_m)
    for k, p in enumerate(points):
        h = None if p.height is None else float(height[k] + geoid[k]) * per_m
        if not placed[k]:
            out.append(replace(p, ellipsoidal_height=h, geoid=float(geoid[k]) * per_m))
            continue
        out.append(
            replace(
                p,
                latitude=float(values.latitude[k]),
                longitude=float(values.longitude[k]),
                ellipsoidal_height=h,
                geoid=float(geoid[k]) * per_m,
                scale_factor=float(values.scale_factor[k]),
                convergence=float(values.convergence[k]),
            )
        )
    return tuple(out)


def _positions(
    network: Network,
    solution: Solution,
    crs: Crs,
    points: Sequence[PointResult],
    placed: np.ndarray,
    h: np.ndarray,
    per_m: float,
) -> np.ndarray:
    """Earth-centred positions (n, 3) of the placed points (NaN for the others)."""
    xyz = np.full((len(points), 3), np.nan)
    if network.geodetic is not None and solution.positions is not None:
        for k, p in enumerate(points):
            if placed[k] and p.name in solution.positions:
                xyz[k] = solution.positions[p.name]
        missing = placed & ~np.isfinite(xyz).all(axis=1)
    else:
        missing = placed
    if missing.any():
        per_unit = crs.metres_per_unit
        east = np.array([(p.east or 0.0) / per_m / per_unit for p in points])
        north = np.array([(p.north or 0.0) / per_m / per_unit for p in points])
        grid = np.asarray(
            crs.grid_to_ecef(east[missing], north[missing], np.nan_to_num(h[missing]))
        )
        xyz[missing] = grid.reshape(-1, 3)
    return xyz
