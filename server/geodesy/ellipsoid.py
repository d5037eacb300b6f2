"""An ellipsoid of revolution and the conversion between geodetic and Earth-centred coordinates.

With semi-major axis a, flattening f, e² = f(2 − f) and the radius of curvature in the
prime vertical N(φ) = a / √(1 − e² sin²φ), a point at geodetic latitude φ, longitude λ and
ellipsoidal height h (along the ellipsoid normal) is, in the Earth-centred frame::

    X = (N + h) cos φ cos λ
    Y = (N + h) cos φ sin λ
    Z = (N (1 − e²) + h) sin φ

The inverse has no closed form that is both short and stable, so it iterates Bowring's
formula on the reduced latitude β (tan β = (1 − f) tan φ), with p = √(X² + Y²), b = a(1 − f)
and e'² = e² / (1 − e²)::

    φ = atan2(Z + e'² b sin³β, p − e² a cos³β)

Each step gains about three orders of magnitude in φ for points near the surface, so three
steps from tan β₀ = aZ / (bp) reach the rounding of a double.  The height is then
h = p cos φ + Z sin φ − a √(1 − e² sin²φ), which stays exact at the poles and the equator.

The meridian radius of curvature M(φ) = a(1 − e²) / (1 − e² sin²φ)^{3/2} and N(φ) are the
rates at which the position moves with latitude and longitude: ∂X/∂φ = (M + h)·n̂ and
∂X/∂λ = (N + h) cos φ·ê, with n̂ and ê the local north and east unit vectors (``frames.py``).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import numpy.typing as npt

_BOWRING_STEPS = 3


@dataclass(frozen=True, slots=True)
class Ellipsoid:
    """An ellipsoid of revolution: semi-major axis ``a`` in metres and flattening ``f``."""

    a: float
    f: float
    name: str = ""

    @property
    def b(self) -> float:
        """Semi-minor axis in metres."""
        return self.a * (1.0 - self.f)

    @property
    def e2(self) -> float:
        """First eccentricity squared, f(2 − f)."""
        return self.f * (2.0 - self.f)

    def prime_vertical_radius(self, lat: npt.ArrayLike) -> np.ndarray:
        """N(φ) = a / √(1 − e² sin²φ), metres."""
        s = np.sin(lat)
        return self.a / np.sqrt(1.0 - self.e2 * s * s)

    def meridian_radius(self, lat: npt.ArrayLike) -> np.ndarray:
        """M(φ) = a(1 − e²) / (1 − e² sin²φ)^{3/2}, metres."""
        s = np.sin(lat)
        w2 = 1.0 - self.e2 * s * s
        return self.a * (1.0 - self.e2) / (w2 * np.sqrt(w2))

    def to_ecef(self, lat: npt.ArrayLike, lon: npt.ArrayLike, h: npt.ArrayLike) -> np.ndarray:
        """Earth-centred X, Y, Z (last axis of length 3) from φ, λ (radians) and h (metres)."""
        lat, lon, h = np.broadcast_arrays(*(np.asarray(v, dtype=float) for v in (lat, lon, h)))
        n = self.prime_vertical_radius(lat)
        cos_lat = np.cos(lat)
        return np.stack(
            [
                (n + h) * cos_lat * np.cos(lon),
                (n + h) * cos_lat * np.sin(lon),
                (n * (1.0 - self.e2) + h) * np.sin(lat),
            ],
            axis=-1,
        )

    def from_ecef(self, xyz: npt.ArrayLike) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """φ, λ (radians) and h (metres) from Earth-centred coordinates (last axis of length 3).

        Not meant for points within a few kilometres of the Earth's centre, where the
        normal through a point is not unique.
        """
        xyz = np.asarray(xyz, dtype=float)
        x, y, z = xyz[..., 0], xyz[..., 1], xyz[..., 2]
        a, b, e2 = self.a, self.b, self.e2
        ep2 = e2 / (1.0 - e2)
        p = np.hypot(x, y)
        lon = np.arctan2(y, x)
        beta = np.arctan2(a * z, b * p)
        for _ in range(_BOWRING_STEPS):
            sb, cb = np.sin(beta), np.cos(beta)
            lat = np.arctan2(z + ep2 * b * sb**3, p - e2 * a * cb**3)
            beta = np.arctan2((1.0 - self.f) * np.sin(lat), np.cos(lat))
        s = np.sin(lat)
        h = p * np.cos(lat) + z * s - a * np.sqrt(1.0 - e2 * s * s)
        return lat, lon, h


#: GRS80 (Moritz, *Geodetic Reference System 1980*, Bulletin Géodésique 54, 1980):
#: a = 6 378 137 m, 1/f = 298.257222101.  The ellipsoid of NAD83, ETRS89 and the site grid.
GRS80 = Ellipsoid(6378137.0, 1.0 / 298.257222101, "GRS 1980")
