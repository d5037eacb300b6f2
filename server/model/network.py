"""Field book → network model: points, unknowns, control and the checks on them.

The network decides *what* is estimated: which coordinate components are
unknowns, which are held fixed, which are weighted control, and one
orientation unknown per direction round.  It refuses networks that cannot be
adjusted and says why, naming the points.
"""

from __future__ import annotations

from collections import defaultdict
from collections.abc import Sequence
from dataclasses import dataclass, field, replace
from itertools import repeat
from operator import attrgetter, contains
from typing import TYPE_CHECKING, NamedTuple

import numpy as np
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components

from server.errors import NetworkError
from server.fieldbook.model import (
    HORIZONTAL_KINDS,
    SPATIAL_KINDS,
    Fieldbook,
    Observation,
    PointStatement,
)
from server.fieldbook.table import NONE, ObservationRows, ObservationTable, table_of

if TYPE_CHECKING:  # the geodetic modules load only for a geodetic book (start-up time)
    from server.geodesy.crs import Crs
    from server.model.geodetic import GeodeticFrame

#: Unknown-component labels, in parameter order within a point.
EAST, NORTH, HEIGHT = "E", "N", "H"


class NetworkPoint(NamedTuple):
    """A mark as the network sees it; coordinates in metres, None where not given.

    A named tuple (immutable like a frozen dataclass) because a network has one per mark
    and a tuple is made several times faster than a frozen dataclass.
    """

    name: str
    east: float | None
    north: float | None
    height: float | None
    fixed: str
    weighted: str
    sd_en: float | None
    sd_h: float | None
    line: int | None
    in_use: bool
    note: str = ""


class Parameter(NamedTuple):
    """One unknown: a coordinate component of a point, or a round's orientation (a named
    tuple, like ``NetworkPoint``: one per unknown)."""

    kind: str  # "E", "N", "H" or "O"
    point: str | None
    round_line: int | None = None


@dataclass(frozen=True, slots=True)
class Network:
    """The adjustment model derived from a field book (immutable).

    ``used`` are the observations adjusted (not ignored), in file order: a lazy view
    of the field book's table when built here (``fieldbook/table.py``), any sequence
    otherwise.  The array stages read them as columns: ``used_table`` (row k is
    ``used[k]``), ``used_rows`` (their rows of ``fieldbook.table``) and
    ``name_point`` (the network point of each name of those tables).
    """

    fieldbook: Fieldbook
    dimension: int
    points: tuple[NetworkPoint, ...]
    used: Sequence[Observation]
    parameters: tuple[Parameter, ...]
    warnings: tuple[str, ...]
    free_datum: tuple[str, ...] = ()  # "translation", "rotation": removed by inner constraints
    #: the geodetic 3D model's CRS, undulations and start positions (None: plane model)
    geodetic: GeodeticFrame | None = None
    _columns: dict[str, object] = field(default_factory=dict, init=False, repr=False, compare=False)

    @property
    def used_table(self) -> ObservationTable:
        """The used observations as columns (``fieldbook/table.py``): row k is ``used[k]``."""
        cached = self._columns.get("table")
        if cached is None:
            table, rows = table_of(self.used)
            cached = table if rows is None else table.take(rows)
            self._columns["table"] = cached
        return cached  # type: ignore[return-value]

    @property
    def used_rows(self) -> np.ndarray:
        """Rows of ``fieldbook.table`` of the used observations, in ``used`` order (int64)."""
        cached = self._columns.get("rows")
        if cached is None:
            used = self.used
            if isinstance(used, ObservationRows) and used.table is self.fieldbook.table:
                cached = np.arange(len(used)) if used.rows is None else used.rows
            else:  # a sequence built elsewhere: its rows by line (one observation a line)
                row_of_line = {line: k for k, line in enumerate(self.fieldbook.table.line.tolist())}
                cached = np.array([row_of_line[o.line] for o in used], dtype=np.int64)
            self._columns["rows"] = cached
        return cached  # type: ignore[return-value]

    @property
    def name_point(self) -> np.ndarray:
        """Index into ``points`` of each name of ``used_table.names`` (int64; −1: none)."""
        cached = self._columns.get("name_point")
        if cached is None:
            index = dict(zip(map(attrgetter("name"), self.points), range(len(self.points))))
            names = self.used_table.names
            cached = np.fromiter(map(index.get, names, repeat(-1)), np.int64, len(names))
            self._columns["name_point"] = cached
        return cached  # type: ignore[return-value]

    @property
    def datum_defect(self) -> int:
        """Number of datum parameters the inner constraints remove (0 with control)."""
        return 2 * ("translation" in self.free_datum) + ("rotation" in self.free_datum)

    @property
    def horizontal(self) -> bool:
        """True when eastings and northings are adjusted."""
        return self.dimension in (2, 3)

    @property
    def vertical(self) -> bool:
        """True when heights are adjusted."""
        return self.dimension in (1, 3)


def network_dimension(fieldbook: Fieldbook) -> int:
    """1 for leveling only, 2 for horizontal kinds only, 3 for both (ignored ones count)."""
    table = fieldbook.table
    has_level = bool(table.is_kind("level").any())
    has_horizontal = bool(table.is_kind(*HORIZONTAL_KINDS).any())
    if table.is_kind(*SPATIAL_KINDS).any() or (has_level and has_horizontal):
        return 3
    if has_horizontal:
        return 2
    return 1


def build_network(fieldbook: Fieldbook) -> Network:
    """Derive the network model, or raise ``NetworkError`` naming the points at fault."""
    table = fieldbook.table
    if not len(table):
        raise NetworkError("the field book has no observations, so there is nothing to adjust")
    rows = np.flatnonzero(~table.ignored)
    if not rows.size:
        raise NetworkError("every observation is marked ignore, so there is nothing to adjust")
    used = ObservationRows(table, rows)
    if table.is_kind(*SPATIAL_KINDS).any():
        from server.model.geodetic_network import build_geodetic_network  # it builds on this

        return build_geodetic_network(fieldbook, used)  # type: ignore[arg-type]
    dimension = network_dimension(fieldbook)
    points = _collect_points(fieldbook, used)
    if any(p.latitude is not None for p in fieldbook.points):
        from server.model.geodetic import resolve_crs  # a crs line in a plane file

        crs = resolve_crs(fieldbook)
        assert crs is not None, "the parser refuses lat= and lon= without a crs line"
        points = with_grid_positions(points, fieldbook, crs)
    warnings = [
        f"point {p.name} (line {p.line}) is not touched by any used observation; "
        "it is reported with its given values"
        for p in points
        if not p.in_use
    ]
    network = Network(
        fieldbook=fieldbook,
        dimension=dimension,
        points=points,
        used=used,
        parameters=(),
        warnings=(),
    )
    columns = _UsedColumns(network)
    parameters = _parameters(points, columns)
    free_datum: tuple[str, ...] = ()
    if columns.level.any():
        warnings += _check_height_datum(points, columns)
    if columns.horizontal.any():
        _check_coincident(points, columns)
        free_datum, more = _check_horizontal_datum(points, columns)
        warnings += more
    built = replace(network, parameters=parameters, warnings=tuple(warnings), free_datum=free_datum)
    built._columns.update(network._columns)  # the used table and its names stay valid
    return built


@dataclass(frozen=True)
class _UsedColumns:
    """What the network checks read of the used observations: point indices and kinds."""

    table: ObservationTable
    frm: np.ndarray  # index into the network's points
    at: np.ndarray  # index into the network's points, −1: none
    to: np.ndarray
    level: np.ndarray  # bool: a level row
    horizontal: np.ndarray  # bool: a row of a horizontal kind

    def __init__(self, network: Network) -> None:
        table = network.used_table
        point = np.append(network.name_point, -1)  # an absent AT (−1) stays −1
        object.__setattr__(self, "table", table)
        object.__setattr__(self, "frm", point[table.frm])
        object.__setattr__(self, "at", point[table.at])
        object.__setattr__(self, "to", point[table.to])
        object.__setattr__(self, "level", table.is_kind("level"))
        object.__setattr__(self, "horizontal", table.is_kind(*HORIZONTAL_KINDS))


def _collect_points(fieldbook: Fieldbook, used: Sequence[Observation]) -> tuple[NetworkPoint, ...]:
    """Every point in order of first appearance (declared or observed)."""
    declared: dict[str, PointStatement] = {p.name: p for p in fieldbook.points}
    ordered = _first_appearance(fieldbook)
    table, rows = table_of(used)
    touched_ids = np.zeros(len(table.names) + 1, bool)  # the last entry: an absent AT
    for column in (table.frm, table.at, table.to):
        touched_ids[column if rows is None else column[rows]] = True
    touched = set(map(table.names.__getitem__, np.flatnonzero(touched_ids[:-1]).tolist()))
    names = list(ordered)
    # one tuple a mark without a point line, made in C (a network may have 100k marks)
    none, empty = repeat(None), repeat("")  # endless: zip may draw on each many times a row
    blank = (none, none, none, empty, empty, none, none, none)  # east … line
    fields = zip(names, *blank, map(touched.__contains__, names), empty)  # … in_use, note
    points = list(map(tuple.__new__, repeat(NetworkPoint), fields))
    for k, stmt in enumerate(map(declared.get, names)):
        if stmt is not None:
            points[k] = NetworkPoint(
                name=stmt.name,
                east=stmt.east,
                north=stmt.north,
                height=stmt.height,
                fixed=stmt.fixed,
                weighted=stmt.weighted,
                sd_en=stmt.sd_en,
                sd_h=stmt.sd_h,
                line=stmt.line,
                in_use=points[k].in_use,
                note=stmt.note,
            )
    return tuple(points)


def with_grid_positions(
    points: tuple[NetworkPoint, ...], fieldbook: Fieldbook, crs: Crs
) -> tuple[NetworkPoint, ...]:
    """Points given by latitude and longitude get their grid east and north (metres)."""
    by_name = {p.name: p for p in fieldbook.points}
    out = []
    per_unit = crs.metres_per_unit
    for p in points:
        stmt = by_name.get(p.name)
        if stmt is None or stmt.latitude is None or stmt.longitude is None:
            out.append(p)
            continue
        east, north = crs.geodetic_to_grid(np.array([stmt.latitude]), np.array([stmt.longitude]))
        out.append(p._replace(east=float(east[0]) * per_unit, north=float(north[0]) * per_unit))
    return tuple(out)


def _first_appearance(fieldbook: Fieldbook) -> dict[str, None]:
    """Point names ordered by (line, place on the line): declarations and observations merged.

    Parsed field books list both in line order, one statement a line, and the
    table numbers the observed names in order of first appearance, so sorting
    each name's first (line, place) with the declarations does; anything else
    (equal or unordered lines) is sorted as events.
    """
    points, table = fieldbook.points, fieldbook.table
    point_lines = np.array([p.line for p in points], dtype=np.int64)
    lines = table.line
    in_order = bool(np.all(np.diff(point_lines) > 0) and np.all(np.diff(lines) > 0))
    if in_order and not np.intersect1d(point_lines, lines).size:
        count = len(table)
        ids = np.stack([table.frm, table.at, table.to], axis=1).ravel()
        place = np.tile(np.array([1, 2, 3], dtype=np.int64), count)
        row = np.repeat(np.arange(count, dtype=np.int64), 3)
        given = ids >= 0
        ids, place, row = ids[given], place[given], row[given]
        seen, first = np.unique(ids, return_index=True)  # name seen[k] first at first[k]
        order = np.lexsort(
            (
                np.concatenate([np.zeros(len(points), np.int64), place[first]]),
                np.concatenate([point_lines, lines[row[first]]]),
            )
        )
        names = [p.name for p in points] + list(map(table.names.__getitem__, seen.tolist()))
        return dict.fromkeys(map(names.__getitem__, order.tolist()))
    ordered: dict[str, None] = {}
    events: list[tuple[int, int, str]] = [(p.line, 0, p.name) for p in points]
    for obs in fieldbook.observations:
        for order_, name in enumerate(_observed_names(obs)):
            events.append((obs.line, order_ + 1, name))
    for _, _, name in sorted(events):
        ordered.setdefault(name)
    return ordered


#: Two marks closer than this (metres) are taken as the same position.
COINCIDENT_M = 1e-6


def _check_coincident(points: tuple[NetworkPoint, ...], columns: _UsedColumns) -> None:
    """Refuse a horizontal observation between two points given the same position.

    Directions and partial derivatives between coincident marks are undefined,
    so the adjustment could not even start; the surveyor must correct the
    coordinates (usually a copied line) or leave out the approximate ones.
    """
    # a last entry for "no point" (−1); None becomes NaN, which no comparison passes
    east = np.array([*map(attrgetter("east"), points), None], dtype=float)
    north = np.array([*map(attrgetter("north"), points), None], dtype=float)
    given = ~np.isnan(east) & ~np.isnan(north)
    rows = np.flatnonzero(columns.horizontal)
    kind = columns.table.kind[rows]
    station = np.where(kind == columns.table.code("angle"), columns.at[rows], columns.frm[rows])
    # per row the pairs (station, TO) then (station, FROM); −1 (no point) indexes the last entry
    a = np.repeat(station, 2)
    b = np.stack([columns.to[rows], columns.frm[rows]], axis=1).ravel()
    with np.errstate(invalid="ignore"):
        hit = (
            (a >= 0)
            & (a != b)
            & given[a]
            & given[b]
            & (np.abs(east[a] - east[b]) <= COINCIDENT_M)
            & (np.abs(north[a] - north[b]) <= COINCIDENT_M)
        )
    if not hit.any():
        return
    first = int(np.flatnonzero(hit)[0])
    row = int(rows[first // 2])
    i, j = int(a[first]), int(b[first])
    names = [points[i].name, points[j].name]
    ea, na = float(east[i]), float(north[i])
    obs_kind = columns.table.kind_names[row]
    line = int(columns.table.line[row])
    raise NetworkError(
        f"points {names[0]} and {names[1]} are given the same position (east {ea:.4f}, north "
        f"{na:.4f} m) but the {obs_kind} on line {line} joins them; two marks "
        "an instrument sees apart need different coordinates: correct the "
        "coordinates, or leave out the approximate ones of the new point",
        names,
    )


def _observed_names(obs: Observation) -> tuple[str, ...]:
    names = [obs.from_point]
    if obs.at is not None and obs.at != obs.from_point:
        names.append(obs.at)
    names.append(obs.to)
    return tuple(names)


def _touched(columns: _UsedColumns, rows: np.ndarray, count: int) -> np.ndarray:
    """Boolean mask over the points: named (FROM, AT or TO) by any of ``rows``."""
    mask = np.zeros(count + 1, bool)  # the last entry: an absent AT
    for column in (columns.frm, columns.at, columns.to):
        mask[column[rows]] = True
    return mask[:count]


def _parameters(points: tuple[NetworkPoint, ...], columns: _UsedColumns) -> tuple[Parameter, ...]:
    """Unknowns in point order (E, N, H), then one orientation per direction round."""
    count = len(points)
    fixed = list(map(attrgetter("fixed"), points))
    free_en = ~np.fromiter(map(contains, fixed, repeat("en")), bool, count)
    free_h = ~np.fromiter(map(contains, fixed, repeat("h")), bool, count)
    estimated = np.empty((count, 3), bool)  # per point: E, N, H estimated
    estimated[:, 0] = estimated[:, 1] = _touched(columns, columns.horizontal, count) & free_en
    estimated[:, 2] = _touched(columns, columns.level, count) & free_h
    point, component = np.nonzero(estimated)  # in point order, E N H within a point
    names = map(attrgetter("name"), map(points.__getitem__, point.tolist()))
    letters = map((EAST, NORTH, HEIGHT).__getitem__, component.tolist())
    # one tuple an unknown, made in C (a network may have 100k unknowns)
    params = list(map(tuple.__new__, repeat(Parameter), zip(letters, names, repeat(None))))
    table = columns.table
    round_line = table.round_line
    in_round = round_line != NONE
    rounds = np.unique(round_line[in_round & (round_line != 0) & table.is_kind("direction")])
    if rounds.size:
        # the station of each round: the AT of its first observation (one pass, not one per round)
        lines, first = np.unique(round_line[in_round], return_index=True)
        station = table.at[np.flatnonzero(in_round)[first]]
        first_at = dict(zip(lines.tolist(), station.tolist()))
        for line in rounds.tolist():
            at = first_at[line]
            params.append(Parameter("O", table.names[at] if at >= 0 else None, round_line=line))
    return tuple(params)


def _held(points: tuple[NetworkPoint, ...], component: str) -> np.ndarray:
    """Per point: ``component`` ("en" or "h") held fixed or weighted (bool)."""
    count = len(points)
    fixed = map(contains, map(attrgetter("fixed"), points), repeat(component))
    weighted = map(contains, map(attrgetter("weighted"), points), repeat(component))
    return np.fromiter(fixed, bool, count) | np.fromiter(weighted, bool, count)


def _shown(names: list[str], limit: int = 12) -> str:
    """A list of point names for a message, shortened past ``limit``."""
    extra = f" and {len(names) - limit} more" if len(names) > limit else ""
    return ", ".join(names[:limit]) + extra


@dataclass(frozen=True, slots=True)
class _Parts:
    """The connected parts of the graph of some observations (points as nodes).

    ``label`` gives each point's part (meaningful where ``inside``); ``order`` lists
    the parts in the order their first point appears among the observations.
    """

    label: np.ndarray
    inside: np.ndarray
    order: list[int]

    def names(self, points: tuple[NetworkPoint, ...], part: int) -> list[str]:
        """The names of a part's points, sorted."""
        members = np.flatnonzero(self.inside & (self.label == part))
        return sorted(points[k].name for k in members.tolist())


def _parts(columns: _UsedColumns, rows_mask: np.ndarray, count: int) -> _Parts:
    """Connected parts of the observations of ``rows_mask``: FROM–TO joined, and an angle's
    AT joined to both."""
    frm, at, to = columns.frm[rows_mask], columns.at[rows_mask], columns.to[rows_mask]
    station = np.where(at != frm, at, NONE)
    sequence = np.stack([frm, station, to], axis=1).ravel()
    sequence = sequence[sequence >= 0]  # the points in order of appearance
    has_station = station >= 0
    start = np.concatenate([frm, station[has_station], station[has_station]])
    end = np.concatenate([to, frm[has_station], to[has_station]])
    graph = coo_matrix((np.ones(start.size), (start, end)), shape=(count, count))
    _, label = connected_components(graph, directed=False)
    inside = np.zeros(count, bool)
    inside[sequence] = True
    labels, first = np.unique(label[sequence], return_index=True)
    return _Parts(label, inside, labels[np.argsort(first)].tolist())


def _check_height_datum(points: tuple[NetworkPoint, ...], columns: _UsedColumns) -> list[str]:
    """Every part of the leveling needs a fixed or weighted height; else name its points."""
    parts = _parts(columns, columns.level, len(points))
    controlled = _held(points, "h")
    held = set(parts.label[parts.inside & controlled].tolist())
    for part in parts.order:
        if part not in held:
            names = parts.names(points, part)
            if len(parts.order) == 1:
                message = (
                    "the leveling has no height datum: no point is held fixed (fix or fix=h) "
                    f"or given a weighted height (sd=); points: {_shown(names)}"
                )
            else:
                message = (
                    "these points are connected by leveling to no fixed or weighted benchmark: "
                    + _shown(names)
                )
            raise NetworkError(message, names)
    if len(parts.order) > 1:
        return [
            f"the leveling falls into {len(parts.order)} separate parts, each with its own "
            "control; they are adjusted together but do not check one another"
        ]
    return []


def _check_horizontal_datum(
    points: tuple[NetworkPoint, ...], columns: _UsedColumns
) -> tuple[tuple[str, ...], list[str]]:
    """Say what the horizontal control leaves undetermined, or choose a free network.

    A part of the network needs translation, rotation and scale from its
    control: two held or weighted points give all three; one point needs an
    observed azimuth for rotation and a distance for scale.  With no
    control anywhere and a single part, the network is adjusted free, with
    inner constraints removing translation (and rotation without azimuths).
    """
    parts = _parts(columns, columns.horizontal, len(points))
    control = _held(points, "en")
    # the kinds observed to a point of each part
    to_part = parts.label[columns.to[columns.horizontal]]
    kind_codes = columns.table.kind[columns.horizontal]
    kinds_in: dict[int, set[str]] = defaultdict(set)
    for part, code in set(zip(to_part.tolist(), kind_codes.tolist())):
        kinds_in[part].add(columns.table.kinds[code])
    if not control.any() and len(parts.order) == 1:
        kinds = kinds_in[parts.order[0]]
        if "distance" not in kinds:
            raise NetworkError(
                "no point is held and no distance is observed, so the network has neither "
                "position nor scale: hold two points (fix=en) or observe distances",
                parts.names(points, parts.order[0]),
            )
        free = ("translation",) if "azimuth" in kinds else ("translation", "rotation")
        return free, [
            "no horizontal control is held: the network is adjusted free (minimally "
            f"constrained: inner constraints on {' and '.join(free)}) so that the "
            "observations can be checked; its coordinates are in an arbitrary datum"
        ]
    held_count = np.bincount(parts.label[parts.inside & control], minlength=len(points))
    for part in parts.order:
        held = int(held_count[part])
        kinds = kinds_in[part]
        missing = []
        if not held:
            missing = ["translation (no point held)"]
        if held < 2 and "azimuth" not in kinds:
            missing.append("rotation (fewer than two points held and no azimuth observed)")
        if held < 2 and "distance" not in kinds:
            missing.append("scale (fewer than two points held and no distance observed)")
        if missing:
            members = np.flatnonzero(parts.inside & (parts.label == part))
            free_names = sorted(points[k].name for k in members.tolist() if not control[k])
            names = free_names or parts.names(points, part)
            raise NetworkError(
                "the horizontal datum is incomplete: "
                + "; ".join(missing)
                + f". Points affected: {_shown(names)}",
                names,
            )
    if len(parts.order) > 1:
        return (), [
            f"the horizontal network falls into {len(parts.order)} separate parts, each with its "
            "own control; they are adjusted together but do not check one another"
        ]
    return (), []
