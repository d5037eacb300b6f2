"""Partials of the geodetic model's equations against finite differences (scipy), and values
against independent computations (pyproj's topocentric conversion, closed forms)."""

from __future__ import annotations

import math

import numpy as np
import pyproj
import pytest
from scipy.optimize._numdiff import approx_derivative

from server.geodesy.crs import local_crs
from server.geodesy.ellipsoid import GRS80
from server.model import geodetic_equations as ge

CRS = local_crs(math.radians(47.05), math.radians(-122.89), 5000.0, 5000.0)
RNG = np.random.default_rng(20261204)
ALL = slice(None)


def _marks(count: int) -> np.ndarray:
    """Invented marks within about 2 km of the site origin, heights 20 to 180 m."""
    lat = math.radians(47.05) + RNG.uniform(-0.015, 0.015, count)
    lon = math.radians(-122.89) + RNG.uniform(-0.02, 0.02, count)
    h = RNG.uniform(20.0, 180.0, count)
    return GRS80.to_ecef(lat, lon, h)


def _moved(xyz: np.ndarray, delta: np.ndarray) -> np.ndarray:
    """X + Rᵀδ: the parameterisation the equations' partials refer to."""
    rot = ge.rotation_at(GRS80, xyz[None, :])[0]
    return xyz + rot.T @ delta


def _check_partials(function, roles: dict[str, np.ndarray], rows: ge.Rows, count: int) -> None:
    """Each role's analytic partials (rows) against central differences of ``function``."""
    for name in roles:
        for r in range(count):

            def value(delta, name=name, r=r):
                moved = {n: p[r : r + 1].copy() for n, p in roles.items()}
                moved[name] = _moved(roles[name][r], delta)[None, :]
                return np.atleast_1d(function(**moved, sl=slice(r, r + 1)).value[0])

            numeric = approx_derivative(value, np.zeros(3), method="3-point", abs_step=0.5)
            analytic = rows.partials[name][r]
            assert np.allclose(analytic.reshape(numeric.shape), numeric, rtol=1e-6, atol=1e-8), (
                name,
                r,
            )


@pytest.mark.parametrize(
    "kind", ["slope", "zenith", "direction", "angle", "level", "distance", "azimuth", "baseline"]
)
def test_partials_match_finite_differences(kind):
    count = 6
    a, b, c = _marks(count), _marks(count), _marks(count)
    hi, ht = RNG.uniform(1.2, 1.8, count), RNG.uniform(0.0, 2.0, count)
    n_a, n_b = RNG.uniform(-30, -20, count), RNG.uniform(-30, -20, count)
    functions = {
        "slope": (
            lambda frm, to, sl=ALL: ge.slope(GRS80, frm, to, hi[sl], ht[sl]),
            {"frm": a, "to": b},
            {"frm": "from", "to": "to"},
        ),
        "zenith": (
            lambda frm, to, sl=ALL: ge.zenith(GRS80, frm, to, hi[sl], ht[sl], 0.13),
            {"frm": a, "to": b},
            {"frm": "from", "to": "to"},
        ),
        "direction": (
            lambda at, to, sl=ALL: ge.direction(GRS80, at, to),
            {"at": a, "to": b},
            {"at": "at", "to": "to"},
        ),
        "angle": (
            lambda back, at, fore, sl=ALL: ge.angle(GRS80, back, at, fore),
            {"back": a, "at": b, "fore": c},
            {"back": "from", "at": "at", "fore": "to"},
        ),
        "level": (
            lambda frm, to, sl=ALL: ge.level(GRS80, frm, to, n_a[sl], n_b[sl]),
            {"frm": a, "to": b},
            {"frm": "from", "to": "to"},
        ),
        "distance": (
            lambda frm, to, sl=ALL: ge.grid_distance(CRS, frm, to),
            {"frm": a, "to": b},
            {"frm": "from", "to": "to"},
        ),
        "azimuth": (
            lambda frm, to, sl=ALL: ge.grid_azimuth(CRS, frm, to),
            {"frm": a, "to": b},
            {"frm": "from", "to": "to"},
        ),
        "baseline": (
            lambda frm, to, sl=ALL: ge.baseline(GRS80, frm, to),
            {"frm": a, "to": b},
            {"frm": "from", "to": "to"},
        ),
    }
    function, args, role_of = functions[kind]
    rows = function(**args)
    renamed = ge.Rows(rows.value, {arg: rows.partials[role] for arg, role in role_of.items()})
    _check_partials(function, args, renamed, count)


def test_control_partials_match_finite_differences():
    xyz = _marks(4)
    und = np.full(4, -23.84)
    _, jac = ge.control(CRS, xyz, und)
    for r in range(4):
        numeric = approx_derivative(
            lambda d, r=r: ge.control(CRS, _moved(xyz[r], d)[None, :], und[r : r + 1])[0][0],
            np.zeros(3),
            method="3-point",
            abs_step=0.5,
        )
        assert np.allclose(jac[r], numeric, rtol=1e-6, atol=1e-8)


def test_direction_and_zenith_agree_with_proj_topocentric():
    """Azimuth and zenith angle (k = 0) at the instrument from PROJ's topocentric
    conversion of the target (an independent computation of the local east, north, up)."""
    at, to = _marks(5), _marks(5)
    for r in range(5):
        lat, lon, h = GRS80.from_ecef(at[r])
        topo = pyproj.Transformer.from_pipeline(
            f"+proj=topocentric +ellps=GRS80 +lat_0={math.degrees(float(lat))!r} "
            f"+lon_0={math.degrees(float(lon))!r} +h_0={float(h)!r}"
        )
        e, n, u = topo.transform(*to[r])
        az = ge.direction(GRS80, at[r : r + 1], to[r : r + 1]).value[0]
        zen = ge.zenith(GRS80, at[r : r + 1], to[r : r + 1], np.zeros(1), np.zeros(1), 0.0).value[0]
        assert az == pytest.approx(math.atan2(e, n) % (2 * math.pi), abs=1e-10)
        assert zen == pytest.approx(math.atan2(math.hypot(e, n), u), abs=1e-10)


def test_grid_distance_is_the_projected_one_from_pyproj():
    """Grid distance between projected marks, against pyproj's own forward projection."""
    a, b = _marks(3), _marks(3)
    to_grid = pyproj.Transformer.from_crs(
        pyproj.CRS.from_proj4("+proj=geocent +ellps=GRS80 +units=m +no_defs +type=crs"),
        pyproj.CRS.from_proj4(
            "+proj=tmerc +lat_0=47.05 +lon_0=-122.89 +k=1 +x_0=5000 +y_0=5000 +ellps=GRS80 "
            "+units=m +no_defs +type=crs"
        ),
    )
    ea, na, _ = to_grid.transform(a[:, 0], a[:, 1], a[:, 2])
    eb, nb, _ = to_grid.transform(b[:, 0], b[:, 1], b[:, 2])
    computed = ge.grid_distance(CRS, a, b).value
    assert np.allclose(computed, np.hypot(eb - ea, nb - na), atol=1e-6)


def test_slope_sigma_closed_form():
    """σ² = a² + (b·S·10⁻⁶)² + 2c²: 2 mm + 2 ppm over 500 m with 1 mm centering is
    √(4 + 1 + 2) mm (error propagation; common practice)."""
    sigma = ge.slope_sigma(np.array([0.002]), np.array([2.0]), np.array([500.0]), np.array([0.001]))
    assert sigma[0] == pytest.approx(math.sqrt(7.0) * 1e-3)
