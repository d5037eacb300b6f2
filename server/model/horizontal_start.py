"""Start positions for horizontal networks, so a surveyor never types approximate coordinates.

Starting from the points whose coordinates are given, facts are propagated
until nothing new can be learned:

* a direction round is oriented once the azimuth from its station to any of
  its targets is known (orientation = azimuth − direction);
* an angle at a station turns a known azimuth to BACK into one to FORE and back;
* an azimuth i→j gives j→i (+180°);
* polar tie: a known station, a known azimuth and a measured distance fix the target;
* intersection: two known azimuths from two known stations fix the point;
* resection: a round at an unknown station observing three or more known points;
* arcs: distances from two known points, the mirror ambiguity settled by a
  third distance or a direction.

With no given coordinates at all (a free network), the first station is put
at the origin and its first observed target due north, which fixes an
arbitrary datum that the inner constraints later remove.
"""

from __future__ import annotations

import itertools
import math
from collections import defaultdict
from collections.abc import Callable, Collection
from functools import partial
from typing import NamedTuple

import numpy as np

from server.errors import NetworkError
from server.fieldbook.model import HORIZONTAL_KINDS
from server.model.network import Network

Position = tuple[float, float]

#: Kinds whose station and target link two points for a local frame (``_seed``).
_LINK_KINDS = ("direction", "angle", "distance")
_TWO_PI = 2 * math.pi

#: Rays closer than this to parallel (radians) are not intersected.
_MIN_CUT_ANGLE = math.radians(5.0)


class _Obs(NamedTuple):
    """What the propagation reads of a used horizontal observation."""

    kind: str
    from_point: str
    at: str | None
    to: str
    value: float
    round_line: int | None


class _Columns(NamedTuple):
    """The used horizontal observations as columns: names, and the table's codes."""

    frm: list[str]
    to: list[str]
    value: list[float]
    round_line: list[int | None]
    kind_code: np.ndarray  # the table's kind codes
    code: dict[str, int]  # kind name → code (−1: none of that kind)
    frm_code: np.ndarray  # the table's name indices
    at_code: np.ndarray  # −1: none
    to_code: np.ndarray


def _horizontal(network: Network) -> tuple[list[_Obs], _Columns]:
    """The used horizontal observations in file order, read from the network's table, as
    records and as columns."""
    table = network.used_table
    rows = np.flatnonzero(table.is_kind(*HORIZONTAL_KINDS))
    names = table.names
    kinds = table.kinds
    kind_code, frm_code, at_code, to_code = (
        table.kind[rows],
        table.frm[rows],
        table.at[rows],
        table.to[rows],
    )
    frm = [names[k] for k in frm_code.tolist()]
    to = [names[k] for k in to_code.tolist()]
    value = table.value[rows].tolist()
    round_line = [k if k >= 0 else None for k in table.round_line[rows].tolist()]
    # tuple.__new__ makes each record in C (the class's own __new__ is Python)
    used = list(
        map(
            partial(tuple.__new__, _Obs),
            zip(
                [kinds[k] for k in kind_code.tolist()],
                frm,
                [names[k] if k >= 0 else None for k in at_code.tolist()],
                to,
                value,
                round_line,
            ),
        )
    )
    code = {kind: table.code(kind) for kind in HORIZONTAL_KINDS}
    columns = _Columns(frm, to, value, round_line, kind_code, code, frm_code, at_code, to_code)
    return used, columns


def start_positions(network: Network, given: dict[str, Position]) -> dict[str, Position]:
    """Positions (metres) for every horizontally observed point; given ones are kept."""
    used, columns = _horizontal(network)
    table = network.used_table
    at_code = columns.at_code
    named = np.concatenate((columns.frm_code, at_code[at_code >= 0], columns.to_code))
    needed = {table.names[k] for k in np.unique(named).tolist()}
    known = {n: p for n, p in given.items() if n in needed and not math.isnan(p[0])}
    tables = _Tables(used, columns)  # what the observations say, read once for every propagation
    _Propagator(tables, known, needed).run()
    # Control that is not tied together directly (no backsight between held points)
    # stalls the propagation: build the figure in a local frame from one station,
    # then move it onto the control by a similarity transformation.
    for _ in range(10):
        if not needed - set(known):
            break
        local = _Propagator(tables, {}, needed)
        local.arbitrary_datum(_seed(used, set(known), tables.distances.keys()))
        local.run()
        common = [n for n in local.known if n in known]
        if not known:
            known.update(local.known)
        elif len(common) >= 2:
            transform = _similarity([local.known[n] for n in common], [known[n] for n in common])
            for name, position in local.known.items():
                known.setdefault(name, transform(position))
        else:
            break
        _Propagator(tables, known, needed).run()
    missing = sorted(needed - set(known))
    if missing:
        more = f" and {len(missing) - 12} more" if len(missing) > 12 else ""
        shown = ", ".join(missing[:12]) + more
        raise NetworkError(
            "no approximate position can be computed for these points from the observations "
            f"(each needs a polar tie, an intersection, a resection or two distances from "
            f"known points): {shown}",
            missing,
        )
    return {n: known[n] for n in needed}


def _seed(
    used: list[_Obs], known: set[str], measured: Collection[frozenset[str]]
) -> tuple[str, str]:
    """A station to start a local frame from: one with a distance, preferring unplaced ones.

    The first link in file order (station to target of a direction, angle or distance)
    that is best by: its pair has a distance in ``measured``, then not both ends known.
    """
    best: tuple[str, str] | None = None
    best_rank = (True, True)
    for o in used:
        if o.kind in _LINK_KINDS:
            station, target = o.at or o.from_point, o.to
            rank = (
                frozenset((station, target)) not in measured,
                station in known and target in known,
            )
            if best is None or rank < best_rank:
                best, best_rank = (station, target), rank
                if rank == (False, False):
                    break  # none can be better
    if best is None:
        raise IndexError("no direction, angle or distance to start a local frame from")
    return best


def _similarity(source: list[Position], target: list[Position]) -> Callable[[Position], Position]:
    """Least-squares 2D similarity (shift, rotation, scale) taking ``source`` onto ``target``."""
    src = np.array(source)
    dst = np.array(target)
    src_mean, dst_mean = src.mean(axis=0), dst.mean(axis=0)
    a, b = src - src_mean, dst - dst_mean
    # complex-number form: dst = z·src, z = Σ conj(src)·dst / Σ |src|²
    zs = a[:, 0] + 1j * a[:, 1]
    zd = b[:, 0] + 1j * b[:, 1]
    z = complex(np.sum(np.conj(zs) * zd) / np.sum(np.abs(zs) ** 2))

    def apply(p: Position) -> Position:
        w = z * complex(p[0] - src_mean[0], p[1] - src_mean[1])
        return float(w.real + dst_mean[0]), float(w.imag + dst_mean[1])

    return apply


def _names(o: _Obs) -> tuple[str, ...]:
    return (o.from_point, o.to) if o.at is None else (o.from_point, o.at, o.to)


class _Tables:
    """The observations sorted for propagation: distances by pair, rounds, angles, azimuths,
    links."""

    def __init__(self, used: list[_Obs], columns: _Columns) -> None:
        kind, frm, to, value = columns.kind_code, columns.frm, columns.to, columns.value

        def rows_of(name: str) -> list[int]:
            """The rows of one kind, in file order (each kind fills its own tables)."""
            return np.flatnonzero(kind == columns.code[name]).tolist()

        self.distances: dict[frozenset[str], list[float]] = defaultdict(list)
        self.rounds: dict[int, list[_Obs]] = defaultdict(list)
        self.angles = [used[k] for k in rows_of("angle")]
        self.azimuth_obs = [used[k] for k in rows_of("azimuth")]
        for k in rows_of("distance"):
            self.distances[frozenset((frm[k], to[k]))].append(value[k])
        round_line = columns.round_line
        for k in rows_of("direction"):
            line = round_line[k]
            if line is not None:
                self.rounds[line].append(used[k])
        # a dict, not a set: file order makes the start values (and so the last bits of
        # the results) the same on every run, whatever the string hash seed
        at = columns.at_code
        if not np.any((at >= 0) & (at != columns.frm_code)) and not np.any(
            columns.frm_code == columns.to_code
        ):
            # every station is the FROM point: one link FROM → TO per line, made in C
            self.linked = dict.fromkeys(zip(frm, to))
            return
        linked: dict[tuple[str, str], None] = {}
        for o in used:
            station = o.at or o.from_point
            for n in _names(o):
                if n != station:
                    linked[(station, n)] = None
        self.linked = linked


class _Propagator:
    """Breadth of facts (azimuths, distances, orientations) grown until every point is placed."""

    def __init__(
        self, tables: _Tables, known: dict[str, Position], needed: Collection[str]
    ) -> None:
        self.known = known
        self.needed = frozenset(needed)
        self.tables = tables
        self.distances = tables.distances
        self.rounds = tables.rounds
        self.angles = tables.angles
        self.azimuth_obs = tables.azimuth_obs
        self.azimuths: dict[tuple[str, str], float] = {}
        self.orientations: dict[int, float] = {}
        # links whose azimuth is not known yet: each is looked at until it is
        self.unlearned = list(tables.linked)
        self.unoriented = dict(tables.rounds)  # rounds not yet oriented, in file order
        self.open_angles = list(tables.angles)
        # azimuths _place_polar still looks at, and how many of self.azimuths it has seen
        self._polar_pending: list[tuple[tuple[str, str], float]] = []
        self._polar_seen = 0

    def arbitrary_datum(self, link: tuple[str, str]) -> None:
        """A local frame: ``link[0]`` at the origin, ``link[1]`` due north of it."""
        station, neighbour = link
        self.known[station] = (0.0, 0.0)
        self._set_azimuth(station, neighbour, 0.0)

    def run(self) -> None:
        """Alternate learning azimuths and placing points until neither makes progress,
        or until every point needed is placed (a placed point never moves, so nothing
        after that could change what the propagation gives)."""
        while not self.needed.issubset(self.known):
            before = (len(self.known), len(self.azimuths), len(self.orientations))
            self._learn_azimuths()
            self._place_polar()
            if (len(self.known), len(self.azimuths), len(self.orientations)) != before:
                continue
            if self._place_intersections() or self._place_resections() or self._place_arcs():
                continue
            return

    def _set_azimuth(self, i: str, j: str, value: float) -> None:
        if (i, j) not in self.azimuths:
            self.azimuths[(i, j)] = value % _TWO_PI
            self.azimuths[(j, i)] = (value + math.pi) % _TWO_PI

    def _learn_azimuths(self) -> None:
        known, azimuths = self.known, self.azimuths
        still: list[tuple[str, str]] = []
        for link in self.unlearned:
            if link in azimuths:
                continue
            i, j = link
            if i in known and j in known:
                (ei, ni), (ej, nj) = known[i], known[j]
                self._set_azimuth(i, j, math.atan2(ej - ei, nj - ni))
            else:
                still.append(link)
        self.unlearned = still
        for o in self.azimuth_obs:
            self._set_azimuth(o.from_point, o.to, o.value)
        done: list[int] = []
        orientations, pi = self.orientations, math.pi
        for line, directions in self.unoriented.items():
            orientation = orientations.get(line)
            if orientation is None:
                for d in directions:
                    azimuth = azimuths.get((d.from_point, d.to))
                    if azimuth is not None:
                        orientation = orientations[line] = azimuth - d.value
                        break
                else:
                    continue
            for d in directions:  # as _set_azimuth does it, written out: the hot loop
                i, j = d.from_point, d.to
                if (i, j) not in azimuths:
                    value = orientation + d.value
                    azimuths[(i, j)] = value % _TWO_PI
                    azimuths[(j, i)] = (value + pi) % _TWO_PI
            done.append(line)  # every azimuth of the round is known from now on
        for line in done:
            del self.unoriented[line]
        open_angles = []
        for o in self.open_angles:
            assert o.at is not None
            back, fore = (o.at, o.from_point), (o.at, o.to)
            if back in self.azimuths:
                self._set_azimuth(*fore, self.azimuths[back] + o.value)
            elif fore in self.azimuths:
                self._set_azimuth(*back, self.azimuths[fore] - o.value)
            else:
                open_angles.append(o)
        self.open_angles = open_angles  # an angle with both azimuths known has no more to say

    def _place_polar(self) -> None:
        # The azimuths in the order learned, less those toward a point already placed:
        # those can never place anything again (a known point stays known and an azimuth,
        # once learned, never changes), so each pass looks only at the rest.
        known, distances = self.known, self.distances
        pending = [entry for entry in self._polar_pending if entry[0][1] not in known]
        pending += itertools.islice(self.azimuths.items(), self._polar_seen, None)
        self._polar_seen = len(self.azimuths)
        for (i, j), azimuth in pending:
            if i in known and j not in known:
                lengths = distances.get(frozenset((i, j)))
                if lengths:
                    d = sum(lengths) / len(lengths)
                    e, n = known[i]
                    known[j] = (e + d * math.sin(azimuth), n + d * math.cos(azimuth))
        self._polar_pending = pending

    def _rays_to(self) -> dict[str, list[tuple[Position, float]]]:
        rays: dict[str, list[tuple[Position, float]]] = defaultdict(list)
        for (i, j), azimuth in self.azimuths.items():
            if i in self.known and j not in self.known:
                rays[j].append((self.known[i], azimuth))
        return rays

    def _place_intersections(self) -> bool:
        placed = False
        for target, rays in self._rays_to().items():
            best = None
            for a in range(len(rays)):
                for b in range(a + 1, len(rays)):
                    cut = abs(math.sin(rays[a][1] - rays[b][1]))
                    if cut > math.sin(_MIN_CUT_ANGLE) and (best is None or cut > best[0]):
                        best = (cut, rays[a], rays[b])
            if best is not None:
                point = _intersect(best[1], best[2])
                if point is not None:
                    self.known[target] = point
                    placed = True
        return placed

    def _place_resections(self) -> bool:
        placed = False
        for directions in self.rounds.values():
            station = directions[0].from_point
            if station in self.known:
                continue
            targets = [(self.known[d.to], d.value) for d in directions if d.to in self.known]
            if len(targets) >= 3:
                point = _resect(targets)
                if point is not None:
                    self.known[station] = point
                    placed = True
        return placed

    def _place_arcs(self) -> bool:
        """Two distances from known points; keep the mirror image that fits other observations."""
        reach: dict[str, list[tuple[str, float]]] = defaultdict(list)
        known = self.known
        for pair, lengths in self.distances.items():
            a, b = pair
            if a in known:
                if b not in known:
                    reach[b].append((a, sum(lengths) / len(lengths)))
            elif b in known:
                reach[a].append((b, sum(lengths) / len(lengths)))
        for target, arcs in reach.items():
            if len(arcs) < 2:
                continue
            (a, ra), (b, rb) = arcs[0], arcs[1]
            candidates = _circle_cut(self.known[a], ra, self.known[b], rb)
            if not candidates:
                continue
            chosen = self._disambiguate(target, candidates, arcs[2:])
            if chosen is not None:
                self.known[target] = chosen
                return True
        return False

    def _disambiguate(
        self, target: str, candidates: list[Position], spare: list[tuple[str, float]]
    ) -> Position | None:
        if len(candidates) == 1:
            return candidates[0]
        if spare:

            def misfit(p: Position) -> float:
                return sum(abs(math.dist(p, self.known[s]) - r) for s, r in spare)

            return min(candidates, key=misfit)
        # a known azimuth toward the target from a known station picks the side
        for (i, j), azimuth in self.azimuths.items():
            if j == target and i in self.known:
                e, n = self.known[i]
                return min(
                    candidates,
                    key=lambda p: abs(
                        math.remainder(math.atan2(p[0] - e, p[1] - n) - azimuth, 2 * math.pi)
                    ),
                )
        return None


def _intersect(ray_a: tuple[Position, float], ray_b: tuple[Position, float]) -> Position | None:
    (ea, na), ta = ray_a
    (eb, nb), tb = ray_b
    da, db = (math.sin(ta), math.cos(ta)), (math.sin(tb), math.cos(tb))
    det = da[0] * (-db[1]) - da[1] * (-db[0])
    if abs(det) < 1e-12:
        return None
    s = ((eb - ea) * (-db[1]) - (nb - na) * (-db[0])) / det
    if s <= 0:
        return None  # the rays meet behind the station
    return ea + s * da[0], na + s * da[1]


def _circle_cut(pa: Position, ra: float, pb: Position, rb: float) -> list[Position]:
    d = math.dist(pa, pb)
    if d == 0 or d > ra + rb + 1e-6 * d or d < abs(ra - rb) - 1e-6 * d:
        return []
    along = (ra * ra - rb * rb + d * d) / (2 * d)
    across = math.sqrt(max(ra * ra - along * along, 0.0))
    ue, un = (pb[0] - pa[0]) / d, (pb[1] - pa[1]) / d
    base = (pa[0] + along * ue, pa[1] + along * un)
    return [
        (base[0] - across * un, base[1] + across * ue),
        (base[0] + across * un, base[1] - across * ue),
    ]


def _resect(targets: list[tuple[Position, float]]) -> Position | None:
    """Station from directions to three or more known points (Gauss–Newton from several starts)."""
    points = np.array([p for p, _ in targets])
    directions = np.array([d for _, d in targets])
    centre = points.mean(axis=0)
    spread = float(np.max(np.linalg.norm(points - centre, axis=1))) or 1.0
    starts = [centre] + [
        centre + 1.5 * spread * np.array([math.sin(a), math.cos(a)])
        for a in np.arange(8) * math.pi / 4
    ]
    best: tuple[float, Position] | None = None
    for start in starts:
        x = np.array([start[0], start[1], 0.0])
        d_e, d_n = points[:, 0] - x[0], points[:, 1] - x[1]
        x[2] = math.atan2(
            float(np.mean(np.sin(np.arctan2(d_e, d_n) - directions))),
            float(np.mean(np.cos(np.arctan2(d_e, d_n) - directions))),
        )
        for _ in range(30):
            d_e, d_n = points[:, 0] - x[0], points[:, 1] - x[1]
            s2 = d_e**2 + d_n**2
            if np.any(s2 < 1e-12):
                break
            turned = directions + x[2] - np.arctan2(d_e, d_n)
            misfit = np.remainder(turned + np.pi, 2 * np.pi) - np.pi
            jac = np.column_stack([d_n / s2, -d_e / s2, np.ones(len(s2))])
            step, *_ = np.linalg.lstsq(jac, -misfit, rcond=None)
            x += step
            if np.max(np.abs(step[:2])) < 1e-6:
                break
        d_e, d_n = points[:, 0] - x[0], points[:, 1] - x[1]
        misfit = np.remainder(directions + x[2] - np.arctan2(d_e, d_n) + np.pi, 2 * np.pi) - np.pi
        score = float(np.sum(misfit**2))
        if np.all(np.isfinite(x)) and (best is None or score < best[0]):
            best = (score, (float(x[0]), float(x[1])))
    if best is None or best[0] > len(targets) * math.radians(1.0) ** 2:
        return None
    return best[1]
