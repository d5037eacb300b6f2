"""Traverse closures before adjustment: angular and linear misclosure, precision 1 : N.

A traverse is a chain of stations P0 … Pk joined by measured distances, with
an angle at every inner station between the station before and the station
after (an ``angle`` line, or two directions of one round).  It is found in
the field book's horizontal observations in two shapes:

* a link: P0 and Pk have fixed coordinates, P0 is oriented by an angle from a
  fixed backsight (or an observed azimuth of the first leg) and Pk may close
  on a fixed foresight (or an observed azimuth of the last leg), which gives
  the angular misclosure; P0 = Pk is allowed (a loop leaving a known point);
* a polygon closed on itself among stations no link traverse covers, with an
  angle at every corner: its angular misclosure is Σ angles − (n − 2)·180°
  for interior angles or − (n + 2)·180° for exterior ones, whichever is
  nearer; its start azimuth is assumed, which leaves the linear misclosure
  unchanged.

As the textbook closure does, the angular misclosure is spread equally over
the angles before the latitudes and departures are summed, so the linear
misclosure measures the distances and the remaining angle errors, not one
angle blunder counted twice.  Distances are the values used by the
adjustment (after ``scale factor=``); several distances of one leg are
averaged.  Nothing here is adjusted by least squares.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
from itertools import pairwise

import numpy as np

from server.fieldbook.model import Fieldbook, TraverseTolerance
from server.fieldbook.table import NONE, ObservationTable
from server.model.misclosures import Misclosure
from server.units import wrap_2pi, wrap_pi

#: How many station visits one search may make before it gives up, and all searches
#: together per station of the network (keeps big networks fast: a route not found
#: within them is not reported).
_SEARCH_BUDGET = 20_000
_TOTAL_BUDGET_PER_STATION = 50


@dataclass(frozen=True, slots=True)
class Closure:
    """Latitude/departure closure of one traverse, lengths in metres and angles in radians."""

    misclosure_east: float
    misclosure_north: float
    length: float

    @property
    def linear(self) -> float:
        return math.hypot(self.misclosure_east, self.misclosure_north)

    @property
    def ratio(self) -> float | None:
        """N of the precision 1 : N (None when the traverse closes exactly)."""
        linear = self.linear
        return None if linear == 0.0 else self.length / linear


class _Graph:
    """Legs (distance means), angles at each station, observed azimuths and fixed points."""

    def __init__(self, fieldbook: Fieldbook) -> None:
        sums: dict[frozenset[str], list[float]] = {}
        self.angles: dict[tuple[str, str, str], float] = {}  # (back, at, fore) → clockwise angle
        self.booked: set[tuple[str, str, str]] = set()  # the angles as the lines state them
        self.azimuths: dict[tuple[str, str], float] = {}
        table = fieldbook.table
        rows = np.flatnonzero(~table.ignored)  # the used observations, read as columns
        names = table.names
        frm = [names[k] for k in table.frm[rows].tolist()]
        to = [names[k] for k in table.to[rows].tolist()]
        at = table.at[rows]
        value = table.value[rows].tolist()
        kind = table.kind[rows]
        round_line = table.round_line[rows]
        self.order = _first_seen(table, rows)

        def rows_of(name: str, also: np.ndarray | bool = True) -> list[int]:
            """The rows of one kind, in file order (each kind fills its own tables)."""
            return np.flatnonzero((kind == table.code(name)) & also).tolist()

        for k in rows_of("distance"):
            sums.setdefault(frozenset((frm[k], to[k])), []).append(value[k])
        at_list = at.tolist()
        for k in rows_of("angle", at >= 0):
            self._angle(frm[k], names[at_list[k]], to[k], value[k])
        for k in rows_of("azimuth"):
            self.azimuths.setdefault((frm[k], to[k]), value[k])
            self.azimuths.setdefault((to[k], frm[k]), wrap_2pi(value[k] + math.pi))
        # a round gives the angle between any two of its directions; looked up when needed
        readings_of: dict[int, dict[str, float]] = {}  # by round, in order of first direction
        station_of: dict[int, str] = {}
        lines = round_line.tolist()
        for k in rows_of("direction", round_line != NONE):
            line = lines[k]
            readings = readings_of.get(line)
            if readings is None:
                readings = readings_of[line] = {}
                station_of[line] = frm[k]
            readings.setdefault(to[k], value[k])
        self.rounds_at: dict[str, list[dict[str, float]]] = {}
        for line, readings in readings_of.items():
            self.rounds_at.setdefault(station_of[line], []).append(readings)
        self.legs = {
            pair: sum(values) / len(values) for pair, values in sums.items() if len(pair) == 2
        }
        self.neighbours: dict[str, list[str]] = {}
        order = self.order
        for pair in self.legs:
            a, b = pair  # the two in file order (as sorted() by order would give them)
            if order.get(b, 0) < order.get(a, 0):
                a, b = b, a
            self.neighbours.setdefault(a, []).append(b)
            self.neighbours.setdefault(b, []).append(a)
        self.fixed = {
            p.name: (p.east, p.north)
            for p in fieldbook.points
            if "en" in p.fixed and p.east is not None and p.north is not None
        }

    def angle(self, back: str, at: str, fore: str) -> float | None:
        """The clockwise angle from back to fore at a station: an angle line, else a round."""
        value = self.angles.get((back, at, fore))
        if value is not None or back == fore:
            return value
        for readings in self.rounds_at.get(at, ()):
            if back in readings and fore in readings:
                return wrap_2pi(readings[fore] - readings[back])
        return None

    def _angle(self, back: str, at: str, fore: str, value: float) -> None:
        # the first observation of an angle stands for it; the reverse is its explement
        if (back, at, fore) not in self.angles:
            self.booked.add((back, at, fore))
            self.angles[(back, at, fore)] = value
            self.angles[(fore, at, back)] = wrap_2pi(-value)

    def turned(self, back: str, at: str, fore: str) -> float:
        """The angle at a station of a found traverse (the search only walks booked angles)."""
        value = self.angle(back, at, fore)
        assert value is not None, (back, at, fore)
        return value

    def bearing(self, a: str, b: str) -> float:
        (ea, na), (eb, nb) = self.fixed[a], self.fixed[b]
        return wrap_2pi(math.atan2(eb - ea, nb - na))

    def start_azimuth(self, start: str, first: str) -> tuple[float, bool] | None:
        """Azimuth of the first leg and whether an angle gave it (it then counts as a station)."""
        for back in sorted(self.fixed, key=lambda n: self.order.get(n, 0)):
            angle = self.angle(back, start, first)
            if back != start and angle is not None and self.fixed[back] != self.fixed[start]:
                return wrap_2pi(self.bearing(start, back) + angle), True
        observed = self.azimuths.get((start, first))
        return None if observed is None else (observed, False)

    def closing_azimuth(self, last: str, end: str) -> tuple[float | None, float] | None:
        """(Angle at the end to a fixed foresight or None, known azimuth it should give)."""
        for fore in sorted(self.fixed, key=lambda n: self.order.get(n, 0)):
            angle = self.angle(last, end, fore)
            if fore != end and angle is not None and self.fixed[fore] != self.fixed[end]:
                return angle, self.bearing(end, fore)
        observed = self.azimuths.get((last, end))
        return None if observed is None else (None, observed)


def _first_seen(table: ObservationTable, rows: np.ndarray) -> dict[str, int]:
    """The rank of every name in order of first appearance among ``rows`` (FROM, AT, TO)."""
    ids = np.stack([table.frm[rows], table.at[rows], table.to[rows]], axis=1).ravel()
    ids = ids[ids >= 0]
    seen, first = np.unique(ids, return_index=True)
    ordered = seen[np.argsort(first)].tolist()
    return {table.names[k]: rank for rank, k in enumerate(ordered)}


def traverse_misclosures(fieldbook: Fieldbook) -> tuple[Misclosure, ...]:
    """Every link traverse between fixed points, then polygons closed on themselves."""
    graph = _Graph(fieldbook)
    if not graph.legs:
        return ()
    tolerance = fieldbook.traverse_tolerance
    total = [_SEARCH_BUDGET + _TOTAL_BUDGET_PER_STATION * len(graph.neighbours)]
    used_legs: set[frozenset[str]] = set()
    covered: set[str] = set()
    found: list[Misclosure] = []
    for start in sorted(graph.fixed, key=lambda n: graph.order.get(n, 0)):
        for first in graph.neighbours.get(start, ()):
            if frozenset((start, first)) in used_legs or first in graph.fixed:
                continue
            oriented = graph.start_azimuth(start, first)
            if oriented is None:
                continue
            path = _search(graph, [start, first], lambda node, path: node in graph.fixed, total)
            if path is None:
                continue
            found.append(_link(graph, path, oriented, tolerance))
            used_legs.update(frozenset(leg) for leg in pairwise(path))
            covered.update(path[1:-1])
    for start in sorted(graph.neighbours, key=lambda n: graph.order.get(n, 0)):
        if start in covered or start in graph.fixed:
            continue
        for first in graph.neighbours[start]:
            if first in covered or frozenset((start, first)) in used_legs:
                continue
            path = _search(
                graph,
                [start, first],
                partial(_closes_polygon, graph, start),
                total,
                avoid=covered,
            )
            if path is not None:
                found.append(_polygon(graph, path, tolerance))
                used_legs.update(frozenset(leg) for leg in pairwise(path))
                covered.update(path)
                break
    return tuple(found)


def _closes_polygon(graph: _Graph, start: str, node: str, path: list[str]) -> bool:
    """A polygon search ends back at its start, with an angle there between the last and
    the first leg."""
    return node == start and len(path) > 3 and graph.angle(path[-2], start, path[1]) is not None


def _search(
    graph: _Graph,
    path: list[str],
    done: Callable[[str, list[str]], bool],
    total: list[int],
    avoid: frozenset[str] | set[str] = frozenset(),
) -> list[str] | None:
    """Depth-first walk along angle chains, next stations in file order; the first end wins.

    ``path`` holds the first two stations; ``done(node, path)`` says where a walk ends.
    An explicit stack (one iterator of next stations per station on the path)
    lets a traverse of any length through without recursion.
    """
    budget = min(_SEARCH_BUDGET, total[0])
    on_path = set(path)
    stack = [iter(graph.neighbours.get(path[-1], ()))]
    while stack and budget > 0:
        fore = next(stack[-1], None)
        if fore is None:
            stack.pop()
            if stack:
                on_path.discard(path.pop())
            continue
        if fore in avoid or graph.angle(path[-2], path[-1], fore) is None:
            continue
        if fore == path[0] and done(fore, [*path, fore]):
            return [*path, fore]
        if fore in on_path:
            continue
        budget -= 1
        total[0] -= 1
        path.append(fore)
        on_path.add(fore)
        if done(fore, path):
            return list(path)
        stack.append(iter(graph.neighbours.get(fore, ())))
    return None


def _leg(graph: _Graph, a: str, b: str) -> float:
    return graph.legs[frozenset((a, b))]


def closure(
    azimuths: list[float],
    distances: list[float],
    start_en: tuple[float, float],
    end_en: tuple[float, float],
) -> Closure:
    """Sum the departures (east) and latitudes (north) of the legs.

    The misclosure is the computed end minus its known coordinates.
    """
    east = start_en[0] + sum(d * math.sin(a) for a, d in zip(azimuths, distances))
    north = start_en[1] + sum(d * math.cos(a) for a, d in zip(azimuths, distances))
    return Closure(east - end_en[0], north - end_en[1], sum(distances))


def _link(
    graph: _Graph, path: list[str], oriented: tuple[float, bool], tol: TraverseTolerance
) -> Misclosure:
    azimuth, start_angle = oriented
    turned = [graph.turned(path[i - 1], path[i], path[i + 1]) for i in range(1, len(path) - 1)]
    legs = [_leg(graph, a, b) for a, b in pairwise(path)]
    stations = len(turned) + (1 if start_angle else 0)
    raw = _azimuths(azimuth, turned)
    angular = None
    ending = graph.closing_azimuth(path[-2], path[-1])
    if ending is not None:
        end_angle, known = ending
        last = raw[-1] if end_angle is None else wrap_2pi(raw[-1] + math.pi + end_angle)
        stations += 0 if end_angle is None else 1
        angular = wrap_pi(last - known)
    balanced = raw if angular is None else _balance(azimuth, turned, angular, stations, start_angle)
    fit = closure(balanced, legs, graph.fixed[path[0]], graph.fixed[path[-1]])
    return _entry(path, fit, angular, stations, tol)


def _polygon(graph: _Graph, path: list[str], tol: TraverseTolerance) -> Misclosure:
    if _reversed_corners(graph, path) > _reversed_corners(graph, path[::-1]):
        path = path[::-1]  # walk the way the angles were booked, so their sum keeps its sign
    corners = [*path[-2:-1], *path]  # the station before the start closes the first corner
    turned = [
        graph.turned(corners[i - 1], corners[i], corners[i + 1]) for i in range(1, len(corners) - 1)
    ]
    n = len(turned)
    total = sum(turned)
    # interior and exterior sums differ by 4·180°, so the nearest wraps to one of them
    angular = wrap_pi(total - (n - 2) * math.pi)
    legs = [_leg(graph, a, b) for a, b in pairwise(path)]
    start = graph.fixed.get(path[0], (0.0, 0.0))
    both_fixed = path[0] in graph.fixed and path[1] in graph.fixed
    first = graph.bearing(path[0], path[1]) if both_fixed else 0.0  # else assumed
    correction = -angular / n
    azimuths, azimuth = [first], first
    for angle in turned[1:]:
        azimuth = wrap_2pi(azimuth + math.pi + angle + correction)
        azimuths.append(azimuth)
    fit = closure(azimuths, legs, start, start)
    return _entry(path, fit, angular, n, tol)


def _reversed_corners(graph: _Graph, path: list[str]) -> int:
    """How many corners of a closed path use the explement of a booked angle."""
    corners = [path[-2], *path]
    return sum(
        (corners[i + 1], corners[i], corners[i - 1]) in graph.booked
        for i in range(1, len(corners) - 1)
    )


def _azimuths(first: float, turned: list[float]) -> list[float]:
    out = [first]
    for angle in turned:
        out.append(wrap_2pi(out[-1] + math.pi + angle))
    return out


def _balance(
    first: float, turned: list[float], angular: float, stations: int, start_angle: bool
) -> list[float]:
    """Azimuths with the angular misclosure taken out equally at every angle station."""
    correction = -angular / stations
    azimuth = wrap_2pi(first + (correction if start_angle else 0.0))
    out = [azimuth]
    for angle in turned:
        azimuth = wrap_2pi(azimuth + math.pi + angle + correction)
        out.append(azimuth)
    return out


def _entry(
    path: list[str], fit: Closure, angular: float | None, stations: int, tol: TraverseTolerance
) -> Misclosure:
    k = tol.angular_per_sqrtn
    angular_allowed = None if k is None else k * math.sqrt(stations)
    return Misclosure(
        kind="traverse",
        points=tuple(path),
        misclosure=fit.linear,
        length=fit.length,
        setups=None,
        allowed=None if tol.ratio is None else fit.length / tol.ratio,
        angular=angular,
        angular_allowed=angular_allowed,
        angle_stations=stations,
        misclosure_east=fit.misclosure_east,
        misclosure_north=fit.misclosure_north,
        ratio_allowed=tol.ratio,
    )
