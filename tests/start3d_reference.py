"""The start-value placement of ``server/geodesy/start3d.py`` as it was first written: one
point and one observation at a time, every number computed the moment the point is placed.

``start3d`` now decides the placement on names first and computes the numbers afterwards
in batches; ``tests/test_start3d_batched.py`` holds it to this version, number for number.
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Mapping, Sequence
from dataclasses import dataclass

import numpy as np

from server.geodesy.start3d import (
    EARTH_RADIUS,
    GRS80_A,
    GRS80_F,
    Azimuth,
    Baseline,
    DirectionRound,
    GridDistance,
    HeightDifference,
    HorizontalAngle,
    KnownHeight,
    KnownPoint,
    Observation,
    SlopeDistance,
    StartValues,
    UnreachablePointsError,
    ZenithAngle,
    _Ellipsoid,
    _Pairs,
    enu_rotation,
    trigonometric_height_difference,
)


class _State:
    """Horizontal positions (φ, λ) and ellipsoidal heights found so far."""

    def __init__(self, ell: _Ellipsoid, undulations: Mapping[str, float]) -> None:
        self.ell = ell
        self.und = undulations
        self.horizontal: dict[str, tuple[float, float]] = {}
        self.height: dict[str, float] = {}
        self.methods: dict[str, str] = {}

    def placed(self, name: str) -> bool:
        return name in self.horizontal and name in self.height

    def xyz(self, name: str) -> np.ndarray:
        lat, lon = self.horizontal[name]
        return self.ell.to_ecef(lat, lon, self.height[name])

    def place(self, name: str, xyz: np.ndarray, method: str) -> None:
        """Place a point found by ``method``; a height the book gives is kept (a benchmark
        sighted from the instrument must start, and if held stay, at its booked height)."""
        lat, lon, h = self.ell.from_ecef(xyz)
        self.horizontal[name] = (lat, lon)
        self.height.setdefault(name, h)
        self.methods[name] = method

    def azimuth(self, station: str, target: str) -> float:
        lat, lon = self.horizontal[station]
        e, n, _ = enu_rotation(lat, lon) @ (self.xyz(target) - self.xyz(station))
        return math.atan2(e, n)


def _circular_mean(angles: list[float]) -> float:
    return math.atan2(sum(math.sin(a) for a in angles), sum(math.cos(a) for a in angles))


@dataclass(slots=True)
class _Round:
    station: str
    directions: dict[str, float]
    orientation: float | None = None  # fixed for azimuths


def _rounds(observations: Sequence[Observation]) -> list[_Round]:
    rounds: list[_Round] = []
    for obs in observations:
        if isinstance(obs, DirectionRound):
            rounds.append(_Round(obs.station, dict(obs.directions)))
        elif isinstance(obs, HorizontalAngle):
            rounds.append(_Round(obs.at, {obs.frm: 0.0, obs.to: obs.value}))
        elif isinstance(obs, Azimuth):
            rounds.append(_Round(obs.frm, {obs.to: obs.value + obs.convergence}, 0.0))
    return rounds


def _orientation(state: _State, rnd: _Round) -> float | None:
    if rnd.orientation is not None:
        return rnd.orientation
    if not state.placed(rnd.station):
        return None
    terms = [
        state.azimuth(rnd.station, t) - r
        for t, r in rnd.directions.items()
        if t != rnd.station and state.placed(t)
    ]
    return _circular_mean(terms) if terms else None


def _baselines(state: _State, baselines: list[Baseline], order: list[str]) -> bool:
    """Breadth-first through the baseline graph from every placed point, control first."""
    links: dict[str, list[tuple[str, np.ndarray]]] = {}
    for b in baselines:
        d = np.array([b.dx, b.dy, b.dz])
        links.setdefault(b.frm, []).append((b.to, d))
        links.setdefault(b.to, []).append((b.frm, -d))
    queue = deque(p for p in order if state.placed(p))
    xyz = {p: state.xyz(p) for p in queue}
    grew = False
    while queue:
        p = queue.popleft()
        for q, d in links.get(p, ()):
            if q not in xyz and not state.placed(q):
                xyz[q] = xyz[p] + d
                state.place(q, xyz[q], f"baseline from {p}")
                queue.append(q)
                grew = True
    return grew


def _sight_length(slope: SlopeDistance, zen: ZenithAngle, z: float) -> float:
    delta = (slope.ht - slope.hi) - (zen.ht - zen.hi)  # the slope target above the zenith one
    return -delta * math.cos(z) + math.sqrt(slope.value**2 - (delta * math.sin(z)) ** 2)


def _slope_from(slopes: _Pairs[SlopeDistance], s: str, t: str) -> SlopeDistance | None:
    if (s, t) in slopes:
        return slopes[(s, t)]
    back = slopes.get((t, s))  # the distance is the same seen from the other end
    return None if back is None else SlopeDistance(s, t, back.value, back.ht, back.hi)


def _polar(
    state: _State,
    rounds: list[_Round],
    slopes: _Pairs[SlopeDistance],
    zeniths: _Pairs[ZenithAngle],
    grids: _Pairs[GridDistance],
) -> bool:
    grew = False
    for rnd in rounds:
        omega = _orientation(state, rnd)
        if omega is None or rnd.station not in state.horizontal:
            continue
        s = rnd.station
        for t, r in rnd.directions.items():
            if state.placed(t) or t == s:
                continue
            alpha = r + omega
            slope, zen = _slope_from(slopes, s, t), zeniths.get((s, t))
            if slope is not None and zen is not None and state.placed(s):
                z = zen.value + zen.k * slope.value / (2.0 * EARTH_RADIUS)
                length = _sight_length(slope, zen, z)
                lat, lon = state.horizontal[s]
                rot = enu_rotation(lat, lon)
                enu = length * np.array(
                    [math.sin(z) * math.sin(alpha), math.sin(z) * math.cos(alpha), math.cos(z)]
                )
                xyz = state.xyz(s) + (zen.hi - zen.ht) * rot[2] + rot.T @ enu
                state.place(t, xyz, f"polar tie from {s}")
                grew = True
            elif t not in state.horizontal and (s, t) in grids:
                g = grids[(s, t)]
                lat, lon = state.horizontal[s]
                lon2, lat2, _ = state.ell.geod.fwd(
                    math.degrees(lon), math.degrees(lat), math.degrees(alpha), g.value / g.scale
                )
                state.horizontal[t] = (math.radians(lat2), math.radians(lon2))
                state.methods.setdefault(t, f"direction and grid distance from {s}")
                grew = True
    return grew


def _heights(
    state: _State,
    slopes: _Pairs[SlopeDistance],
    zeniths: _Pairs[ZenithAngle],
    levels: list[HeightDifference],
) -> bool:
    grew = False
    for (s, t), zen in zeniths.items():
        slope = _slope_from(slopes, s, t)
        if slope is None or (s in state.height) == (t in state.height):
            continue
        z = zen.value + zen.k * slope.value / (2.0 * EARTH_RADIUS)
        length = _sight_length(slope, zen, z)
        dh = trigonometric_height_difference(length, zen.value, zen.hi, zen.ht, zen.k)
        if s in state.height:
            state.height[t] = state.height[s] + dh
        else:
            state.height[s] = state.height[t] - dh
        grew = True
    changed = True
    while changed:  # leveling lines chain in either direction
        changed = False
        for lv in levels:
            n_from, n_to = state.und.get(lv.frm, 0.0), state.und.get(lv.to, 0.0)
            if lv.frm in state.height and lv.to not in state.height:
                state.height[lv.to] = state.height[lv.frm] + lv.value + n_to - n_from
            elif lv.to in state.height and lv.frm not in state.height:
                state.height[lv.frm] = state.height[lv.to] - lv.value - n_to + n_from
            else:
                continue
            changed = grew = True
    return grew


def _names(
    known: Sequence[KnownPoint],
    heights: Sequence[KnownHeight],
    observations: Sequence[Observation],
) -> list[str]:
    order: dict[str, None] = {}
    for p in known:
        order[p.name] = None
    for hp in heights:
        order[hp.name] = None
    for obs in observations:
        if isinstance(obs, DirectionRound):
            order[obs.station] = None
            for t, _ in obs.directions:
                order[t] = None
        elif isinstance(obs, HorizontalAngle):
            order.update(dict.fromkeys((obs.at, obs.frm, obs.to)))
        else:
            order.update(dict.fromkeys((obs.frm, obs.to)))
    return list(order)


def reference_start_positions(
    known: Sequence[KnownPoint],
    observations: Sequence[Observation],
    *,
    heights: Sequence[KnownHeight] = (),
    undulations: Mapping[str, float] | None = None,
    a: float = GRS80_A,
    f: float = GRS80_F,
) -> StartValues:
    """The start positions as ``start3d.start_positions`` computed them point by point."""
    und = dict(undulations or {})
    state = _State(_Ellipsoid(a, f), und)
    for hp in heights:
        state.height[hp.name] = hp.height + und.get(hp.name, 0.0)
        state.methods[hp.name] = "given height"
    for p in known:
        lat, lon, h = state.ell.from_ecef(p.xyz)
        state.horizontal[p.name] = (lat, lon)
        if p.height_known:
            state.height[p.name] = h
        state.methods[p.name] = "control" if p.control else "given"
    names = _names(known, heights, observations)
    control = [p.name for p in known if p.control]
    order = control + [n for n in names if n not in set(control)]
    baselines = [o for o in observations if isinstance(o, Baseline)]
    slopes = {(o.frm, o.to): o for o in observations if isinstance(o, SlopeDistance)}
    zeniths = {(o.frm, o.to): o for o in observations if isinstance(o, ZenithAngle)}
    grids = {(o.frm, o.to): o for o in observations if isinstance(o, GridDistance)}
    grids.update({(o.to, o.frm): o for o in grids.values() if (o.to, o.frm) not in grids})
    levels = [o for o in observations if isinstance(o, HeightDifference)]
    rounds = _rounds(observations)
    while True:
        grew = _baselines(state, baselines, order)
        grew |= _polar(state, rounds, slopes, zeniths, grids)
        grew |= _heights(state, slopes, zeniths, levels)
        if not grew:
            break
    missing = [n for n in names if not state.placed(n)]
    if missing:
        raise UnreachablePointsError(missing)
    return StartValues(
        positions={n: tuple(float(c) for c in state.xyz(n)) for n in names},  # type: ignore[misc]
        methods=dict(state.methods),
    )
