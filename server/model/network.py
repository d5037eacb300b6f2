"""Field book → network model: points, unknowns, control and the checks on them.

The network decides *what* is estimated: which coordinate components are
unknowns, which are held fixed, which are weighted control, and one
orientation unknown per direction round.  It refuses networks that cannot be
adjusted and says why, naming the points.
"""

from __future__ import annotations

from collections import defaultdict
from dataclasses import dataclass, replace
from itertools import pairwise

import numpy as np

from server.errors import NetworkError
from server.fieldbook.model import (
    HORIZONTAL_KINDS,
    SPATIAL_KINDS,
    Fieldbook,
    Observation,
    PointStatement,
)
from server.geodesy.crs import Crs
from server.model.geodetic import GeodeticFrame

#: Unknown-component labels, in parameter order within a point.
EAST, NORTH, HEIGHT = "E", "N", "H"


@dataclass(frozen=True, slots=True)
class NetworkPoint:
    """A mark as the network sees it; coordinates in metres, None where not given."""

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


@dataclass(frozen=True, slots=True)
class Parameter:
    """One unknown: a coordinate component of a point, or a round's orientation."""

    kind: str  # "E", "N", "H" or "O"
    point: str | None
    round_line: int | None = None


@dataclass(frozen=True, slots=True)
class Network:
    """The adjustment model derived from a field book (immutable)."""

    fieldbook: Fieldbook
    dimension: int
    points: tuple[NetworkPoint, ...]
    used: tuple[Observation, ...]
    parameters: tuple[Parameter, ...]
    warnings: tuple[str, ...]
    free_datum: tuple[str, ...] = ()  # "translation", "rotation": removed by inner constraints
    #: the geodetic 3D model's CRS, undulations and start positions (None: plane model)
    geodetic: GeodeticFrame | None = None

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
    kinds = {obs.kind for obs in fieldbook.observations}
    has_level = "level" in kinds
    has_horizontal = bool(kinds & HORIZONTAL_KINDS)
    if kinds & SPATIAL_KINDS or (has_level and has_horizontal):
        return 3
    if has_horizontal:
        return 2
    return 1


def build_network(fieldbook: Fieldbook) -> Network:
    """Derive the network model, or raise ``NetworkError`` naming the points at fault."""
    if not fieldbook.observations:
        raise NetworkError("the field book has no observations, so there is nothing to adjust")
    used = tuple(obs for obs in fieldbook.observations if not obs.ignored)
    if not used:
        raise NetworkError("every observation is marked ignore, so there is nothing to adjust")
    if any(obs.kind in SPATIAL_KINDS for obs in fieldbook.observations):
        from server.model.geodetic_network import build_geodetic_network  # it builds on this

        return build_geodetic_network(fieldbook, used)
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
    parameters = _parameters(points, used, dimension)
    free_datum: tuple[str, ...] = ()
    if any(o.kind == "level" for o in used):
        warnings += _check_height_datum(points, used)
    if any(o.kind in HORIZONTAL_KINDS for o in used):
        _check_coincident(points, used)
        free_datum, more = _check_horizontal_datum(points, used)
        warnings += more
    return Network(
        fieldbook=fieldbook,
        dimension=dimension,
        points=points,
        used=used,
        parameters=parameters,
        warnings=tuple(warnings),
        free_datum=free_datum,
    )


def _collect_points(
    fieldbook: Fieldbook, used: tuple[Observation, ...]
) -> tuple[NetworkPoint, ...]:
    """Every point in order of first appearance (declared or observed)."""
    declared: dict[str, PointStatement] = {p.name: p for p in fieldbook.points}
    ordered = _first_appearance(fieldbook)
    touched: set[str] = set()
    for obs in used:
        touched.add(obs.from_point)
        touched.add(obs.to)
        if obs.at is not None:
            touched.add(obs.at)
    points = []
    for name in ordered:
        stmt = declared.get(name)
        if stmt is None:
            points.append(
                NetworkPoint(name, None, None, None, "", "", None, None, None, name in touched)
            )
        else:
            points.append(
                NetworkPoint(
                    name=name,
                    east=stmt.east,
                    north=stmt.north,
                    height=stmt.height,
                    fixed=stmt.fixed,
                    weighted=stmt.weighted,
                    sd_en=stmt.sd_en,
                    sd_h=stmt.sd_h,
                    line=stmt.line,
                    in_use=name in touched,
                    note=stmt.note,
                )
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
        out.append(replace(p, east=float(east[0]) * per_unit, north=float(north[0]) * per_unit))
    return tuple(out)


def _first_appearance(fieldbook: Fieldbook) -> dict[str, None]:
    """Point names ordered by (line, place on the line): declarations and observations merged.

    Parsed field books list both in line order, one statement a line, so one
    merge does; anything else (equal or unordered lines) is sorted as events.
    """
    points, observations = fieldbook.points, fieldbook.observations
    point_lines = [p.line for p in points]
    obs_lines = [o.line for o in observations]
    ordered: dict[str, None] = {}
    ordered_lines = _increasing(point_lines) and _increasing(obs_lines)
    if ordered_lines and not set(point_lines) & set(obs_lines):
        i, count = 0, len(points)
        for obs, line in zip(observations, obs_lines):
            while i < count and point_lines[i] < line:
                ordered.setdefault(points[i].name)
                i += 1
            ordered.setdefault(obs.from_point)
            if obs.at is not None:
                ordered.setdefault(obs.at)
            ordered.setdefault(obs.to)
        for p in points[i:]:
            ordered.setdefault(p.name)
        return ordered
    events: list[tuple[int, int, str]] = [(p.line, 0, p.name) for p in points]
    for obs in observations:
        for order, name in enumerate(_observed_names(obs)):
            events.append((obs.line, order + 1, name))
    for _, _, name in sorted(events):
        ordered.setdefault(name)
    return ordered


def _increasing(values: list[int]) -> bool:
    return all(a < b for a, b in pairwise(values))


#: Two marks closer than this (metres) are taken as the same position.
COINCIDENT_M = 1e-6


def _check_coincident(points: tuple[NetworkPoint, ...], used: tuple[Observation, ...]) -> None:
    """Refuse a horizontal observation between two points given the same position.

    Directions and partial derivatives between coincident marks are undefined,
    so the adjustment could not even start; the surveyor must correct the
    coordinates (usually a copied line) or leave out the approximate ones.
    """
    given: dict[str, tuple[float, float]] = {
        p.name: (p.east, p.north) for p in points if p.east is not None and p.north is not None
    }
    for obs in used:
        if obs.kind not in HORIZONTAL_KINDS:
            continue
        station = obs.at if obs.kind == "angle" else obs.from_point
        for a, b in ((station, obs.to), (station, obs.from_point)):
            if a is None or a == b or a not in given or b not in given:
                continue
            (ea, na), (eb, nb) = given[a], given[b]
            if abs(ea - eb) <= COINCIDENT_M and abs(na - nb) <= COINCIDENT_M:
                raise NetworkError(
                    f"points {a} and {b} are given the same position (east {ea:.4f}, north "
                    f"{na:.4f} m) but the {obs.kind} on line {obs.line} joins them; two marks "
                    "an instrument sees apart need different coordinates: correct the "
                    "coordinates, or leave out the approximate ones of the new point",
                    [a, b],
                )


def _observed_names(obs: Observation) -> tuple[str, ...]:
    names = [obs.from_point]
    if obs.at is not None and obs.at != obs.from_point:
        names.append(obs.at)
    names.append(obs.to)
    return tuple(names)


def _parameters(
    points: tuple[NetworkPoint, ...], used: tuple[Observation, ...], dimension: int
) -> tuple[Parameter, ...]:
    """Unknowns in point order (E, N, H), then one orientation per direction round."""
    horizontal_points: set[str] = set()
    vertical_points: set[str] = set()
    for o in used:
        names = (
            vertical_points
            if o.kind == "level"
            else (horizontal_points if o.kind in HORIZONTAL_KINDS else None)
        )
        if names is not None:
            names.add(o.from_point)
            names.add(o.to)
            if o.at is not None:
                names.add(o.at)
    params: list[Parameter] = []
    for p in points:
        if p.name in horizontal_points and "en" not in p.fixed:
            params += [Parameter(EAST, p.name), Parameter(NORTH, p.name)]
        if p.name in vertical_points and "h" not in p.fixed:
            params.append(Parameter(HEIGHT, p.name))
    rounds = sorted({o.round_line for o in used if o.kind == "direction" and o.round_line})
    first_at: dict[int, str | None] = {}  # station of each round (one pass, not one per round)
    for o in used:
        if o.round_line is not None:
            first_at.setdefault(o.round_line, o.at)
    for line in rounds:
        params.append(Parameter("O", first_at[line], round_line=line))
    del dimension  # the kinds of the used observations decide the unknowns
    return tuple(params)


def _shown(names: list[str], limit: int = 12) -> str:
    """A list of point names for a message, shortened past ``limit``."""
    extra = f" and {len(names) - limit} more" if len(names) > limit else ""
    return ", ".join(names[:limit]) + extra


def _graph(used: tuple[Observation, ...], kinds: frozenset[str]) -> dict[str, set[str]]:
    graph: dict[str, set[str]] = defaultdict(set)
    for obs in used:
        if obs.kind in kinds:
            a, b = obs.from_point, obs.to
            if obs.at is None or obs.at == a:
                if a != b:
                    graph[a].add(b)
                    graph[b].add(a)
                else:
                    graph[a].update(())  # the point is in the graph, with no neighbour
                continue
            names = _observed_names(obs)
            for a in names:
                graph[a].update(n for n in names if n != a)
    return graph


def _check_height_datum(
    points: tuple[NetworkPoint, ...], used: tuple[Observation, ...]
) -> list[str]:
    """Every part of the leveling needs a fixed or weighted height; else name its points."""
    parts = connected_parts(_graph(used, frozenset({"level"})))
    controlled = {p.name for p in points if "h" in p.fixed or "h" in p.weighted}
    for part in parts:
        if not part & controlled:
            names = sorted(part)
            if len(parts) == 1:
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
    if len(parts) > 1:
        return [
            f"the leveling falls into {len(parts)} separate parts, each with its own "
            "control; they are adjusted together but do not check one another"
        ]
    return []


def _check_horizontal_datum(
    points: tuple[NetworkPoint, ...], used: tuple[Observation, ...]
) -> tuple[tuple[str, ...], list[str]]:
    """Say what the horizontal control leaves undetermined, or choose a free network.

    A part of the network needs translation, rotation and scale from its
    control: two held or weighted points give all three; one point needs an
    observed azimuth for rotation and a distance for scale.  With no
    control anywhere and a single part, the network is adjusted free, with
    inner constraints removing translation (and rotation without azimuths).
    """
    horizontal = frozenset(HORIZONTAL_KINDS)
    parts = connected_parts(_graph(used, horizontal))
    control = {p.name for p in points if "en" in p.fixed or "en" in p.weighted}
    kinds_in = {
        frozenset(part): {o.kind for o in used if o.kind in horizontal and o.to in part}
        for part in parts
    }
    if not control and len(parts) == 1:
        kinds = kinds_in[frozenset(parts[0])]
        if "distance" not in kinds:
            raise NetworkError(
                "no point is held and no distance is observed, so the network has neither "
                "position nor scale: hold two points (fix=en) or observe distances",
                sorted(parts[0]),
            )
        free = ("translation",) if "azimuth" in kinds else ("translation", "rotation")
        return free, [
            "no horizontal control is held: the network is adjusted free (minimally "
            f"constrained: inner constraints on {' and '.join(free)}) so that the "
            "observations can be checked; its coordinates are in an arbitrary datum"
        ]
    for part in parts:
        held = part & control
        kinds = kinds_in[frozenset(part)]
        missing = []
        if not held:
            missing = ["translation (no point held)"]
        if len(held) < 2 and "azimuth" not in kinds:
            missing.append("rotation (fewer than two points held and no azimuth observed)")
        if len(held) < 2 and "distance" not in kinds:
            missing.append("scale (fewer than two points held and no distance observed)")
        if missing:
            names = sorted(part - control) or sorted(part)
            raise NetworkError(
                "the horizontal datum is incomplete: "
                + "; ".join(missing)
                + f". Points affected: {_shown(names)}",
                names,
            )
    if len(parts) > 1:
        return (), [
            f"the horizontal network falls into {len(parts)} separate parts, each with its "
            "own control; they are adjusted together but do not check one another"
        ]
    return (), []


def connected_parts(graph: dict[str, set[str]]) -> list[set[str]]:
    """Connected components of an undirected graph, in first-seen order."""
    seen: set[str] = set()
    parts: list[set[str]] = []
    for start in graph:
        if start in seen:
            continue
        part = {start}
        stack = [start]
        while stack:
            for nxt in graph[stack.pop()]:
                if nxt not in part:
                    part.add(nxt)
                    stack.append(nxt)
        seen |= part
        parts.append(part)
    return parts
