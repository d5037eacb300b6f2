"""The geodetic 3D model's frame: the CRS, each point's geoid undulation, and start positions.

A field book with a ``slope``, ``zenith`` or ``baseline`` line (and a ``crs`` line) is
adjusted with every point as one position in the Earth-centred frame of the CRS's own
ellipsoid.  This module gathers what the model needs before the first iteration:

* the CRS from pyproj (``server/geodesy/crs.py``: a projected CRS and its own geodetic CRS,
  conversions only, never a datum transformation), refused on the ``crs`` line when pyproj
  cannot use it;
* each point's undulation N (its own ``geoid=``, else the ``geoid undulation=`` line,
  else 0), so that h = H + N turns the field book's orthometric heights into ellipsoidal
  ones; deflections of the vertical are taken as zero;
* each given point's Earth-centred position (grid east/north in the file's unit, or
  latitude/longitude) and start positions of the others from baselines, polar ties and
  trigonometric heighting (``server/geodesy/start3d.py``); a point nothing reaches is
  named (exit 3).
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import TYPE_CHECKING

import numpy as np

from server.errors import FieldbookError, Issue, NetworkError
from server.fieldbook.model import SPATIAL_KINDS, Fieldbook, Observation, PointStatement
from server.fieldbook.table import ObservationTable, table_of
from server.geodesy import start3d
from server.geodesy.crs import Crs, CrsError, crs_from_epsg, local_crs
from server.units import LENGTH_FACTORS

if TYPE_CHECKING:  # network.py builds on this module
    from server.model.network import NetworkPoint

XYZ = tuple[float, float, float]


@dataclass(frozen=True, eq=False)
class GeodeticFrame:
    """What the geodetic model holds for a whole field book."""

    crs: Crs
    crs_text: str  # the crs line as given after ``crs``
    refraction: float  # k in force for zenith angles
    undulation: Mapping[str, float]  # per point name, metres (0 where none is given)
    geoid_given: bool  # whether the file gives any undulation at all
    start: Mapping[str, XYZ]  # Earth-centred start position of every point, metres
    methods: Mapping[str, str]  # how each start position was found


def is_geodetic(fieldbook: Fieldbook) -> bool:
    """The 3D model is entered by a slope, zenith or baseline line (ignored ones count)."""
    return any(obs.kind in SPATIAL_KINDS for obs in fieldbook.observations)


def resolve_crs(fieldbook: Fieldbook) -> Crs | None:
    """The field book's CRS through pyproj, or None without a ``crs`` line.

    Raises ``FieldbookError`` on the ``crs`` line when pyproj cannot use it.
    """
    line = fieldbook.crs
    if line is None:
        return None
    try:
        if line.epsg is not None:
            return crs_from_epsg(f"EPSG:{line.epsg}")
        assert line.latitude is not None and line.longitude is not None
        unit = fieldbook.length_unit
        per_unit = LENGTH_FACTORS[unit]
        return local_crs(
            line.latitude,
            line.longitude,
            line.false_east / per_unit,
            line.false_north / per_unit,
            unit=unit,
            definition=line.text,
        )
    except CrsError as exc:
        raise FieldbookError(
            [Issue(line.line, line.text, str(exc))], source=fieldbook.source
        ) from None


def undulations(fieldbook: Fieldbook) -> dict[str, float]:
    """Each point's geoid undulation in metres: its own, else the file's, else 0."""
    default = fieldbook.geoid_undulation or 0.0
    named = {p.name: p.geoid for p in fieldbook.points if p.geoid is not None}
    names = touched_names(fieldbook.observations)
    names.update(p.name for p in fieldbook.points)
    return {name: float(named.get(name, default)) for name in sorted(names)}


def touched_names(observations: Sequence[Observation]) -> set[str]:
    """The names an observation's FROM, AT or TO gives (empty names left out)."""
    table, rows = observation_columns(observations)
    return names_in(table, rows)


def observation_columns(observations: Sequence[Observation]) -> tuple[ObservationTable, np.ndarray]:
    """The table behind ``observations`` and their rows in it, in order (read as arrays, the
    observations need no objects made)."""
    table, rows = table_of(observations)
    return table, (np.arange(len(table), dtype=np.int64) if rows is None else rows)


def names_in(table: ObservationTable, rows: np.ndarray) -> set[str]:
    """The names FROM, AT or TO of the table's ``rows`` give (empty names left out)."""
    ids = np.concatenate([table.frm[rows], table.to[rows], table.at[rows]])
    names = table.names
    found = {names[k] for k in np.unique(ids[ids >= 0]).tolist()}
    found.discard("")
    return found


def geodetic_frame(fieldbook: Fieldbook) -> GeodeticFrame:
    """The CRS, undulations and start positions of a geodetic field book.

    Raises ``FieldbookError`` for a CRS pyproj cannot use (on its line) and
    ``NetworkError`` naming the points no observation places.
    """
    crs = resolve_crs(fieldbook)
    if crs is None:  # the parser refuses 3D lines without a crs line; kept for library callers
        raise NetworkError(
            "the geodetic 3D model needs a crs line (crs EPSG:CODE, or crs local lat=LAT lon=LON)"
        )
    und = undulations(fieldbook)
    known, heights = _given_points(fieldbook.points, crs, und)
    known += _height_only(fieldbook, crs, known)
    observations = _start_observations(fieldbook, crs, known)
    try:
        found = start3d.start_positions(
            known,
            observations,
            heights=heights,
            undulations=und,
            a=crs.ellipsoid.a,
            f=crs.ellipsoid.f,
        )
    except start3d.UnreachablePointsError as exc:
        raise NetworkError(
            f"no start position can be computed for {_listed(exc.points)}: no baseline, polar "
            "tie (direction or angle with a slope distance), trigonometric height or level line "
            "reaches them from the given points; give an approximate position (east= north=, "
            "or lat= lon=) or connect them",
            exc.points,
        ) from None
    start = dict(found.positions)
    geoid_given = fieldbook.geoid_undulation is not None or any(
        p.geoid is not None for p in fieldbook.points
    )
    return GeodeticFrame(
        crs=crs,
        crs_text=fieldbook.crs.text if fieldbook.crs else "",
        refraction=fieldbook.refraction,
        undulation=und,
        geoid_given=geoid_given,
        start=start,
        methods=dict(found.methods),
    )


def grid_to_ecef(crs: Crs, east_m: float, north_m: float, h: float) -> XYZ:
    """Earth-centred position of a point given by grid east/north in metres and height h."""
    per_unit = crs.metres_per_unit
    xyz = crs.grid_to_ecef(
        np.array([east_m / per_unit]), np.array([north_m / per_unit]), np.array([h])
    )
    x, y, z = (float(c) for c in np.asarray(xyz).reshape(3))
    return x, y, z


def _given_points(
    points: Sequence[PointStatement], crs: Crs, und: Mapping[str, float]
) -> tuple[list[start3d.KnownPoint], list[start3d.KnownHeight]]:
    """Points with a given position (grid or lat/lon) and benchmarks with a height only.

    The positions are converted together: one pyproj call for all grid points, one for all
    points given by latitude and longitude (each point's numbers are those of a call of its
    own).
    """
    geographic = [p for p in points if p.latitude is not None and p.longitude is not None]
    grid = [
        p
        for p in points
        if not (p.latitude is not None and p.longitude is not None)
        and p.east is not None
        and p.north is not None
    ]
    position: dict[int, tuple[float, float, float]] = {}
    if geographic:
        xyz = crs.geodetic_to_ecef(
            np.array([p.latitude for p in geographic]),
            np.array([p.longitude for p in geographic]),
            np.array([_ellipsoidal(p, und) for p in geographic]),
        )
        position.update(zip(map(id, geographic), map(tuple, np.asarray(xyz).tolist())))
    if grid:
        per_unit = crs.metres_per_unit
        xyz = crs.grid_to_ecef(
            np.array([p.east / per_unit for p in grid if p.east is not None]),
            np.array([p.north / per_unit for p in grid if p.north is not None]),
            np.array([_ellipsoidal(p, und) for p in grid]),
        )
        position.update(zip(map(id, grid), map(tuple, np.asarray(xyz).reshape(-1, 3).tolist())))
    known: list[start3d.KnownPoint] = []
    heights: list[start3d.KnownHeight] = []
    for p in points:
        found = position.get(id(p))
        if found is None:
            if p.height is not None:
                heights.append(start3d.KnownHeight(p.name, p.height))
            continue
        if not all(math.isfinite(c) for c in found):
            raise NetworkError(
                f"point {p.name} (line {p.line}) lies where the CRS {crs.definition} cannot "
                "place it on its ellipsoid; check its coordinates and the crs line",
                (p.name,),
            )
        x, y, z = found
        known.append(
            start3d.KnownPoint(
                p.name,
                (x, y, z),
                control=bool(p.fixed or p.weighted),
                height_known=p.height is not None,
            )
        )
    return known, heights


def with_grid_positions(
    points: Sequence[NetworkPoint], fieldbook: Fieldbook, crs: Crs
) -> tuple[NetworkPoint, ...]:
    """Points given by latitude and longitude get their grid east and north (metres).

    One pyproj call converts them all; each point's numbers are those of a call of its own
    (``tests/test_geodetic_grid_positions.py`` compares them bit for bit).
    """
    by_name = {p.name: p for p in fieldbook.points}
    given = [
        k
        for k, p in enumerate(points)
        if (stmt := by_name.get(p.name)) is not None
        and stmt.latitude is not None
        and stmt.longitude is not None
    ]
    if not given:
        return tuple(points)
    statements = [by_name[points[k].name] for k in given]
    east, north = crs.geodetic_to_grid(
        np.array([s.latitude for s in statements], dtype=float),
        np.array([s.longitude for s in statements], dtype=float),
    )
    per_unit = crs.metres_per_unit
    out = list(points)
    for k, e, n in zip(given, np.asarray(east).tolist(), np.asarray(north).tolist()):
        out[k] = out[k]._replace(east=e * per_unit, north=n * per_unit)
    return tuple(out)


def _ellipsoidal(p: PointStatement, und: Mapping[str, float]) -> float:
    """h = H + N of a given point (H taken as 0 where the book gives none)."""
    return (p.height if p.height is not None else 0.0) + und.get(p.name, 0.0)


def height_only_points(fieldbook: Fieldbook) -> set[str]:
    """Points that only used level lines touch and that have no given position: they
    carry a height alone (their place on the ellipsoid is only a reference)."""
    table = fieldbook.table
    active = ~(table.ignored | table.planned)
    level = table.is_kind("level")
    levels = np.flatnonzero(active & level)
    if not levels.size:
        return set()
    spatial = names_in(table, np.flatnonzero(active & ~level))
    placed = {
        p.name
        for p in fieldbook.points
        if p.latitude is not None or (p.east is not None and p.north is not None)
    }
    return names_in(table, levels) - spatial - placed


def _height_only(
    fieldbook: Fieldbook, crs: Crs, known: Sequence[start3d.KnownPoint]
) -> list[start3d.KnownPoint]:
    """Height-only points placed at a reference position (the first given point, else the
    CRS's origin or the centre of its area of use); only their heights are estimated."""
    names = sorted(height_only_points(fieldbook))
    if not names:
        return []
    if known:
        reference = np.array(known[0].xyz, dtype=float)
    else:
        lat, lon = _crs_centre(crs)
        reference = np.asarray(
            crs.geodetic_to_ecef(np.array([lat]), np.array([lon]), np.array([0.0]))
        ).reshape(3)
    x, y, z = (float(c) for c in reference)
    return [start3d.KnownPoint(name, (x, y, z), height_known=False) for name in names]


def _crs_centre(crs: Crs) -> tuple[float, float]:
    """Latitude and longitude (radians) of a place the CRS covers."""
    if crs.area_of_use is not None:
        west, south, east, north = crs.area_of_use
        return math.radians((south + north) / 2.0), math.radians((west + east) / 2.0)
    lat, lon = crs.grid_to_geodetic(np.array([0.0]), np.array([0.0]))
    return float(np.asarray(lat).reshape(-1)[0]), float(np.asarray(lon).reshape(-1)[0])


def _start_observations(
    fieldbook: Fieldbook, crs: Crs, known: Sequence[start3d.KnownPoint]
) -> list[start3d.Observation]:
    """The used observations in the start-value module's terms.

    Grid azimuths and distances need the convergence and scale factor only roughly here (start
    values); they are taken at the first given point.
    """
    convergence, scale = _rough_factors(crs, known)
    refraction = fieldbook.refraction
    table = fieldbook.table
    rows = np.flatnonzero(~(table.ignored | table.planned))
    names, kinds = table.names, table.kinds
    # ``or 0.0`` of an absent (NaN) or zero height: 0.0 (a −0.0 too, as on the objects)
    heights = [table.instrument_height[rows], table.target_height[rows]]
    hi, ht = (np.where(np.isnan(h) | (h == 0.0), 0.0, h).tolist() for h in heights)
    by_round: dict[int, list[tuple[str, float]]] = {}
    stations: dict[int, str] = {}
    out: list[start3d.Observation] = []
    for row, kind_code, f, a, t, value, i_h, t_h, line in zip(
        rows.tolist(),
        table.kind[rows].tolist(),
        table.frm[rows].tolist(),
        table.at[rows].tolist(),
        table.to[rows].tolist(),
        table.value[rows].tolist(),
        hi,
        ht,
        table.round_line[rows].tolist(),
    ):
        kind = kinds[kind_code]
        frm, to = names[f], names[t]
        if kind == "direction":
            if line >= 0:
                by_round.setdefault(line, []).append((to, value))
                stations.setdefault(line, frm)
            continue
        if kind == "slope":
            out.append(start3d.SlopeDistance(frm, to, value, i_h, t_h))
        elif kind == "zenith":
            out.append(start3d.ZenithAngle(frm, to, value, i_h, t_h, refraction))
        elif kind == "baseline":
            dx, dy, dz = table.baselines[row].components
            out.append(start3d.Baseline(frm, to, dx, dy, dz))
        elif kind == "level":
            out.append(start3d.HeightDifference(frm, to, value))
        elif kind == "distance":
            out.append(start3d.GridDistance(frm, to, value, scale))
        elif kind == "azimuth":
            out.append(start3d.Azimuth(frm, to, value, convergence))
        elif kind == "angle":
            assert a >= 0
            out.append(start3d.HorizontalAngle(names[a], frm, to, value))
    for line in sorted(by_round):
        out.append(start3d.DirectionRound(stations[line], tuple(by_round[line])))
    return out


def _rough_factors(crs: Crs, known: Sequence[start3d.KnownPoint]) -> tuple[float, float]:
    """Convergence (radians) and point scale factor at the first given point (1 and 0 if none)."""
    if not known:
        return 0.0, 1.0
    lat, lon, _ = crs.ecef_to_geodetic(np.array([known[0].xyz], dtype=float))
    factors = crs.factors(lat, lon)
    convergence = float(np.asarray(factors.convergence).reshape(-1)[0])
    scale = float(np.asarray(factors.scale).reshape(-1)[0])
    if not (math.isfinite(convergence) and math.isfinite(scale)):
        return 0.0, 1.0
    return convergence, scale


def _listed(names: Sequence[str], limit: int = 12) -> str:
    shown = ", ".join(names[:limit])
    more = len(names) - limit
    return shown + (f" and {more} more" if more > 0 else "")
