"""The kinds table of the geodetic 3D model (``kinds.py``'s entries over Earth-centred points).

In this model ``Positions.east/north/height`` hold each point's Earth-centred X, Y, Z
(metres), and the unknowns E, N, H of a point are its corrections along local east, north
and up (``geodetic_equations.py`` derives the equations and their partials).  The table is
built for one CRS, one refraction coefficient and one ellipsoid, so its entries close over
them; everything else (hi, ht, undulations, booked covariances) travels in the ``Batch``.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from server.geodesy.crs import Crs
from server.model import geodetic_equations as ge
from server.model.kinds import Batch, CoincidentPointsError, Kind, Linearised, Positions

Array = np.ndarray

_ENU = ("E", "N", "H")
_TO_FROM = tuple(("to", c) for c in _ENU) + tuple(("from", c) for c in _ENU)
_AT = tuple(("at", c) for c in _ENU)


def _xyz(at: Positions, index: Array) -> Array:
    return np.stack([at.east[index], at.north[index], at.height[index]], axis=1)


def _guarded(function: Callable[[Batch, Positions], Linearised]
             ) -> Callable[[Batch, Positions], Linearised]:
    """Coincident marks (or a target straight above the instrument) name their rows."""

    def equation(batch: Batch, at: Positions) -> Linearised:
        try:
            return function(batch, at)
        except (ZeroDivisionError, ValueError):
            pairs = [(batch.frm, batch.to), (batch.at, batch.to), (batch.at, batch.frm)]
            bad = np.zeros(batch.size, dtype=bool)
            for i, j in pairs:
                d = _xyz(at, j) - _xyz(at, i)
                bad |= ~(np.einsum("mi,mi->m", d, d) > 0.0) & (i != j)
            raise CoincidentPointsError(np.flatnonzero(bad) if bad.any()
                                        else np.arange(batch.size)) from None

    return equation


def geodetic_kinds(crs: Crs, refraction: float) -> dict[str, Kind]:
    """The table of every kind the geodetic model adjusts, for one CRS and one k."""
    ell = crs.ellipsoid

    def two_ends(rows: ge.Rows) -> Linearised:
        return Linearised(rows.value, np.hstack([rows.partials["to"], rows.partials["from"]]))

    def slope(b: Batch, at: Positions) -> Linearised:
        return two_ends(ge.slope(ell, _xyz(at, b.frm), _xyz(at, b.to), b.instrument_height,
                                 b.target_height))

    def zenith(b: Batch, at: Positions) -> Linearised:
        return two_ends(ge.zenith(ell, _xyz(at, b.frm), _xyz(at, b.to), b.instrument_height,
                                  b.target_height, refraction))

    def direction(b: Batch, at: Positions) -> Linearised:
        rows = ge.direction(ell, _xyz(at, b.frm), _xyz(at, b.to))
        partials = np.hstack([rows.partials["to"], rows.partials["at"], -np.ones((b.size, 1))])
        return Linearised(rows.value - at.orientation[b.rnd], partials)

    def angle(b: Batch, at: Positions) -> Linearised:
        rows = ge.angle(ell, _xyz(at, b.frm), _xyz(at, b.at), _xyz(at, b.to))
        p = rows.partials
        return Linearised(rows.value, np.hstack([p["to"], p["from"], p["at"]]))

    def level(b: Batch, at: Positions) -> Linearised:
        rows = ge.level(ell, _xyz(at, b.frm), _xyz(at, b.to), b.geoid_from, b.geoid_to)
        return Linearised(rows.value, np.stack([rows.partials["to"][:, 2],
                                                rows.partials["from"][:, 2]], axis=1))

    def distance(b: Batch, at: Positions) -> Linearised:
        return two_ends(ge.grid_distance(crs, _xyz(at, b.frm), _xyz(at, b.to)))

    def azimuth(b: Batch, at: Positions) -> Linearised:
        return two_ends(ge.grid_azimuth(crs, _xyz(at, b.frm), _xyz(at, b.to)))

    def baseline(b: Batch, at: Positions) -> Linearised:
        rows = ge.baseline(ell, _xyz(at, b.frm), _xyz(at, b.to))
        # one row per component: (m, 3, 6) → (3m, 6), observation-major
        partials = np.concatenate([rows.partials["to"], rows.partials["from"]], axis=2)
        return Linearised(rows.value.reshape(-1), partials.reshape(-1, 6))

    def slope_sigma(b: Batch, at: Positions) -> Array:
        return ge.slope_sigma(b.constant, b.ppm, b.value, b.centering)

    def constant_sigma(b: Batch, at: Positions) -> Array:
        return b.constant

    def direction_sigma(b: Batch, at: Positions) -> Array:
        return ge.direction_sigma(ell, b.constant, b.centering, _xyz(at, b.frm), _xyz(at, b.to))

    def angle_sigma(b: Batch, at: Positions) -> Array:
        return ge.angle_sigma(ell, b.constant, b.centering, _xyz(at, b.frm), _xyz(at, b.at),
                              _xyz(at, b.to))

    def level_sigma(b: Batch, at: Positions) -> Array:
        from server.model.kinds import KINDS  # the same σ as in the plane model

        return KINDS["level"].sigma(b, at)

    def distance_sigma(b: Batch, at: Positions) -> Array:
        from server.model.kinds import KINDS

        return KINDS["distance"].sigma(b, at)

    def baseline_covariance(b: Batch, at: Positions) -> Array:
        assert b.covariance is not None
        return ge.baseline_covariance(ell, b.covariance, b.centering, _xyz(at, b.frm),
                                      _xyz(at, b.to))

    def baseline_sigma(b: Batch, at: Positions) -> Array:
        return np.sqrt(np.einsum("mii->mi", baseline_covariance(b, at))).reshape(-1)

    entries = (
        Kind("level", (("to", "H"), ("from", "H")), False, _guarded(level), level_sigma),
        Kind("distance", _TO_FROM, False, _guarded(distance), distance_sigma),
        Kind("azimuth", _TO_FROM, True, _guarded(azimuth), constant_sigma),
        Kind("direction", (*(("to", c) for c in _ENU), *(("from", c) for c in _ENU),
                           ("round", "O")), True, _guarded(direction), direction_sigma,
             has_round=True),
        Kind("angle", (*_TO_FROM, *_AT), True, _guarded(angle), angle_sigma, has_station=True),
        Kind("slope", _TO_FROM, False, _guarded(slope), slope_sigma),
        Kind("zenith", _TO_FROM, True, _guarded(zenith), constant_sigma),
        Kind("baseline", _TO_FROM, False, _guarded(baseline), baseline_sigma, components=3,
             covariance=baseline_covariance),
    )
    return {kind.name: kind for kind in entries}
