"""Coordinate reference systems: a projected EPSG CRS or a site grid, read with pyproj offline.

A ``Crs`` converts grid coordinates (east, north, in the CRS's own length unit) to geodetic
latitude and longitude on the CRS's own ellipsoid and back, and from there to Earth-centred
Cartesian coordinates on that same ellipsoid (``ellipsoid.py``).  The whole chain is a
*conversion*: the inverse projection to the CRS's own geodetic CRS (``crs.geodetic_crs``),
then the closed-form geodetic ↔ Cartesian formulas.  It never goes through a transformation
to another datum: pyproj, offline, may pick a "ballpark" operation between two datums that
silently shifts positions by metres.  The operation pyproj chooses is therefore checked to
consist of conversions only, and a CRS whose operation does not is refused.

Heights never pass through pyproj: a geoid undulation comes from the field book (offline,
pyproj's vertical transformations fall back to a zero undulation with only a warning).

Axis order: whatever order the EPSG definition gives (some CRSs list northing first), the
transformers are built with ``always_xy=True`` so that our arrays are always east, north.
CRSs whose axes point west or south, or along meridians (polar grids), are refused: grid
azimuths clockwise from grid north and the partial derivatives of the plane model assume
an east-north frame.

Grid scale factor and meridian convergence at a point come from pyproj's
``Proj.get_factors``: the scale factor is its ``parallel_scale`` (the point scale factor;
for a conformal projection the meridional scale agrees with it), the convergence its
``meridian_convergence`` in radians, grid north minus true north (negative west of the
central meridian of a transverse Mercator zone), so that geodetic azimuth = grid azimuth +
convergence for a direction at the point.  ``Proj`` is built from the CRS's PROJ string,
which can lose parameters, so each CRS is checked once, at the centre of its area of use:
``Proj`` must place the point where the transformer does (within 1 mm), and the factors
must match central differences of the transformer along the meridian and the parallel,
with equal scales along both (a conformal projection).  CRSs that fail are refused.

Refused as well, each with a sentence: codes missing from the database, non-projected and
compound CRSs, longitudes counted from a meridian other than Greenwich (pyproj's factors
would take the wrong longitude), and families of zones with no single projection.

The site grid is a transverse Mercator on GRS80 with scale 1 on the meridian through the
site's latitude and longitude, that point at (E0, N0).  Its scale grows as 1 + x²/(2R²)
with the distance x from that meridian: 1.2e-8 at 1 km, 2e-7 at 4 km.
"""

from __future__ import annotations

import functools
import math
import re
import warnings
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

import numpy as np
import numpy.typing as npt

from server.geodesy.ellipsoid import GRS80, Ellipsoid

if TYPE_CHECKING:  # pyproj itself is imported where a CRS is built: plane runs never pay
    import pyproj
    from pyproj._crs import Ellipsoid as Ellipsoid_  # defined in pyproj's compiled part

#: Exact metres per unit of the length units a field book uses, keyed by the file's spelling
#: (international foot 0.3048 m; US survey foot 1200/3937 m: NIST and NOAA/NGS, 85 FR 62698).
_EXACT_UNITS = {"m": 1.0, "ft": 0.3048, "usft": 1200.0 / 3937.0}
_PROJ_UNITS = {"m": "m", "ft": "ft", "usft": "us-ft"}
_UNIT_NAMES = {"m": "metre", "ft": "foot", "usft": "US survey foot"}
_EPSG_RE = re.compile(r"^\s*EPSG\s*:\s*([0-9]{1,9})\s*$", re.IGNORECASE)
_RAD_PER_DEG = math.pi / 180.0
#: Largest disagreement allowed between the transformer and ``Proj`` at the check point.
_PROJ_AGREEMENT_M = 1e-3
#: Conformal projections have equal meridional and parallel scale (pyproj's numerical
#: derivatives agree to about 1e-10); the pseudo-Mercator of web maps differs by 0.3 %.
_CONFORMAL_TOLERANCE = 1e-7


class CrsError(ValueError):
    """A CRS that cannot be used; the message is a plain sentence for the user."""


@dataclass(frozen=True, slots=True)
class GridFactors:
    """Projection factors at points: scale factors (unitless) and convergence (radians)."""

    scale: np.ndarray  # point scale factor along the parallel (pyproj's parallel_scale)
    meridional_scale: np.ndarray
    convergence: np.ndarray  # grid north minus true north, radians


@dataclass(frozen=True, eq=False)
class Crs:
    """A projected CRS with east and north axes, and the ellipsoid of its datum.

    Grid coordinates are in the CRS's own unit (``metres_per_unit`` converts them);
    latitude and longitude are in radians, longitude from Greenwich, east positive.
    Points that pyproj cannot convert come back as NaN so that the caller can name them.
    """

    definition: str  # as the user wrote it: "EPSG:32633", "local lat=... lon=..."
    name: str  # pyproj's name of the CRS
    unit_name: str  # pyproj's name of the axis unit: "metre", "US survey foot", "foot", ...
    unit: str | None  # "m", "ft" or "usft" when the unit is one a field book uses
    metres_per_unit: float
    ellipsoid: Ellipsoid
    area_of_use: tuple[float, float, float, float] | None  # west, south, east, north (degrees)
    _to_geodetic: pyproj.Transformer = field(repr=False)
    _to_grid: pyproj.Transformer = field(repr=False)
    _proj: pyproj.Proj = field(repr=False)
    _radians_per_angle_unit: float = field(repr=False)

    def grid_to_geodetic(
        self, east: npt.ArrayLike, north: npt.ArrayLike
    ) -> tuple[np.ndarray, np.ndarray]:
        """Latitude and longitude (radians) of grid points (east, north in the CRS's unit)."""
        lon, lat = self._to_geodetic.transform(_floats(east), _floats(north))
        scale = self._radians_per_angle_unit
        return _finite_or_nan(np.asarray(lat) * scale), _finite_or_nan(np.asarray(lon) * scale)

    def geodetic_to_grid(self, lat: np.ndarray, lon: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Grid east and north (CRS's unit) of latitudes and longitudes in radians."""
        scale = self._radians_per_angle_unit
        east, north = self._to_grid.transform(_floats(lon) / scale, _floats(lat) / scale)
        return _finite_or_nan(np.asarray(east)), _finite_or_nan(np.asarray(north))

    def geodetic_to_ecef(self, lat: np.ndarray, lon: np.ndarray, h: np.ndarray) -> np.ndarray:
        """Earth-centred X, Y, Z (metres, last axis 3) on this CRS's ellipsoid."""
        return self.ellipsoid.to_ecef(lat, lon, h)

    def ecef_to_geodetic(self, xyz: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Latitude, longitude (radians) and ellipsoidal height (metres) on this ellipsoid."""
        return self.ellipsoid.from_ecef(xyz)

    def grid_to_ecef(self, east: np.ndarray, north: np.ndarray, h: np.ndarray) -> np.ndarray:
        """Earth-centred X, Y, Z of grid points with ellipsoidal heights h in metres."""
        lat, lon = self.grid_to_geodetic(east, north)
        return self.ellipsoid.to_ecef(lat, lon, h)

    def ecef_to_grid(self, xyz: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Grid east, north (CRS's unit) and ellipsoidal height (metres) of Earth-centred points."""
        lat, lon, h = self.ellipsoid.from_ecef(xyz)
        east, north = self.geodetic_to_grid(lat, lon)
        return east, north, h

    def factors(self, lat: np.ndarray, lon: np.ndarray) -> GridFactors:
        """Point scale factor, meridional scale and meridian convergence at φ, λ (radians)."""
        got = self._proj.get_factors(_floats(lon) / _RAD_PER_DEG, _floats(lat) / _RAD_PER_DEG)
        return GridFactors(
            scale=_finite_or_nan(np.asarray(got.parallel_scale, dtype=float)),
            meridional_scale=_finite_or_nan(np.asarray(got.meridional_scale, dtype=float)),
            convergence=_finite_or_nan(np.asarray(got.meridian_convergence) * _RAD_PER_DEG),
        )


def crs_from_epsg(text: str) -> Crs:
    """The projected CRS ``EPSG:CODE`` from pyproj's bundled database, or ``CrsError``."""
    match = _EPSG_RE.match(text)
    if not match:
        raise CrsError(f"'{text}' is not an EPSG code; write EPSG: and the number, e.g. EPSG:32633")
    return _epsg(int(match.group(1)))


@functools.lru_cache(maxsize=32)
def _epsg(code: int) -> Crs:
    import pyproj
    from pyproj.exceptions import CRSError

    label = f"EPSG:{code}"
    try:
        crs = pyproj.CRS.from_epsg(code)
    except CRSError:
        raise CrsError(
            f"{label} is not a coordinate reference system in the EPSG database "
            "that comes with pyproj"
        ) from None
    _check_projected(label, crs)
    return _build(label, crs, check_point=_area_centre(crs))


@functools.lru_cache(maxsize=32)  # one Crs (and its pyproj transformers) per site grid
def local_crs(
    lat: float,
    lon: float,
    east0: float = 0.0,
    north0: float = 0.0,
    unit: str = "m",
    definition: str = "",
) -> Crs:
    """A site grid: transverse Mercator on GRS80, scale 1 on the meridian through (lat, lon).

    ``lat``/``lon`` in radians (south and west negative); the point (lat, lon) has grid
    coordinates ``east0``, ``north0`` in ``unit`` ("m", "ft" or "usft").
    """
    if unit not in _EXACT_UNITS:
        raise CrsError(f"'{unit}' is not a length unit for a site grid (use m, ft or usft)")
    values = (lat, lon, east0, north0)
    if not all(isinstance(v, (int, float)) and math.isfinite(v) for v in values):
        raise CrsError("the site grid needs finite numbers for lat, lon, east and north")
    if not abs(lat) < math.radians(89.0):
        raise CrsError(
            f"the site grid's latitude {math.degrees(lat):.6f}° is not between "
            "-89° and 89° (a transverse Mercator grid needs a meridian)"
        )
    if not abs(lon) <= math.pi:
        raise CrsError(
            f"the site grid's longitude {math.degrees(lon):.6f}° is not between -180° and 180°"
        )
    import pyproj

    mpu = _EXACT_UNITS[unit]
    # PROJ takes the false easting and northing in metres whatever +units says
    proj = (
        f"+proj=tmerc +lat_0={math.degrees(lat)!r} +lon_0={math.degrees(lon)!r} +k=1 "
        f"+x_0={east0 * mpu!r} +y_0={north0 * mpu!r} +ellps=GRS80 "
        f"+units={_PROJ_UNITS[unit]} +no_defs +type=crs"
    )
    crs = pyproj.CRS.from_proj4(proj)
    label = definition or (
        f"local lat={math.degrees(lat):.9f} lon={math.degrees(lon):.9f} "
        f"east={east0!r} north={north0!r}"
    )
    built = _build(
        label,
        crs,
        check_point=(math.degrees(lon), math.degrees(lat)),
        name="site grid (transverse Mercator on GRS80, scale 1 at the site)",
    )
    assert built.ellipsoid is GRS80, built.ellipsoid  # pyproj's GRS80 is ours to the last digit
    return built


def _check_projected(label: str, crs: pyproj.CRS) -> None:
    """Refuse what is not a 2D projected CRS with east and north axes in a length unit."""
    if crs.is_compound:
        parts = [sub.to_epsg() for sub in crs.sub_crs_list if sub.is_projected]
        hint = f"; give its horizontal part, EPSG:{parts[0]}" if parts and parts[0] else ""
        raise CrsError(
            f"{label} ({crs.name}) is a compound CRS with heights{hint} "
            "(heights come from the field book)"
        )
    if crs.is_geographic:
        raise CrsError(
            f"{label} ({crs.name}) is a geographic CRS (latitude and longitude); "
            "give a projected CRS with east and north in metres or feet"
        )
    if not crs.is_projected:
        kind = crs.type_name[:1].lower() + crs.type_name[1:]
        raise CrsError(f"{label} ({crs.name}) is a {kind}, not a projected CRS with east and north")
    axes = crs.axis_info
    directions = sorted(axis.direction.lower() for axis in axes)
    if len(axes) != 2 or directions != ["east", "north"]:
        pointing = ", ".join(axis.direction for axis in axes)
        raise CrsError(
            f"{label} ({crs.name}) has axes pointing {pointing}; only CRSs with "
            "an east and a north axis can be used"
        )
    system = crs.coordinate_system
    units = system.to_json_dict().get("axis", []) if system is not None else []
    if len(units) != len(axes):
        raise CrsError(f"{label} ({crs.name}) does not describe the units of its axes")
    for axis, described in zip(axes, units, strict=True):
        unit = described.get("unit", "metre")
        unit_type = unit.get("type") if isinstance(unit, dict) else "LinearUnit"
        if unit_type != "LinearUnit" or not axis.unit_conversion_factor > 0:
            raise CrsError(
                f"{label} ({crs.name}) has an axis in {axis.unit_name}, not a length unit"
            )
    if axes[0].unit_conversion_factor != axes[1].unit_conversion_factor:
        raise CrsError(f"{label} ({crs.name}) has its two axes in different units")
    meridian = crs.prime_meridian
    if meridian is not None and meridian.longitude != 0.0:
        raise CrsError(
            f"{label} ({crs.name}) counts longitude from the {meridian.name} "
            "meridian; use a CRS whose longitudes count from Greenwich"
        )


def _build(
    label: str, crs: pyproj.CRS, check_point: tuple[float, float] | None, name: str | None = None
) -> Crs:
    import pyproj
    from pyproj.exceptions import CRSError, ProjError

    geodetic, spheroid = crs.geodetic_crs, crs.ellipsoid
    if geodetic is None or spheroid is None:
        raise CrsError(f"{label} ({crs.name}) has no geodetic CRS and ellipsoid")
    try:
        to_geodetic = pyproj.Transformer.from_crs(crs, geodetic, always_xy=True)
        to_grid = pyproj.Transformer.from_crs(geodetic, crs, always_xy=True)
    except ProjError:  # e.g. a family of zones without a zone ("UTM grid system")
        raise CrsError(
            f"{label} ({crs.name}) does not define one projection that pyproj can "
            "compute; give the code of a single zone"
        ) from None
    for transformer in (to_geodetic, to_grid):
        _require_conversion(label, crs, transformer)
    angle_units = {axis.unit_conversion_factor for axis in geodetic.axis_info}
    if len(angle_units) != 1 or not all(a.unit_name for a in geodetic.axis_info):
        raise CrsError(f"{label} ({crs.name}) has a geodetic CRS with mixed angle units")
    ellipsoid = Ellipsoid(spheroid.semi_major_metre, _flattening(spheroid), spheroid.name)
    unit_name = crs.axis_info[0].unit_name
    factor = crs.axis_info[0].unit_conversion_factor
    unit = next((k for k, v in _EXACT_UNITS.items() if abs(factor / v - 1.0) < 1e-12), None)
    area = crs.area_of_use
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)  # PROJ string export, checked below
        try:
            proj = pyproj.Proj(crs)
        except (CRSError, ProjError):
            raise CrsError(
                f"{label} ({crs.name}): pyproj cannot compute grid scale factors "
                "and convergence for this projection"
            ) from None
    built = Crs(
        definition=label,
        name=name or crs.name,
        unit_name=unit_name,
        unit=unit,
        metres_per_unit=_EXACT_UNITS[unit] if unit else float(factor),
        ellipsoid=GRS80 if (ellipsoid.a, ellipsoid.f) == (GRS80.a, GRS80.f) else ellipsoid,
        area_of_use=(area.west, area.south, area.east, area.north) if area is not None else None,
        _to_geodetic=to_geodetic,
        _to_grid=to_grid,
        _proj=proj,
        _radians_per_angle_unit=angle_units.pop(),
    )
    if check_point is not None:
        _check_proj_agrees(built, check_point)
    return built


def _require_conversion(label: str, crs: pyproj.CRS, transformer: pyproj.Transformer) -> None:
    """Every step of the operation must be a conversion: no datum change, no ballpark shift."""
    # several candidate operations (a choice between datum shifts) give no JSON at all
    described = transformer.to_json_dict() if transformer.to_json() else {}
    steps = described.get("steps", [described])
    kinds = {step.get("type") for step in steps}
    if kinds != {"Conversion"} or "ballpark" in transformer.description.lower():
        raise CrsError(
            f"{label} ({crs.name}): pyproj would reach its geodetic CRS through "
            f"'{transformer.description}', which is not a pure conversion"
        )


def _check_proj_agrees(built: Crs, lon_lat_deg: tuple[float, float]) -> None:
    """``Proj`` (factors) and the transformer (coordinates) must project alike."""
    import pyproj

    lon, lat = lon_lat_deg
    east, north = built.geodetic_to_grid(np.radians([lat]), np.radians([lon]))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", UserWarning)
        proj_m = pyproj.Proj(built._proj.crs, preserve_units=False)
    pe, pn = proj_m(lon, lat)
    gap = math.hypot(pe - east[0] * built.metres_per_unit, pn - north[0] * built.metres_per_unit)
    if not gap <= _PROJ_AGREEMENT_M:
        raise CrsError(
            f"{built.definition} ({built.name}): pyproj's two descriptions of this "
            f"projection differ by {gap:.3g} m, so its scale factors cannot be trusted"
        )
    _check_factors(built, math.radians(lat), math.radians(lon))


def _check_factors(built: Crs, lat: float, lon: float) -> None:
    """``get_factors`` must describe the projection the transformer computes, conformally.

    The meridian and the parallel through the point are mapped by central differences of
    the transformer (steps of 1e-7 rad, about 0.6 m: truncation below 1e-13, rounding about
    1e-10); their scales and the grid direction of the meridian must match pyproj's factors.
    This refuses projections that are not conformal on the datum's ellipsoid (the web maps'
    pseudo-Mercator projects the ellipsoid's latitudes with spherical formulas).
    """
    step = 1e-7
    lats = np.array([lat + step, lat - step, lat, lat])
    lons = np.array([lon, lon, lon + step, lon - step])
    east, north = built.geodetic_to_grid(lats, lons)
    east, north = east * built.metres_per_unit, north * built.metres_per_unit
    de_dlat, dn_dlat = (east[0] - east[1]) / (2 * step), (north[0] - north[1]) / (2 * step)
    de_dlon, dn_dlon = (east[2] - east[3]) / (2 * step), (north[2] - north[3]) / (2 * step)
    ell = built.ellipsoid
    meridional = math.hypot(de_dlat, dn_dlat) / float(ell.meridian_radius(lat))
    parallel = math.hypot(de_dlon, dn_dlon) / float(ell.prime_vertical_radius(lat) * math.cos(lat))
    convergence = -math.atan2(de_dlat, dn_dlat)
    factors = built.factors(np.array([lat]), np.array([lon]))
    gaps = (
        meridional - parallel,
        factors.scale[0] - parallel,
        factors.convergence[0] - convergence,
    )
    if not all(abs(gap) <= _CONFORMAL_TOLERANCE for gap in gaps):
        raise CrsError(
            f"{built.definition} ({built.name}) is not a conformal projection of "
            "its datum's ellipsoid as pyproj describes it, so grid angles, scale "
            "factors and convergence would not hold"
        )


def _area_centre(crs: pyproj.CRS) -> tuple[float, float] | None:
    area = crs.area_of_use
    if area is None:
        return None
    west, south, east, north = area.bounds
    if east < west:  # the area crosses the antimeridian
        east += 360.0
    centre = 0.5 * (west + east)
    return (centre - 360.0 if centre > 180.0 else centre), 0.5 * (south + north)


def _flattening(spheroid: Ellipsoid_) -> float:
    inverse = spheroid.inverse_flattening
    if inverse and math.isfinite(inverse) and inverse > 0.0:
        return 1.0 / inverse
    return 1.0 - spheroid.semi_minor_metre / spheroid.semi_major_metre


def _floats(values: npt.ArrayLike) -> np.ndarray:
    return np.asarray(values, dtype=float)


def _finite_or_nan(values: np.ndarray) -> np.ndarray:
    return np.where(np.isfinite(values), values, np.nan)
