"""Start values in the Earth-centred frame for every unknown point of a geodetic 3D network.

Start values need only lie inside the region where Gauss–Newton converges (decimetres are
plenty), so the methods below are the ones a surveyor would trust, not an adjustment.

Local frame.  At geodetic latitude φ, longitude λ (on the ellipsoid a, f; default GRS80)
the rows of R = [ê; n̂; û] are ê = (−sin λ, cos λ, 0), n̂ = (−sin φ cos λ, −sin φ sin λ, cos φ),
û = (cos φ cos λ, cos φ sin λ, sin φ); R·(X_t − X_s) is the target in the station's east,
north, up.  Geodetic → Earth-centred is the closed form X = (N+h) cos φ cos λ,
Y = (N+h) cos φ sin λ, Z = (N(1−e²)+h) sin φ; the inverse iterates Bowring's formula.
(Private here so that this module stands alone.)

Inputs.  ``KnownPoint`` gives a full position (or only its latitude and longitude when
``height_known`` is False); ``KnownHeight`` an orthometric height H, ellipsoidal
h = H + N with N the point's undulation (default 0).  Horizontal directions, angles and
azimuths are *geodetic*: clockwise from geodetic north in the horizon plane at the station
(perpendicular to its ellipsoid normal).  An ``Azimuth`` booked as a grid azimuth carries the
meridian convergence γ at its station (geodetic = grid + γ); γ = 0 means it is geodetic.
A ``GridDistance`` carries its combined factor (grid distance / distance on the ellipsoid).

Methods, repeated until a pass reaches nothing new:

1. Baselines, breadth-first out of the control points (then out of any other placed
   point), both directions: X_to = X_from + (dX, dY, dZ).  Exact.
2. Polar ties.  A round at a placed station is oriented by the circular mean of
   (azimuth computed to each placed target − its direction).  A target with a direction,
   a slope distance S and a zenith angle V from that station is placed along the line of
   sight: the geometric zenith angle is z = V + k·S/(2R) (the model's refraction angle,
   R = 6 371 000 m), and the sight of length L from the instrument (station + hi along its
   normal) reaches the zenith's target point; X_t = P_i + L·Rᵀ(sin z sin α, sin z cos α, cos z)
   − ht·û_s.  When the slope's and the zenith's (ht − hi) differ by δ, the length is
   L = −δ cos z + √(S² − δ² sin² z) (the two normals taken parallel: error ~δ·D/R, far
   below a millimetre).  Curvature is exact here since the frame is Earth-centred; only ht is
   taken along the station's normal instead of the target's (ht·D/R, 0.3 mm for 2 m at 1 km).
   A direction with a grid distance gives the latitude and longitude only (geodesic
   forward on the ellipsoid, pyproj.Geod), the height then comes from step 3.
3. Heights.  Trigonometric heighting between a point with a known height and any other:
   Δh = S cos V + (1 − k)·D²/(2R) + hi − ht with D = S sin V — the standard curvature and
   refraction correction on a sphere of radius R (approximation: the normal-section radius
   differs from R by under 1 %, 0.8 mm on 1 km).  Leveling:
   h_to = h_from + ΔH + N_to − N_from (deflections of the vertical taken as zero).
4. Whatever is still missing a horizontal position or a height is named in
   ``UnreachablePointsError``.

How it runs.  Which method reaches which point depends only on which points are already
placed, never on their coordinates, and a placed point never moves again.  So the passes
above run on names alone and record each number to compute as a step (a position, a
round's orientation as the round stands before it places anything, a polar tie, a point
one baseline further, a grid tie, a height); then the steps are evaluated level by level,
all steps of a kind and level in one numpy batch.  Each point gets the arithmetic it would
get on its own, in the same order, so the batches do not change a bit of the result.
"""

from __future__ import annotations

import functools
import math
from collections import deque
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TYPE_CHECKING, TypeVar

import numpy as np

from server.geodesy import frames
from server.geodesy.ellipsoid import GRS80, Ellipsoid

if TYPE_CHECKING:
    from pyproj import Geod

GRS80_A, GRS80_F = GRS80.a, GRS80.f
#: Earth radius of the curvature and refraction terms, metres (the model's, ``frames.py``).
EARTH_RADIUS = frames.REFRACTION_RADIUS
#: The field book's default coefficient of refraction (common practice).
DEFAULT_REFRACTION = 0.13

XYZ = tuple[float, float, float]
_T = TypeVar("_T")
_Pairs = Mapping[tuple[str, str], _T]


@dataclass(frozen=True, slots=True)
class KnownPoint:
    """A point with given Earth-centred coordinates; ``control`` when held in the adjustment.

    With ``height_known=False`` only the latitude and longitude of ``xyz`` are used.
    """

    name: str
    xyz: XYZ
    control: bool = False
    height_known: bool = True


@dataclass(frozen=True, slots=True)
class KnownHeight:
    """A benchmark: orthometric height only (metres)."""

    name: str
    height: float


@dataclass(frozen=True, slots=True)
class SlopeDistance:
    frm: str
    to: str
    value: float
    hi: float = 0.0
    ht: float = 0.0


@dataclass(frozen=True, slots=True)
class ZenithAngle:
    """Observed (refracted) zenith angle in radians; ``k`` the coefficient of refraction."""

    frm: str
    to: str
    value: float
    hi: float = 0.0
    ht: float = 0.0
    k: float = DEFAULT_REFRACTION


@dataclass(frozen=True, slots=True)
class DirectionRound:
    """Horizontal directions (radians, clockwise, arbitrary zero) from ``station``."""

    station: str
    directions: tuple[tuple[str, float], ...]


@dataclass(frozen=True, slots=True)
class HorizontalAngle:
    """Clockwise angle at ``at`` from ``frm`` to ``to`` (radians)."""

    at: str
    frm: str
    to: str
    value: float


@dataclass(frozen=True, slots=True)
class Azimuth:
    """Azimuth from ``frm`` to ``to``; geodetic azimuth = ``value`` + ``convergence``."""

    frm: str
    to: str
    value: float
    convergence: float = 0.0


@dataclass(frozen=True, slots=True)
class GridDistance:
    """Grid distance; ``scale`` = grid distance / distance on the ellipsoid."""

    frm: str
    to: str
    value: float
    scale: float = 1.0


@dataclass(frozen=True, slots=True)
class HeightDifference:
    """Leveled orthometric height difference H_to − H_from (metres)."""

    frm: str
    to: str
    value: float


@dataclass(frozen=True, slots=True)
class Baseline:
    """Earth-centred components of TO − FROM (metres)."""

    frm: str
    to: str
    dx: float
    dy: float
    dz: float


Observation = (
    SlopeDistance
    | ZenithAngle
    | DirectionRound
    | HorizontalAngle
    | Azimuth
    | GridDistance
    | HeightDifference
    | Baseline
)


class UnreachablePointsError(ValueError):
    """No method reaches these points; ``points`` names them in order of appearance."""

    def __init__(self, points: Sequence[str]) -> None:
        self.points = tuple(points)
        super().__init__(
            "cannot compute approximate positions for: "
            + ", ".join(self.points)
            + " (no baseline, polar tie, trigonometric heighting or leveling reaches them)"
        )


@dataclass(frozen=True, slots=True)
class StartValues:
    """Earth-centred start positions (metres) and how each point was reached."""

    positions: Mapping[str, XYZ]
    methods: Mapping[str, str] = field(default_factory=dict)


def trigonometric_height_difference(
    slope: float, zenith: float, hi: float = 0.0, ht: float = 0.0, k: float = DEFAULT_REFRACTION
) -> float:
    """Δh = S cos V + (1 − k)·D²/(2R) + hi − ht, D = S sin V (curvature and refraction)."""
    d = slope * math.sin(zenith)
    return slope * math.cos(zenith) + (1.0 - k) * d * d / (2.0 * EARTH_RADIUS) + hi - ht


class _Ellipsoid:
    """The shared ellipsoid (``ellipsoid.py``) one point at a time, and its geodesics."""

    def __init__(self, a: float, f: float) -> None:
        self.shape = Ellipsoid(a, f)
        self.a, self.f, self.e2 = a, f, self.shape.e2

    @functools.cached_property
    def geod(self) -> Geod:
        """pyproj's geodesics on this ellipsoid (imported when a grid distance needs them)."""
        from pyproj import Geod

        return Geod(a=self.a, f=self.f)

    def to_ecef(self, lat: float, lon: float, h: float) -> np.ndarray:
        return np.asarray(self.shape.to_ecef(lat, lon, h), dtype=float).reshape(3)

    def from_ecef(self, xyz: Iterable[float]) -> tuple[float, float, float]:
        lat, lon, h = self.shape.from_ecef(np.asarray(list(xyz), dtype=float).reshape(1, 3))
        return float(lat[0]), float(lon[0]), float(h[0])


def enu_rotation(lat: float, lon: float) -> np.ndarray:
    """Rows east, north, up at φ, λ (radians)."""
    return frames.enu_rotation(np.array([lat]), np.array([lon]))[0]


# --------------------------------------------------------------------------------------
# The numbers of the placement, as steps evaluated later in batches.  Each step holds its
# inputs (earlier steps and the observations) and, once evaluated, its outputs: φ, λ, h
# (NaN where the step gives none), and for a position also X and R.  A step's level is one
# more than the highest level among its inputs, so the steps of one level never depend on
# each other and are evaluated together.


class _Step:
    __slots__ = ("h", "lat", "level", "lon")

    def __init__(self, level: int = 0) -> None:
        self.level = level
        self.lat = self.lon = self.h = math.nan


class _Known(_Step):
    """A given value (level 0): a given position's φ, λ, h, or a benchmark's h."""

    __slots__ = ()

    def __init__(self, lat: float, lon: float, h: float) -> None:
        super().__init__()
        self.lat, self.lon, self.h = lat, lon, h


class _Position(_Step):
    """X (3,) and R (3, 3) of a placed point from its latitude, longitude and height."""

    __slots__ = ("horizontal", "rot", "vertical", "xyz")

    def __init__(self, horizontal: _Step, vertical: _Step) -> None:
        super().__init__(1 + max(horizontal.level, vertical.level))
        self.horizontal, self.vertical = horizontal, vertical
        self.xyz = self.rot = np.zeros(0)


class _Orientation(_Step):
    """A round's orientation: circular mean of (azimuth to a placed target − direction)."""

    __slots__ = ("omega", "station", "terms")

    def __init__(self, station: _Position, terms: list[tuple[_Position, float]]) -> None:
        super().__init__(1 + max([station.level] + [t.level for t, _ in terms]))
        self.station, self.terms = station, terms
        self.omega = math.nan


class _Fixed(_Step):
    """The orientation of an azimuth (known, level 0)."""

    __slots__ = ("omega",)

    def __init__(self, omega: float) -> None:
        super().__init__()
        self.omega = omega


class _Polar(_Step):
    """A target placed along the line of sight: zenith z, sight length L, lift c = hi − ht."""

    __slots__ = ("cos_z", "length", "lift", "orientation", "r", "sin_z", "station")

    def __init__(
        self,
        station: _Position,
        orientation: _Orientation | _Fixed,
        r: float,
        slope: SlopeDistance,
        zen: ZenithAngle,
    ) -> None:
        super().__init__(1 + max(station.level, orientation.level))
        self.station, self.orientation, self.r = station, orientation, r
        z = zen.value + zen.k * slope.value / (2.0 * EARTH_RADIUS)
        self.length = _sight_length(slope, zen, z)
        self.sin_z, self.cos_z = math.sin(z), math.cos(z)
        self.lift = zen.hi - zen.ht


class _Chained(_Step):
    """A point one baseline away from ``parent`` (a placed position or another chained one):
    its X is the parent's X plus the components, without a round trip through φ, λ, h."""

    __slots__ = ("delta", "parent", "raw")

    def __init__(self, parent: _Position | _Chained, delta: np.ndarray) -> None:
        super().__init__(1 + parent.level)
        self.parent, self.delta = parent, delta
        self.raw = np.zeros(0)


class _GridTie(_Step):
    """Latitude and longitude from a direction and a grid distance (geodesic forward)."""

    __slots__ = ("distance", "orientation", "r", "station")

    def __init__(
        self, station: _Step, orientation: _Orientation | _Fixed, r: float, grid: GridDistance
    ) -> None:
        super().__init__(1 + max(station.level, orientation.level))
        self.station, self.orientation, self.r = station, orientation, r
        self.distance = grid.value / grid.scale


class _Height(_Step):
    """h = source's h + each addend in turn (trigonometric heighting, leveling)."""

    __slots__ = ("addends", "source")

    def __init__(self, source: _Step, addends: tuple[float, ...]) -> None:
        super().__init__(1 + source.level)
        self.source, self.addends = source, addends


def _evaluate(ell: _Ellipsoid, steps: list[_Step]) -> None:
    """Evaluate the steps level by level, every kind of step of a level in one batch.

    The arithmetic of each point is the one the placement would do one point at a time
    (the same formulas in the same order, element-wise), so the numbers do not depend on
    how the points are grouped.
    """
    by_level: dict[int, dict[type, list[_Step]]] = {}
    for s in steps:
        by_level.setdefault(s.level, {}).setdefault(type(s), []).append(s)
    for level in sorted(by_level):
        for kind, group in by_level[level].items():
            _EVALUATORS[kind](ell, group)


def _geodetic_of(ell: _Ellipsoid, steps: Sequence[_Step], xyz: np.ndarray) -> None:
    lat, lon, h = ell.shape.from_ecef(xyz)
    for s, a, b, c in zip(steps, lat.tolist(), lon.tolist(), h.tolist()):
        s.lat, s.lon, s.h = a, b, c


def _evaluate_positions(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    group = [s for s in steps if isinstance(s, _Position)]
    lat = np.array([s.horizontal.lat for s in group])
    lon = np.array([s.horizontal.lon for s in group])
    xyz = ell.shape.to_ecef(lat, lon, np.array([s.vertical.h for s in group]))
    rot = frames.enu_rotation(lat, lon)
    for k, s in enumerate(group):
        s.xyz, s.rot = xyz[k], rot[k]


def _evaluate_orientations(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    group = [s for s in steps if isinstance(s, _Orientation)]
    station = np.array([s.station.xyz for s in group for _ in s.terms])
    rot = np.array([s.station.rot for s in group for _ in s.terms])
    target = np.array([t.xyz for s in group for t, _ in s.terms])
    local = (rot @ (target - station)[:, :, None])[:, :, 0]
    azimuths = iter(map(math.atan2, local[:, 0].tolist(), local[:, 1].tolist()))
    for s in group:
        s.omega = _circular_mean([next(azimuths) - r for _, r in s.terms])


def _evaluate_polar(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    group = [s for s in steps if isinstance(s, _Polar)]
    sight = []
    for s in group:
        alpha = s.r + _omega(s.orientation)
        sight.append([s.sin_z * math.sin(alpha), s.sin_z * math.cos(alpha), s.cos_z])
    enu = np.array([s.length for s in group])[:, None] * np.array(sight)
    rot = np.array([s.station.rot for s in group])
    lift = np.array([s.lift for s in group])[:, None] * rot[:, 2, :]
    xyz = np.array([s.station.xyz for s in group]) + lift
    xyz = xyz + (np.swapaxes(rot, 1, 2) @ enu[:, :, None])[:, :, 0]
    _geodetic_of(ell, group, xyz)


def _evaluate_chained(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    group = [s for s in steps if isinstance(s, _Chained)]
    parent = np.array([_raw(s.parent) for s in group])
    raw = parent + np.array([s.delta for s in group])
    for k, s in enumerate(group):
        s.raw = raw[k]
    _geodetic_of(ell, group, raw)


def _evaluate_grid_ties(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    for s in steps:
        assert isinstance(s, _GridTie)
        alpha = s.r + _omega(s.orientation)
        lon2, lat2, _ = ell.geod.fwd(
            math.degrees(s.station.lon),
            math.degrees(s.station.lat),
            math.degrees(alpha),
            s.distance,
        )
        s.lat, s.lon = math.radians(lat2), math.radians(lon2)


def _evaluate_heights(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    for s in steps:
        assert isinstance(s, _Height)
        h = s.source.h
        for addend in s.addends:
            h = h + addend
        s.h = h


def _evaluate_known(ell: _Ellipsoid, steps: Sequence[_Step]) -> None:
    """Given values and fixed orientations are set when they are made."""


_EVALUATORS = {
    _Known: _evaluate_known,
    _Fixed: _evaluate_known,
    _Position: _evaluate_positions,
    _Orientation: _evaluate_orientations,
    _Polar: _evaluate_polar,
    _Chained: _evaluate_chained,
    _GridTie: _evaluate_grid_ties,
    _Height: _evaluate_heights,
}


def _omega(orientation: _Orientation | _Fixed) -> float:
    return orientation.omega


def _raw(step: _Position | _Chained) -> np.ndarray:
    return step.xyz if isinstance(step, _Position) else step.raw


class _State:
    """Which step last gave each point its horizontal position and its ellipsoidal height.

    Which points a method reaches depends on which points are already placed, never on
    their coordinates, so the placement runs on names first, recording steps; the numbers
    follow in batches (``_evaluate``).  Once a point is placed it never changes.
    """

    def __init__(self, undulations: Mapping[str, float]) -> None:
        self.und = undulations
        self.horizontal: dict[str, _Step] = {}
        self.height: dict[str, _Step] = {}
        self.methods: dict[str, str] = {}
        self.steps: list[_Step] = []
        self._positions: dict[str, _Position] = {}

    def add(self, step: _S) -> _S:
        self.steps.append(step)
        return step

    def placed(self, name: str) -> bool:
        return name in self.horizontal and name in self.height

    def position(self, name: str) -> _Position:
        """The position step of a placed point (made once: a placed point stays)."""
        found = self._positions.get(name)
        if found is None:
            found = self.add(_Position(self.horizontal[name], self.height[name]))
            self._positions[name] = found
        return found

    def place(self, name: str, step: _Step, method: str) -> None:
        """Place a point found by ``method``; a height the book gives is kept (a benchmark
        sighted from the instrument must start, and if held stay, at its booked height)."""
        self.horizontal[name] = step
        self.height.setdefault(name, step)
        self.methods[name] = method


_S = TypeVar("_S", bound=_Step)


def _circular_mean(angles: list[float]) -> float:
    return math.atan2(sum(math.sin(a) for a in angles), sum(math.cos(a) for a in angles))


@dataclass(slots=True)
class _Round:
    station: str
    directions: dict[str, float]
    orientation: float | None = None  # fixed for azimuths


def _rounds(
    observations: Sequence[DirectionRound | HorizontalAngle | Azimuth | Observation],
) -> list[_Round]:
    rounds: list[_Round] = []
    for obs in observations:
        if isinstance(obs, DirectionRound):
            rounds.append(_Round(obs.station, dict(obs.directions)))
        elif isinstance(obs, HorizontalAngle):
            rounds.append(_Round(obs.at, {obs.frm: 0.0, obs.to: obs.value}))
        elif isinstance(obs, Azimuth):
            rounds.append(_Round(obs.frm, {obs.to: obs.value + obs.convergence}, 0.0))
    return rounds


def _orientation_terms(state: _State, rnd: _Round) -> list[tuple[_Position, float]] | None:
    """The placed targets that orient the round now, or None when the station is not placed."""
    if not state.placed(rnd.station):
        return None
    station = rnd.station
    return [
        (state.position(t), r)
        for t, r in rnd.directions.items()
        if t != station and state.placed(t)
    ]


def _baselines(state: _State, baselines: list[Baseline], order: list[str]) -> bool:
    """Breadth-first through the baseline graph from every placed point, control first."""
    links: dict[str, list[tuple[str, np.ndarray]]] = {}
    for b in baselines:
        d = np.array([b.dx, b.dy, b.dz])
        links.setdefault(b.frm, []).append((b.to, d))
        links.setdefault(b.to, []).append((b.frm, -d))
    if not links:
        return False
    queue = deque(p for p in order if state.placed(p))
    reached: dict[str, _Position | _Chained] = {}
    seen = set(queue)
    grew = False
    while queue:
        p = queue.popleft()
        for q, d in links.get(p, ()):
            if q not in seen and not state.placed(q):
                parent = reached.get(p) or state.position(p)
                reached[q] = state.add(_Chained(parent, d))
                seen.add(q)
                state.place(q, reached[q], f"baseline from {p}")
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
    horizontal, height = state.horizontal, state.height
    for rnd in rounds:
        s = rnd.station
        if s not in horizontal or all(
            t == s or (t in horizontal and t in height) for t in rnd.directions
        ):  # nothing to place from this round now
            continue
        orientation: _Orientation | _Fixed
        if rnd.orientation is not None:
            orientation = _Fixed(rnd.orientation)
        else:
            terms = _orientation_terms(state, rnd)  # as the round stands before it places
            if not terms:
                continue
            orientation = state.add(_Orientation(state.position(s), terms))
        for t, r in rnd.directions.items():
            if state.placed(t) or t == s:
                continue
            slope, zen = _slope_from(slopes, s, t), zeniths.get((s, t))
            if slope is not None and zen is not None and state.placed(s):
                step = _Polar(state.position(s), orientation, r, slope, zen)
                state.place(t, state.add(step), f"polar tie from {s}")
                grew = True
            elif t not in state.horizontal and (s, t) in grids:
                tie = _GridTie(state.horizontal[s], orientation, r, grids[(s, t)])
                state.horizontal[t] = state.add(tie)
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
    height = state.height
    for (s, t), zen in zeniths.items():
        if (s in height) == (t in height):
            continue
        slope = _slope_from(slopes, s, t)
        if slope is None:
            continue
        z = zen.value + zen.k * slope.value / (2.0 * EARTH_RADIUS)
        length = _sight_length(slope, zen, z)
        dh = trigonometric_height_difference(length, zen.value, zen.hi, zen.ht, zen.k)
        if s in height:
            height[t] = state.add(_Height(height[s], (dh,)))
        else:
            height[s] = state.add(_Height(height[t], (-dh,)))
        grew = True
    changed = True
    while changed:  # leveling lines chain in either direction
        changed = False
        for lv in levels:
            n_from, n_to = state.und.get(lv.frm, 0.0), state.und.get(lv.to, 0.0)
            if lv.frm in height and lv.to not in height:
                height[lv.to] = state.add(_Height(height[lv.frm], (lv.value, n_to, -n_from)))
            elif lv.to in height and lv.frm not in height:
                height[lv.frm] = state.add(_Height(height[lv.to], (-lv.value, -n_to, n_from)))
            else:
                continue
            changed = grew = True
    return grew


@dataclass(slots=True)
class _Inputs:
    """The observations sorted by what each method reads, and every name in order."""

    names: dict[str, None] = field(default_factory=dict)
    baselines: list[Baseline] = field(default_factory=list)
    slopes: dict[tuple[str, str], SlopeDistance] = field(default_factory=dict)
    zeniths: dict[tuple[str, str], ZenithAngle] = field(default_factory=dict)
    grids: dict[tuple[str, str], GridDistance] = field(default_factory=dict)
    levels: list[HeightDifference] = field(default_factory=list)
    sightings: list[DirectionRound | HorizontalAngle | Azimuth] = field(default_factory=list)


def _inputs(
    known: Sequence[KnownPoint],
    heights: Sequence[KnownHeight],
    observations: Sequence[Observation],
) -> _Inputs:
    """One pass over the observations (names in the order they first appear)."""
    found = _Inputs()
    order = found.names
    for p in known:
        order[p.name] = None
    for hp in heights:
        order[hp.name] = None
    for obs in observations:
        if isinstance(obs, SlopeDistance):
            found.slopes[(obs.frm, obs.to)] = obs
        elif isinstance(obs, ZenithAngle):
            found.zeniths[(obs.frm, obs.to)] = obs
        elif isinstance(obs, DirectionRound):
            found.sightings.append(obs)
            order[obs.station] = None
            for t, _ in obs.directions:
                order[t] = None
            continue
        elif isinstance(obs, HorizontalAngle):
            found.sightings.append(obs)
            order[obs.at] = order[obs.frm] = order[obs.to] = None
            continue
        elif isinstance(obs, Baseline):
            found.baselines.append(obs)
        elif isinstance(obs, HeightDifference):
            found.levels.append(obs)
        elif isinstance(obs, GridDistance):
            found.grids[(obs.frm, obs.to)] = obs
        elif isinstance(obs, Azimuth):
            found.sightings.append(obs)
        order[obs.frm] = order[obs.to] = None
    grids = found.grids
    grids.update({(o.to, o.frm): o for o in grids.values() if (o.to, o.frm) not in grids})
    return found


def start_positions(
    known: Sequence[KnownPoint],
    observations: Sequence[Observation],
    *,
    heights: Sequence[KnownHeight] = (),
    undulations: Mapping[str, float] | None = None,
    a: float = GRS80_A,
    f: float = GRS80_F,
) -> StartValues:
    """Earth-centred start positions of every point named in the inputs.

    Raises ``UnreachablePointsError`` naming the points no method reaches.
    """
    und = dict(undulations or {})
    ell = _Ellipsoid(a, f)
    state = _State(und)
    for hp in heights:
        state.height[hp.name] = _Known(math.nan, math.nan, hp.height + und.get(hp.name, 0.0))
        state.methods[hp.name] = "given height"
    if known:
        lat, lon, h = ell.shape.from_ecef(np.array([p.xyz for p in known], dtype=float))
        for p, values in zip(known, zip(lat.tolist(), lon.tolist(), h.tolist())):
            given = _Known(*values)
            state.horizontal[p.name] = given
            if p.height_known:
                state.height[p.name] = given
            state.methods[p.name] = "control" if p.control else "given"
    inputs = _inputs(known, heights, observations)
    names = list(inputs.names)
    control = [p.name for p in known if p.control]
    held = set(control)
    order = control + [n for n in names if n not in held]
    slopes, zeniths = inputs.slopes, inputs.zeniths
    rounds = _rounds(inputs.sightings)
    while True:
        grew = _baselines(state, inputs.baselines, order)
        grew |= _polar(state, rounds, slopes, zeniths, inputs.grids)
        grew |= _heights(state, slopes, zeniths, inputs.levels)
        if not grew:
            break
    missing = [n for n in names if not state.placed(n)]
    if missing:
        raise UnreachablePointsError(missing)
    final = [state.position(n) for n in names]
    _evaluate(ell, state.steps)
    return StartValues(
        positions={n: (x, y, z) for n, (x, y, z) in zip(names, (p.xyz.tolist() for p in final))},
        methods=dict(state.methods),
    )
