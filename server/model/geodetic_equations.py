"""Observation equations of the geodetic 3D model, vectorised, with partials in local axes.

Every point is one Earth-centred position X (metres, on the CRS's ellipsoid).  The unknowns
of a point are the corrections (δe, δn, δu) along its local east, north and up (ellipsoid
normal) at its current position:

    X = X₀ + Rᵀ δ,   R = [ê; n̂; û] (rows)   ⇒   ∂f/∂δ = R · ∂f/∂X

so a point held in grid east and north simply has no δe, δn (moving along the normal keeps
latitude and longitude, hence grid east and north), a point held in height has no δu, and
a point that only level lines touch has δu alone.  Standard deviations estimated for δ are
those of the adjusted point along its local axes, as the results report them.

Each function takes arrays with one row per observation (positions (m, 3)) and returns the
computed values and, per point role, the partials (m, 3) with respect to that point's δ.
The equations themselves are derived in ``server/geodesy/frames.py`` (slope distance, zenith
angle with refraction, azimuth in the horizon plane) and ``server/geodesy/grid.py`` (grid
east and north); here they are combined into the field book's kinds:

* slope      S from instrument (FROM + hi along its normal) to target (TO + ht)
* zenith     z − k·S/(2R) at the instrument
* direction  horizon azimuth AT → TO (the round's orientation is subtracted by the caller)
* angle      horizon azimuth AT → FORE minus AT → BACK, both in AT's horizon plane
* distance   grid distance √(ΔE² + ΔN²) of the projected marks (metres)
* azimuth    grid azimuth atan2(ΔE, ΔN) of the projected marks
* level      (h_TO − N_TO) − (h_FROM − N_FROM), N the geoid undulations (∂h/∂δ = (0, 0, 1))
* baseline   X_TO − X_FROM, three components; ∂/∂δ_TO = Rᵀ_TO, ∂/∂δ_FROM = −Rᵀ_FROM
* control    grid east, grid north (metres) and orthometric height h − N of one point

A priori standard deviations, centering c at each end (error propagation as in 2D, with
the distances D measured in the horizon plane at the instrument):

* slope      σ² = a² + (b·S·10⁻⁶)² + 2c²
* zenith     σ = a (centering moves the line sideways, not up)
* direction  σ² = a² + 2c²/D²
* angle      σ² = a² + c²·D₃²/(D₁²·D₂²) + c²·(1/D₁² + 1/D₂²)
* baseline   Σ = Σ_booked + c²(ê êᵀ + n̂ n̂ᵀ) at each end (horizontal centering only)
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from server.geodesy import frames
from server.geodesy.crs import Crs
from server.geodesy.ellipsoid import Ellipsoid
from server.geodesy.grid import grid_position

Array = np.ndarray
#: The local frames at the rows' marks when the caller has them (else they are computed).
Frames = frames.LocalFrames | None


@dataclass(frozen=True, slots=True)
class Rows:
    """Computed values and the partials per point role with respect to the local δ.

    ``value`` is (m,) for a scalar kind and (m, 3) for a baseline; each partial is (m, 3)
    (row r: ∂value_r/∂δ) or (m, 3, 3) for a baseline (∂value_r,i/∂δ_j).
    """

    value: Array
    partials: dict[str, Array]


def rotation_at(ellipsoid: Ellipsoid, xyz: Array, given: Frames = None) -> Array:
    """R (m, 3, 3), rows east, north, up, at Earth-centred points (m, 3)."""
    return frames.frames_at(ellipsoid, xyz, given).rotation


def _local(rot: Array, gradient: Array) -> Array:
    """∂f/∂δ = R · ∂f/∂X, row by row."""
    return np.einsum("mij,mj->mi", rot, gradient)


def slope(
    ellipsoid: Ellipsoid,
    frm: Array,
    to: Array,
    hi: Array,
    ht: Array,
    frames_from: Frames = None,
    frames_to: Frames = None,
) -> Rows:
    at_from = frames.frames_at(ellipsoid, frm, frames_from)
    at_to = frames.frames_at(ellipsoid, to, frames_to)
    eq = frames.slope_distance(ellipsoid, frm, to, hi, ht, frames_from=at_from, frames_to=at_to)
    return _in_local_axes(eq, at_from, at_to, "from")


def zenith(
    ellipsoid: Ellipsoid,
    frm: Array,
    to: Array,
    hi: Array,
    ht: Array,
    k: float,
    frames_from: Frames = None,
    frames_to: Frames = None,
) -> Rows:
    at_from = frames.frames_at(ellipsoid, frm, frames_from)
    at_to = frames.frames_at(ellipsoid, to, frames_to)
    eq = frames.zenith_angle(ellipsoid, frm, to, hi, ht, k, frames_from=at_from, frames_to=at_to)
    return _in_local_axes(eq, at_from, at_to, "from")


def direction(
    ellipsoid: Ellipsoid, at: Array, to: Array, frames_at: Frames = None, frames_to: Frames = None
) -> Rows:
    """Horizon azimuth AT → TO's mark in [0, 2π) (the caller subtracts the orientation)."""
    at_at = frames.frames_at(ellipsoid, at, frames_at)
    at_to = frames.frames_at(ellipsoid, to, frames_to)
    eq = frames.horizon_azimuth(ellipsoid, at, to, frames_from=at_at, frames_to=at_to)
    return _in_local_axes(eq, at_at, at_to, "at")


def _in_local_axes(
    eq: frames.Equation, at_from: frames.LocalFrames, at_to: frames.LocalFrames, role: str
) -> Rows:
    """An equation's partials turned to the local corrections of its two marks."""
    return Rows(
        eq.value,
        {role: _local(at_from.rotation, eq.d_from), "to": _local(at_to.rotation, eq.d_to)},
    )


def angle(
    ellipsoid: Ellipsoid,
    back: Array,
    at: Array,
    fore: Array,
    frames_back: Frames = None,
    frames_at: Frames = None,
    frames_fore: Frames = None,
) -> Rows:
    """Clockwise angle at AT from BACK to FORE in AT's horizon plane."""
    at_back = frames.frames_at(ellipsoid, back, frames_back)
    at_at = frames.frames_at(ellipsoid, at, frames_at)
    at_fore = frames.frames_at(ellipsoid, fore, frames_fore)
    f = frames.horizon_azimuth(ellipsoid, at, fore, frames_from=at_at, frames_to=at_fore)
    b = frames.horizon_azimuth(ellipsoid, at, back, frames_from=at_at, frames_to=at_back)
    return Rows(
        f.value - b.value,
        {
            "to": _local(at_fore.rotation, f.d_to),
            "from": -_local(at_back.rotation, b.d_to),
            "at": _local(at_at.rotation, f.d_from - b.d_from),
        },
    )


def level(
    ellipsoid: Ellipsoid,
    frm: Array,
    to: Array,
    n_from: Array,
    n_to: Array,
    frames_from: Frames = None,
    frames_to: Frames = None,
) -> Rows:
    """Orthometric height difference; h moves by exactly δu (X + û·δu keeps φ and λ)."""
    h_from = ellipsoid.from_ecef(frm)[2] if frames_from is None else frames_from.h
    h_to = ellipsoid.from_ecef(to)[2] if frames_to is None else frames_to.h
    up = np.zeros((len(h_from), 3))
    up[:, 2] = 1.0
    return Rows((h_to - n_to) - (h_from - n_from), {"from": -up, "to": up.copy()})


def _grid_difference(crs: Crs, frm: Array, to: Array) -> tuple[Array, Array, Array, Array]:
    """ΔE, ΔN (metres) TO − FROM and their local partials at each end, (m, 2, 3) each."""
    per_unit = crs.metres_per_unit
    a = grid_position(crs, frm)
    b = grid_position(crs, to)
    d_east = (b.east - a.east) * per_unit
    d_north = (b.north - a.north) * per_unit
    rot_a, rot_b = rotation_at(crs.ellipsoid, frm), rotation_at(crs.ellipsoid, to)
    jac_a = np.stack([_local(rot_a, a.d_east), _local(rot_a, a.d_north)], axis=1) * per_unit
    jac_b = np.stack([_local(rot_b, b.d_east), _local(rot_b, b.d_north)], axis=1) * per_unit
    return d_east, d_north, jac_a, jac_b


def grid_distance(crs: Crs, frm: Array, to: Array) -> Rows:
    d_east, d_north, jac_a, jac_b = _grid_difference(crs, frm, to)
    s = np.hypot(d_east, d_north)
    if not np.all(s > 0.0):
        raise frames_error("two marks of a grid distance coincide")
    unit = np.stack([d_east / s, d_north / s], axis=1)
    return Rows(
        s,
        {"from": -np.einsum("mk,mki->mi", unit, jac_a), "to": np.einsum("mk,mki->mi", unit, jac_b)},
    )


def grid_azimuth(crs: Crs, frm: Array, to: Array) -> Rows:
    d_east, d_north, jac_a, jac_b = _grid_difference(crs, frm, to)
    s2 = d_east * d_east + d_north * d_north
    if not np.all(s2 > 0.0):
        raise frames_error("two marks of a grid azimuth coincide")
    grad = np.stack([d_north / s2, -d_east / s2], axis=1)
    return Rows(
        np.mod(np.arctan2(d_east, d_north), 2.0 * np.pi),
        {"from": -np.einsum("mk,mki->mi", grad, jac_a), "to": np.einsum("mk,mki->mi", grad, jac_b)},
    )


def baseline(
    ellipsoid: Ellipsoid,
    frm: Array,
    to: Array,
    frames_from: Frames = None,
    frames_to: Frames = None,
) -> Rows:
    """X_TO − X_FROM (m, 3); partials (m, 3, 3): ∂(TO − FROM)/∂δ = ±Rᵀ."""
    rot_from = rotation_at(ellipsoid, frm, frames_from)
    rot_to = rotation_at(ellipsoid, to, frames_to)
    return Rows(
        np.asarray(to, dtype=float) - np.asarray(frm, dtype=float),
        {"from": -np.transpose(rot_from, (0, 2, 1)), "to": np.transpose(rot_to, (0, 2, 1)).copy()},
    )


def control(crs: Crs, xyz: Array, undulation: Array) -> tuple[Array, Array]:
    """Grid east, grid north (metres) and orthometric height of points (m, 3), shape (m, 3),
    and their partials (m, 3, 3): row i of a point's block is ∂(E, N, H)_i/∂δ."""
    per_unit = crs.metres_per_unit
    g = grid_position(crs, xyz)
    rot = rotation_at(crs.ellipsoid, xyz)
    values = np.stack([g.east * per_unit, g.north * per_unit, g.h - undulation], axis=1)
    jac = np.stack(
        [_local(rot, g.d_east) * per_unit, _local(rot, g.d_north) * per_unit, _local(rot, g.d_h)],
        axis=1,
    )
    return values, jac


# --------------------------------------------------------------------------------------
# a priori standard deviations


def slope_sigma(constant: Array, ppm: Array, value: Array, centering: Array) -> Array:
    return np.sqrt(constant**2 + (ppm * 1e-6 * value) ** 2 + 2.0 * centering**2)


def direction_sigma(
    ellipsoid: Ellipsoid,
    constant: Array,
    centering: Array,
    at: Array,
    to: Array,
    frames_at: Frames = None,
    frames_to: Frames = None,
) -> Array:
    if not np.any(centering):
        return np.asarray(constant, dtype=float)
    d = frames.horizon_distance(ellipsoid, at, to, frames_from=frames_at, frames_to=frames_to)
    with np.errstate(divide="ignore", invalid="ignore"):
        centred = np.sqrt(constant**2 + 2.0 * centering**2 / (d * d))
    return np.where(centering != 0.0, centred, constant)


def angle_sigma(
    ellipsoid: Ellipsoid, constant: Array, centering: Array, back: Array, at: Array, fore: Array
) -> Array:
    if not np.any(centering):
        return np.asarray(constant, dtype=float)
    to_back = frames.local_vector(ellipsoid, at, back).enu
    to_fore = frames.local_vector(ellipsoid, at, fore).enu
    d1 = np.hypot(to_back[:, 0], to_back[:, 1])
    d2 = np.hypot(to_fore[:, 0], to_fore[:, 1])
    d3 = np.hypot(to_fore[:, 0] - to_back[:, 0], to_fore[:, 1] - to_back[:, 1])
    c2 = centering**2
    with np.errstate(divide="ignore", invalid="ignore"):
        centred = np.sqrt(
            constant**2
            + c2 * d3 * d3 / (d1 * d1 * d2 * d2)
            + c2 * (1.0 / (d1 * d1) + 1.0 / (d2 * d2))
        )
    return np.where(centering != 0.0, centred, constant)


def baseline_covariance(
    ellipsoid: Ellipsoid,
    booked: Array,
    centering: Array,
    frm: Array,
    to: Array,
    frames_from: Frames = None,
    frames_to: Frames = None,
) -> Array:
    """Σ (m, 3, 3): the booked covariance plus horizontal centering at both ends."""
    booked = np.asarray(booked, dtype=float).reshape(-1, 3, 3)
    if not np.any(centering):
        return booked
    a = frames.frames_at(ellipsoid, frm, frames_from)
    b = frames.frames_at(ellipsoid, to, frames_to)
    return booked + frames.baseline_centering_covariance(a.lat, a.lon, b.lat, b.lon, centering)


def frames_error(message: str) -> ValueError:
    """The error a coincident pair raises (the caller names the line and the points)."""
    return ValueError(message)
