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
"""

from __future__ import annotations

import math
from collections import deque
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from typing import TypeVar

import numpy as np
from pyproj import Geod

from server.geodesy import frames
from server.geodesy.ellipsoid import GRS80, Ellipsoid

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
        self.geod = Geod(a=a, f=f)

    def to_ecef(self, lat: float, lon: float, h: float) -> np.ndarray:
        return np.asarray(self.shape.to_ecef(lat, lon, h), dtype=float).reshape(3)

    def from_ecef(self, xyz: Iterable[float]) -> tuple[float, float, float]:
        lat, lon, h = self.shape.from_ecef(np.asarray(list(xyz), dtype=float).reshape(1, 3))
        return float(lat[0]), float(lon[0]), float(h[0])


def enu_rotation(lat: float, lon: float) -> np.ndarray:
    """Rows east, north, up at φ, λ (radians)."""
    return frames.enu_rotation(np.array([lat]), np.array([lon]))[0]


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
