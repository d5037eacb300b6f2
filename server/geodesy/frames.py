"""Observations in the local horizon frame, with partial derivatives to Earth-centred coordinates.

Every function is vectorised: positions are arrays of shape (n, 3) of Earth-centred X, Y, Z
in metres (one row per observation), and the result holds the n computed values and their
partial derivatives with respect to the three coordinates of each end, shape (n, 3).

Local frame.  At a point of geodetic latitude φ, longitude λ and ellipsoidal height h the
unit vectors along local east, north and up (the ellipsoid normal) are::

    ê = (−sin λ, cos λ, 0)
    n̂ = (−sin φ cos λ, −sin φ sin λ, cos φ)
    û = (cos φ cos λ, cos φ sin λ, sin φ)

and the rows of R = [ê; n̂; û] turn an Earth-centred vector into local components.  A point
moves with its coordinates as ∂X/∂φ = (M + h) n̂, ∂X/∂λ = (N + h) cos φ ê, ∂X/∂h = û
(M, N the meridian and prime-vertical radii of curvature, ``ellipsoid.py``).  These columns
are orthogonal, so ∂φ/∂X = n̂ᵀ/(M + h), ∂λ/∂X = êᵀ/((N + h) cos φ), ∂h/∂X = ûᵀ, and the frame
turns with its point::

    ∂û/∂X = n̂ n̂ᵀ/(M + h) + ê êᵀ/(N + h)                    (written U below)
    ∂ê/∂X = −(û − tan φ n̂) êᵀ/(N + h)
    ∂n̂/∂X = −û n̂ᵀ/(M + h) − tan φ ê êᵀ/(N + h)

Deflections of the vertical are taken as zero: "up" is the ellipsoid normal, not the
plumb line.

Instrument and target.  The instrument stands hi above its mark along the mark's normal
and the target ht above its own: P_i = X_i + hi·û_i, P_t = X_t + ht·û_t (a point lifted
along its normal keeps φ and λ).  The vector d = P_t − P_i has local components
(a, b, c) = R_i d at the instrument, and

    ∂(a, b, c)/∂X_t = R_i (I + ht U_t)
    ∂(a, b, c)/∂X_i = −R_i (I + hi U_i) + G,   G = dᵀ ∂R_i/∂X_i, whose rows are
        east:  −(c − b tan φ) êᵀ/(N + h)
        north: −c n̂ᵀ/(M + h) − a tan φ êᵀ/(N + h)
        up:    b n̂ᵀ/(M + h) + a êᵀ/(N + h)

(φ, h, M, N of the instrument's mark).  G is the turning of the horizon as the instrument
moves: about 1/R per metre, 0.03″ per metre, kept so that the derivatives are exact.

Observations, from (a, b, c), with s = √(a² + b²) and S = √(a² + b² + c²):

* slope distance  S;                       ∂S/∂(a, b, c) = (a, b, c)/S
* azimuth         α = atan2(a, b) in [0, 2π), clockwise from geodetic north in the horizon
  plane at the instrument (a horizontal direction is α minus the round's orientation);
                                             ∂α/∂(a, b, c) = (b, −a, 0)/s²
* zenith angle    z = atan2(s, c), from the instrument's normal;
                                             ∂z/∂(a, b, c) = (a c/s, b c/s, −s)/S²
  and with refraction the model value is z − k·S/(2R), R = 6 371 000 m: the line of sight
  is taken as an arc of radius R/k, concave towards the ground, whose tangent at the
  instrument (the direction the telescope reads) lies k·S/(2R) above the chord.

The slope distance does not depend on the frame (the G terms cancel), so it is computed
from d directly.  A GNSS baseline is X_t − X_i itself (antenna heights are applied by the
processor), with partials −I and I; its covariance is diag(σ) ρ diag(σ) from the three
standard deviations and correlations, refused unless positive definite.

Covariances.  Local (east, north, up) standard deviations σ at a point become
Σ_X = Rᵀ diag(σ²) R in Earth-centred axes, and an Earth-centred covariance becomes
Σ_enu = R Σ_X Rᵀ; its east-north block gives the point's ellipse with the azimuth clockwise
from geodetic north.  Centering c at both ends of a baseline adds c²(ê êᵀ + n̂ n̂ᵀ) at each
end (horizontal only).
"""

from __future__ import annotations

from dataclasses import dataclass, replace

import numpy as np

from server.geodesy.ellipsoid import Ellipsoid

#: Earth radius of the refraction angle k·S/(2R), in metres.
REFRACTION_RADIUS = 6_371_000.0
TWO_PI = 2.0 * np.pi


@dataclass(frozen=True, slots=True)
class LocalFrames:
    """The local frames at n points: geodetic coordinates, axes and radii of curvature."""

    lat: np.ndarray  # (n,) radians
    lon: np.ndarray  # (n,) radians
    h: np.ndarray  # (n,) metres
    rotation: np.ndarray  # (n, 3, 3): rows east, north, up
    meridian: np.ndarray  # (n,) M + h, metres
    prime_vertical: np.ndarray  # (n,) N + h, metres
    up_rate: np.ndarray | None = None  # (n, 3, 3) U = ∂û/∂X where already computed

    @property
    def east(self) -> np.ndarray:
        return self.rotation[:, 0, :]

    @property
    def north(self) -> np.ndarray:
        return self.rotation[:, 1, :]

    @property
    def up(self) -> np.ndarray:
        return self.rotation[:, 2, :]

    def up_derivative(self) -> np.ndarray:
        """U = ∂û/∂X, shape (n, 3, 3)."""
        if self.up_rate is not None:
            return self.up_rate
        n, e = self.north, self.east
        return (
            n[:, :, None] * n[:, None, :] / self.meridian[:, None, None]
            + e[:, :, None] * e[:, None, :] / self.prime_vertical[:, None, None]
        )

    def with_up_derivative(self) -> LocalFrames:
        """The same frames holding U, for frames whose rows are taken many times."""
        return replace(self, up_rate=self.up_derivative())

    def take(self, index: np.ndarray) -> LocalFrames:
        """The frames at rows ``index`` (the same numbers as computing them there)."""
        return LocalFrames(
            lat=self.lat[index],
            lon=self.lon[index],
            h=self.h[index],
            rotation=self.rotation[index],
            meridian=self.meridian[index],
            prime_vertical=self.prime_vertical[index],
            up_rate=None if self.up_rate is None else self.up_rate[index],
        )


@dataclass(frozen=True, slots=True)
class Equation:
    """Computed values of one kind of observation and their partial derivatives."""

    value: np.ndarray  # (n,)
    d_from: np.ndarray  # (n, 3): ∂value/∂(X, Y, Z) of the instrument's (or FROM's) mark
    d_to: np.ndarray  # (n, 3): ∂value/∂(X, Y, Z) of the target's (or TO's) mark


@dataclass(frozen=True, slots=True)
class LocalVector:
    """Target minus instrument in the instrument's local frame, with its derivatives."""

    enu: np.ndarray  # (n, 3): a (east), b (north), c (up), metres
    d_from: np.ndarray  # (n, 3, 3): ∂(a, b, c)/∂X_from
    d_to: np.ndarray  # (n, 3, 3): ∂(a, b, c)/∂X_to
    frames: LocalFrames  # at the instrument's marks


def enu_rotation(lat: np.ndarray, lon: np.ndarray) -> np.ndarray:
    """R with rows east, north, up at φ, λ (radians): shape (n, 3, 3)."""
    lat, lon = np.broadcast_arrays(
        np.atleast_1d(np.asarray(lat, dtype=float)), np.atleast_1d(np.asarray(lon, dtype=float))
    )
    sp, cp, sl, cl = np.sin(lat), np.cos(lat), np.sin(lon), np.cos(lon)
    zero = np.zeros_like(lat)
    return np.stack(
        [
            np.stack([-sl, cl, zero], axis=-1),
            np.stack([-sp * cl, -sp * sl, cp], axis=-1),
            np.stack([cp * cl, cp * sl, sp], axis=-1),
        ],
        axis=-2,
    )


def local_frames(ellipsoid: Ellipsoid, xyz: np.ndarray) -> LocalFrames:
    """The local frames at Earth-centred points ``xyz`` of shape (n, 3)."""
    xyz = _points(xyz)
    lat, lon, h = ellipsoid.from_ecef(xyz)
    return LocalFrames(
        lat=lat,
        lon=lon,
        h=h,
        rotation=enu_rotation(lat, lon),
        meridian=ellipsoid.meridian_radius(lat) + h,
        prime_vertical=ellipsoid.prime_vertical_radius(lat) + h,
    )


def frames_at(ellipsoid: Ellipsoid, xyz: np.ndarray, given: LocalFrames | None) -> LocalFrames:
    """``given`` (the frames at ``xyz`` already computed), else the frames computed here."""
    return given if given is not None else local_frames(ellipsoid, xyz)


def lifted(ellipsoid: Ellipsoid, xyz: np.ndarray, height: np.ndarray | float) -> np.ndarray:
    """Points ``height`` metres above ``xyz`` along their ellipsoid normals."""
    frames = local_frames(ellipsoid, xyz)
    return _points(xyz) + _column(height, len(frames.lat)) * frames.up


def local_vector(
    ellipsoid: Ellipsoid,
    frm: np.ndarray,
    to: np.ndarray,
    hi: np.ndarray | float = 0.0,
    ht: np.ndarray | float = 0.0,
    *,
    frames_from: LocalFrames | None = None,
    frames_to: LocalFrames | None = None,
) -> LocalVector:
    """(a, b, c): target (TO + ht) minus instrument (FROM + hi) in FROM's east, north, up.

    ``frames_from``/``frames_to``: the local frames at FROM and TO when the caller has them.
    """
    frm, to = _points(frm), _points(to)
    count = len(frm)
    hi, ht = _column(hi, count), _column(ht, count)
    at = frames_at(ellipsoid, frm, frames_from)
    target = frames_at(ellipsoid, to, frames_to)
    enu = _local_components(at, target, frm, to, hi, ht)
    rot = at.rotation
    identity = np.eye(3)
    d_to = rot @ (identity + ht[:, :, None] * target.up_derivative())
    a, b, c = enu[:, 0:1], enu[:, 1:2], enu[:, 2:3]
    tan_lat = np.tan(at.lat)[:, None]
    e_row = at.east / at.prime_vertical[:, None]
    n_row = at.north / at.meridian[:, None]
    turning = np.stack(
        [
            -(c - b * tan_lat) * e_row,
            -c * n_row - a * tan_lat * e_row,
            b * n_row + a * e_row,
        ],
        axis=1,
    )
    d_from = turning - rot @ (identity + hi[:, :, None] * at.up_derivative())
    return LocalVector(enu=enu, d_from=d_from, d_to=d_to, frames=at)


def _local_components(
    at: LocalFrames,
    target: LocalFrames,
    frm: np.ndarray,
    to: np.ndarray,
    hi: np.ndarray,
    ht: np.ndarray,
) -> np.ndarray:
    """(a, b, c) = R_i (P_t − P_i), shape (n, 3)."""
    d = (to + ht * target.up) - (frm + hi * at.up)
    return _apply(at.rotation, d)


def slope_distance(
    ellipsoid: Ellipsoid,
    frm: np.ndarray,
    to: np.ndarray,
    hi: np.ndarray | float = 0.0,
    ht: np.ndarray | float = 0.0,
    *,
    frames_from: LocalFrames | None = None,
    frames_to: LocalFrames | None = None,
) -> Equation:
    """Straight-line distance from the instrument (FROM + hi) to the target (TO + ht)."""
    frm, to = _points(frm), _points(to)
    count = len(frm)
    at, target = frames_at(ellipsoid, frm, frames_from), frames_at(ellipsoid, to, frames_to)
    hi, ht = _column(hi, count), _column(ht, count)
    d = (to + ht * target.up) - (frm + hi * at.up)
    s = np.linalg.norm(d, axis=1)
    unit = d / _nonzero(s, "instrument and target coincide")[:, None]
    identity = np.eye(3)
    d_to = _row_times(unit, identity + ht[:, :, None] * target.up_derivative())
    d_from = -_row_times(unit, identity + hi[:, :, None] * at.up_derivative())
    return Equation(value=s, d_from=d_from, d_to=d_to)


def zenith_angle(
    ellipsoid: Ellipsoid,
    frm: np.ndarray,
    to: np.ndarray,
    hi: np.ndarray | float = 0.0,
    ht: np.ndarray | float = 0.0,
    k: np.ndarray | float = 0.0,
    *,
    frames_from: LocalFrames | None = None,
    frames_to: LocalFrames | None = None,
) -> Equation:
    """Zenith angle at the instrument from its normal to the target, less k·S/(2R)."""
    vec = local_vector(ellipsoid, frm, to, hi, ht, frames_from=frames_from, frames_to=frames_to)
    a, b, c = vec.enu[:, 0], vec.enu[:, 1], vec.enu[:, 2]
    s = np.hypot(a, b)
    slope2 = s * s + c * c
    slope = np.sqrt(_nonzero(slope2, "instrument and target coincide"))
    # the direction of a vertical line's foot is undefined; its gradient is taken as zero
    safe_s = np.where(s > 0.0, s, 1.0)
    grad = np.stack([a * c / safe_s, b * c / safe_s, -s], axis=1) / slope2[:, None]
    refraction = np.broadcast_to(np.asarray(k, dtype=float), a.shape) / (2.0 * REFRACTION_RADIUS)
    grad = grad - refraction[:, None] * vec.enu / slope[:, None]
    value = np.arctan2(s, c) - refraction * slope
    return _chain(value, grad, vec)


def horizon_azimuth(
    ellipsoid: Ellipsoid,
    frm: np.ndarray,
    to: np.ndarray,
    hi: np.ndarray | float = 0.0,
    ht: np.ndarray | float = 0.0,
    *,
    frames_from: LocalFrames | None = None,
    frames_to: LocalFrames | None = None,
) -> Equation:
    """Azimuth in the horizon plane at the instrument, clockwise from geodetic north, [0, 2π).

    For horizontal directions and angles toward the marks leave ``ht`` at 0; ``hi`` moves the
    instrument along its own normal and so changes only the (tiny) turning terms.
    """
    vec = local_vector(ellipsoid, frm, to, hi, ht, frames_from=frames_from, frames_to=frames_to)
    a, b = vec.enu[:, 0], vec.enu[:, 1]
    s2 = _nonzero(a * a + b * b, "the target is straight above or below the instrument")
    grad = np.stack([b, -a, np.zeros_like(a)], axis=1) / s2[:, None]
    return _chain(np.mod(np.arctan2(a, b), TWO_PI), grad, vec)


def horizon_azimuth_value(
    ellipsoid: Ellipsoid,
    frm: np.ndarray,
    to: np.ndarray,
    *,
    frames_from: LocalFrames | None = None,
    frames_to: LocalFrames | None = None,
) -> np.ndarray:
    """The azimuth of ``horizon_azimuth`` toward the marks (hi = ht = 0), without partials."""
    frm, to = _points(frm), _points(to)
    count = len(frm)
    zero = _column(0.0, count)
    at = frames_at(ellipsoid, frm, frames_from)
    target = frames_at(ellipsoid, to, frames_to)
    enu = _local_components(at, target, frm, to, zero, zero)
    a, b = enu[:, 0], enu[:, 1]
    _nonzero(a * a + b * b, "the target is straight above or below the instrument")
    return np.mod(np.arctan2(a, b), TWO_PI)


def horizon_distance(
    ellipsoid: Ellipsoid,
    frm: np.ndarray,
    to: np.ndarray,
    *,
    frames_from: LocalFrames | None = None,
    frames_to: LocalFrames | None = None,
) -> np.ndarray:
    """Distance D in the horizon plane at FROM to TO's mark, √(a² + b²) (centering terms)."""
    enu = local_vector(ellipsoid, frm, to, frames_from=frames_from, frames_to=frames_to).enu
    return np.hypot(enu[:, 0], enu[:, 1])


def baseline_covariance(sd: np.ndarray, corr: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Covariances (n, 3, 3) from standard deviations (σx, σy, σz) and correlations
    (ρxy, ρxz, ρyz), each of shape (n, 3), and a mask of the rows that are positive definite.

    A row is refused (mask False) when a standard deviation is not positive or when the
    smallest eigenvalue of its correlation matrix is not above 1e-12 of the largest:
    correlations of ±1, or a set no three errors can have, such as ρxy = ρxz = 0.9 with
    ρyz = −0.9.
    """
    sd = np.atleast_2d(np.asarray(sd, dtype=float))
    corr = np.atleast_2d(np.asarray(corr, dtype=float))
    rho = np.broadcast_to(np.eye(3), (max(len(sd), len(corr)), 3, 3)).copy()
    for k, (i, j) in enumerate(((0, 1), (0, 2), (1, 2))):
        rho[:, i, j] = rho[:, j, i] = corr[:, k]
    cov = sd[:, :, None] * rho * sd[:, None, :]
    finite = np.isfinite(cov).all(axis=(1, 2)) & (sd > 0.0).all(axis=1)
    eigen = np.linalg.eigvalsh(np.where(finite[:, None, None], rho, np.eye(3)))
    positive = finite & (eigen[:, 0] > 1e-12 * eigen[:, 2])
    return cov, positive


def baseline(frm: np.ndarray, to: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Earth-centred TO − FROM, shape (n, 3), and its Jacobians (−I and I), shape (n, 3, 3)."""
    frm, to = _points(frm), _points(to)
    eye = np.broadcast_to(np.eye(3), (len(frm), 3, 3))
    return to - frm, -eye, eye.copy()


def enu_to_ecef_covariance(lat: np.ndarray, lon: np.ndarray, cov_enu: np.ndarray) -> np.ndarray:
    """Σ_X = Rᵀ Σ_enu R: local (east, north, up) covariances (n, 3, 3) in Earth-centred axes."""
    rot = enu_rotation(lat, lon)
    return np.transpose(rot, (0, 2, 1)) @ np.asarray(cov_enu, dtype=float) @ rot


def ecef_to_enu_covariance(lat: np.ndarray, lon: np.ndarray, cov_ecef: np.ndarray) -> np.ndarray:
    """Σ_enu = R Σ_X Rᵀ: Earth-centred covariances (n, 3, 3) in local east, north, up."""
    rot = enu_rotation(lat, lon)
    return rot @ np.asarray(cov_ecef, dtype=float) @ np.transpose(rot, (0, 2, 1))


def enu_sd_to_ecef_covariance(lat: np.ndarray, lon: np.ndarray, sd_enu: np.ndarray) -> np.ndarray:
    """Independent local (east, north, up) standard deviations (n, 3) as Earth-centred
    covariances (n, 3, 3)."""
    sd = np.atleast_2d(np.asarray(sd_enu, dtype=float))
    cov = np.zeros(sd.shape + (3,))
    idx = np.arange(3)
    cov[:, idx, idx] = sd * sd
    return enu_to_ecef_covariance(lat, lon, cov)


def baseline_centering_covariance(
    lat_from: np.ndarray,
    lon_from: np.ndarray,
    lat_to: np.ndarray,
    lon_to: np.ndarray,
    centering: np.ndarray | float,
) -> np.ndarray:
    """Covariance (n, 3, 3) a baseline gains from centering c in east and north at each end."""
    c = np.atleast_1d(np.asarray(centering, dtype=float))
    sd = np.stack([c, c, np.zeros_like(c)], axis=-1)
    count = max(np.size(lat_from), np.size(lat_to), len(c))
    sd = np.broadcast_to(sd, (count, 3))
    return enu_sd_to_ecef_covariance(lat_from, lon_from, sd) + enu_sd_to_ecef_covariance(
        lat_to, lon_to, sd
    )


def _chain(value: np.ndarray, grad: np.ndarray, vec: LocalVector) -> Equation:
    """Partials to the two marks from ∂value/∂(a, b, c), shape (n, 3)."""
    return Equation(
        value=value,
        d_from=_row_times(grad, vec.d_from),
        d_to=_row_times(grad, vec.d_to),
    )


def _apply(matrices: np.ndarray, vectors: np.ndarray) -> np.ndarray:
    """Row-wise M·v for (n, 3, 3) and (n, 3)."""
    return (matrices @ vectors[:, :, None])[:, :, 0]


def _row_times(rows: np.ndarray, matrices: np.ndarray) -> np.ndarray:
    """Row-wise vᵀ·M for (n, 3) and (n, 3, 3)."""
    return (rows[:, None, :] @ matrices)[:, 0, :]


def _points(xyz: np.ndarray) -> np.ndarray:
    points = np.asarray(xyz, dtype=float)
    if points.ndim == 1:
        points = points[None, :]
    if points.ndim != 2 or points.shape[1] != 3:
        raise ValueError(f"positions must have shape (n, 3), not {points.shape}")
    return points


def _column(values: np.ndarray | float, count: int) -> np.ndarray:
    return np.broadcast_to(np.asarray(values, dtype=float), (count,))[:, None]


def _nonzero(values: np.ndarray, what: str) -> np.ndarray:
    """Values that must not be zero: a ZeroDivisionError names the first offending row."""
    zero = np.flatnonzero(values == 0.0)
    if zero.size:
        raise ZeroDivisionError(f"row {zero[0]}: {what}")
    return values
