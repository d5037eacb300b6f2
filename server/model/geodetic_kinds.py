"""The kinds table of the geodetic 3D model (``kinds.py``'s entries over Earth-centred points).

In this model ``Positions.east/north/height`` hold each point's Earth-centred X, Y, Z
(metres), and the unknowns E, N, H of a point are its corrections along local east, north
and up (``geodetic_equations.py`` derives the equations and their partials).  The table is
built for one CRS, one refraction coefficient and one ellipsoid, so its entries close over
them; everything else (hi, ht, undulations, booked covariances) travels in the ``Batch``.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from functools import lru_cache, partial

import numpy as np

from server.geodesy import frames
from server.geodesy.crs import Crs
from server.geodesy.ellipsoid import Ellipsoid
from server.model import geodetic_equations as ge
from server.model.kinds import KINDS, Batch, CoincidentPointsError, Kind, Linearised, Positions

Array = np.ndarray

_ENU = ("E", "N", "H")
_TO_FROM = tuple(("to", c) for c in _ENU) + tuple(("from", c) for c in _ENU)
_AT = tuple(("at", c) for c in _ENU)


def _xyz(at: Positions, index: Array) -> Array:
    return np.stack([at.east[index], at.north[index], at.height[index]], axis=1)


def _guarded(
    function: Callable[[Batch, Positions], Linearised],
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
            raise CoincidentPointsError(
                np.flatnonzero(bad) if bad.any() else np.arange(batch.size)
            ) from None

    return equation


class _PointFrames:
    """The local frames at every point for the positions of one evaluation.

    Every kind needs the frames at its rows' marks; computed once per point and taken by
    row, they are the same numbers as computed row by row.  The frames of the last
    coordinates seen are kept with a copy of those coordinates, so the kinds of one
    evaluation share them and coordinates changed in place are never served stale frames.
    """

    __slots__ = ("_last",)

    def __init__(self) -> None:
        self._last: tuple[Array, frames.LocalFrames] | None = None

    def at(self, ellipsoid: Ellipsoid, positions: Positions) -> frames.LocalFrames:
        xyz = np.stack([positions.east, positions.north, positions.height], axis=1)
        last = self._last  # one read: another thread may replace it meanwhile
        if last is not None and last[0].shape == xyz.shape and last[0].tobytes() == xyz.tobytes():
            return last[1]  # the same bits (a −0.0 or a NaN is not taken for another)
        with np.errstate(invalid="ignore"):  # points no row of this kind may touch
            found = frames.local_frames(ellipsoid, xyz).with_up_derivative()
        self._last = (xyz, found)
        return found


@dataclass(frozen=True, eq=False)
class _Model:
    """What every geodetic kind closes over: the CRS (and its ellipsoid) and k."""

    crs: Crs
    refraction: float
    point_frames: _PointFrames = field(default_factory=_PointFrames)

    @property
    def ell(self) -> Ellipsoid:
        return self.crs.ellipsoid

    def frames(self, at: Positions, *index: Array) -> list[frames.LocalFrames]:
        """The local frames at the marks of each index array (rows of one batch)."""
        every = self.point_frames.at(self.ell, at)
        return [every.take(i) for i in index]


def _two_ends(rows: ge.Rows) -> Linearised:
    return Linearised(rows.value, np.hstack([rows.partials["to"], rows.partials["from"]]))


def _slope(m: _Model, b: Batch, at: Positions) -> Linearised:
    f_from, f_to = m.frames(at, b.frm, b.to)
    return _two_ends(
        ge.slope(
            m.ell,
            _xyz(at, b.frm),
            _xyz(at, b.to),
            b.instrument_height,
            b.target_height,
            f_from,
            f_to,
        )
    )


def _zenith(m: _Model, b: Batch, at: Positions) -> Linearised:
    f_from, f_to = m.frames(at, b.frm, b.to)
    return _two_ends(
        ge.zenith(
            m.ell,
            _xyz(at, b.frm),
            _xyz(at, b.to),
            b.instrument_height,
            b.target_height,
            m.refraction,
            f_from,
            f_to,
        )
    )


def _direction(m: _Model, b: Batch, at: Positions) -> Linearised:
    f_at, f_to = m.frames(at, b.frm, b.to)
    rows = ge.direction(m.ell, _xyz(at, b.frm), _xyz(at, b.to), f_at, f_to)
    partials = np.hstack([rows.partials["to"], rows.partials["at"], -np.ones((b.size, 1))])
    return Linearised(rows.value - at.orientation[b.rnd], partials)


def _angle(m: _Model, b: Batch, at: Positions) -> Linearised:
    f_back, f_at, f_fore = m.frames(at, b.frm, b.at, b.to)
    rows = ge.angle(m.ell, _xyz(at, b.frm), _xyz(at, b.at), _xyz(at, b.to), f_back, f_at, f_fore)
    p = rows.partials
    return Linearised(rows.value, np.hstack([p["to"], p["from"], p["at"]]))


def _level(m: _Model, b: Batch, at: Positions) -> Linearised:
    f_from, f_to = m.frames(at, b.frm, b.to)
    rows = ge.level(m.ell, _xyz(at, b.frm), _xyz(at, b.to), b.geoid_from, b.geoid_to, f_from, f_to)
    return Linearised(
        rows.value, np.stack([rows.partials["to"][:, 2], rows.partials["from"][:, 2]], axis=1)
    )


def _distance(m: _Model, b: Batch, at: Positions) -> Linearised:
    return _two_ends(ge.grid_distance(m.crs, _xyz(at, b.frm), _xyz(at, b.to)))


def _azimuth(m: _Model, b: Batch, at: Positions) -> Linearised:
    return _two_ends(ge.grid_azimuth(m.crs, _xyz(at, b.frm), _xyz(at, b.to)))


def _baseline(m: _Model, b: Batch, at: Positions) -> Linearised:
    f_from, f_to = m.frames(at, b.frm, b.to)
    rows = ge.baseline(m.ell, _xyz(at, b.frm), _xyz(at, b.to), f_from, f_to)
    # one row per component: (m, 3, 6) → (3m, 6), observation-major
    partials = np.concatenate([rows.partials["to"], rows.partials["from"]], axis=2)
    return Linearised(rows.value.reshape(-1), partials.reshape(-1, 6))


def _slope_sigma(m: _Model, b: Batch, at: Positions) -> Array:
    return ge.slope_sigma(b.constant, b.ppm, b.value, b.centering)


def _constant_sigma(m: _Model, b: Batch, at: Positions) -> Array:
    return b.constant


def _direction_sigma(m: _Model, b: Batch, at: Positions) -> Array:
    if not np.any(b.centering):  # (as direction_sigma would say) no frames needed
        return np.asarray(b.constant, dtype=float)
    f_at, f_to = m.frames(at, b.frm, b.to)
    return ge.direction_sigma(
        m.ell, b.constant, b.centering, _xyz(at, b.frm), _xyz(at, b.to), f_at, f_to
    )


def _angle_sigma(m: _Model, b: Batch, at: Positions) -> Array:
    return ge.angle_sigma(
        m.ell, b.constant, b.centering, _xyz(at, b.frm), _xyz(at, b.at), _xyz(at, b.to)
    )


def _baseline_covariance(m: _Model, b: Batch, at: Positions) -> Array:
    assert b.covariance is not None
    f_from, f_to = m.frames(at, b.frm, b.to)
    return ge.baseline_covariance(
        m.ell, b.covariance, b.centering, _xyz(at, b.frm), _xyz(at, b.to), f_from, f_to
    )


def _baseline_sigma(m: _Model, b: Batch, at: Positions) -> Array:
    return np.sqrt(np.einsum("mii->mi", _baseline_covariance(m, b, at))).reshape(-1)


@lru_cache(maxsize=16)  # the engine, the results builder and the baseline tests share one
def geodetic_kinds(crs: Crs, refraction: float) -> dict[str, Kind]:
    """The table of every kind the geodetic model adjusts, for one CRS and one k.

    Leveling and grid distances keep the plane model's σ (they observe the same quantity).
    """
    m = _Model(crs, refraction)
    to_from_round = (*(("to", c) for c in _ENU), *(("from", c) for c in _ENU), ("round", "O"))
    entries = (
        Kind(
            "level",
            (("to", "H"), ("from", "H")),
            False,
            _guarded(partial(_level, m)),
            KINDS["level"].sigma,
        ),
        Kind("distance", _TO_FROM, False, _guarded(partial(_distance, m)), KINDS["distance"].sigma),
        Kind(
            "azimuth", _TO_FROM, True, _guarded(partial(_azimuth, m)), partial(_constant_sigma, m)
        ),
        Kind(
            "direction",
            to_from_round,
            True,
            _guarded(partial(_direction, m)),
            partial(_direction_sigma, m),
            has_round=True,
        ),
        Kind(
            "angle",
            (*_TO_FROM, *_AT),
            True,
            _guarded(partial(_angle, m)),
            partial(_angle_sigma, m),
            has_station=True,
        ),
        Kind("slope", _TO_FROM, False, _guarded(partial(_slope, m)), partial(_slope_sigma, m)),
        Kind("zenith", _TO_FROM, True, _guarded(partial(_zenith, m)), partial(_constant_sigma, m)),
        Kind(
            "baseline",
            _TO_FROM,
            False,
            _guarded(partial(_baseline, m)),
            partial(_baseline_sigma, m),
            components=3,
            covariance=partial(_baseline_covariance, m),
        ),
    )
    return {kind.name: kind for kind in entries}
