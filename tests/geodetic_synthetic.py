"""Synthetic geodetic field books from invented true positions, observed without Stationfit.

A site is a set of marks given by latitude, longitude (GRS80) and orthometric height with a
geoid undulation each.  The observations of a network are computed here from those true
positions with PROJ and numpy only, never with ``server/``:

* Earth-centred X, Y, Z of each mark: pyproj ``+proj=cart +ellps=GRS80``; an instrument or
  target hi/ht above its mark is the same latitude and longitude at h + hi (a step along the
  ellipsoid normal);
* horizon azimuth and geometric zenith at the instrument: pyproj ``+proj=topocentric`` with
  the instrument as origin (the instrument's local east, north, up); the booked zenith is
  the geometric one minus the refraction angle k·S/(2R), R = 6 371 000 m (docs/geodetic.md);
* slope distance: the numpy norm between instrument and target; baseline: the difference of
  the marks' X, Y, Z; leveling: the difference of orthometric heights H = h − N;
* grid coordinates of control: pyproj from the CRS's geodetic CRS (NAD83, GRS80) to the
  projected CRS, or the site grid's own transverse Mercator string.

``observe`` evaluates the same model vectorised (local axes from the latitude and longitude
PROJ gives for each X, Y, Z); the tests use it as their own least-squares model and check it
against the topocentric values at the truth.

Invented site near 47°03′N 122°54′W; the names are invented too.
"""

from __future__ import annotations

import math
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field, replace
from functools import cache

import numpy as np
import pyproj

Array = np.ndarray

GRS80 = "+ellps=GRS80"
R_REFRACTION = 6_371_000.0  # the radius in k·S/(2R) (docs/geodetic.md)
US_FOOT = 1200.0 / 3937.0  # metres, exact by definition
ARCSEC = math.pi / 180.0 / 3600.0

#: Site origin (degrees) of the invented job
SITE_LAT, SITE_LON = 47.05, -122.9


@dataclass(frozen=True)
class Grid:
    """How a book writes grid coordinates: its crs line, unit and a PROJ conversion."""

    label: str
    crs_line: str
    unit: str  # "m" or "usft"
    proj: str  # a pyproj CRS or PROJ string for the projected grid

    @property
    def metres_per_unit(self) -> float:
        return 1.0 if self.unit == "m" else US_FOOT


SITE_GRID = Grid(
    "site grid",
    "crs local lat=47:03:00 lon=-122:54:00 east=5000m north=5000m",
    "m",
    "+proj=tmerc +lat_0=47.05 +lon_0=-122.9 +k=1 +x_0=5000 +y_0=5000 +ellps=GRS80 +units=m",
)
UTM_10N = Grid("UTM zone 10N", "crs EPSG:26910", "m", "EPSG:26910")
WA_SOUTH_FTUS = Grid("Washington South, US survey feet", "crs EPSG:2286", "usft", "EPSG:2286")


@cache
def _to_grid(proj: str) -> pyproj.Transformer:
    return pyproj.Transformer.from_crs("EPSG:4269", proj, always_xy=True)  # NAD83 lon/lat


@cache
def _cart() -> tuple[pyproj.Transformer, pyproj.Transformer]:
    forward = pyproj.Transformer.from_pipeline(f"+proj=cart {GRS80}")
    inverse = pyproj.Transformer.from_pipeline(f"+proj=pipeline +step +inv +proj=cart {GRS80}")
    return forward, inverse


def ecef(lat: Array, lon: Array, h: Array) -> Array:
    """X, Y, Z (rows) of geodetic positions in degrees and metres, by PROJ's cart."""
    x, y, z = _cart()[0].transform(
        np.asarray(lon, float), np.asarray(lat, float), np.asarray(h, float)
    )
    return np.stack([x, y, z], axis=-1)


def geodetic(xyz: Array) -> tuple[Array, Array, Array]:
    """Latitude, longitude (degrees) and ellipsoidal height of X, Y, Z rows, by PROJ."""
    xyz = np.atleast_2d(xyz)
    lon, lat, h = _cart()[1].transform(xyz[:, 0], xyz[:, 1], xyz[:, 2])
    return np.asarray(lat), np.asarray(lon), np.asarray(h)


def grid_of(grid: Grid, lat: Array, lon: Array) -> tuple[Array, Array]:
    """Grid east, north in the grid's unit, by PROJ."""
    if grid.proj.startswith("+"):
        tr = pyproj.Transformer.from_pipeline(
            f"+proj=pipeline +step +proj=unitconvert +xy_in=deg +xy_out=rad +step {grid.proj}"
        )
        e, n = tr.transform(np.asarray(lon, float), np.asarray(lat, float))
        return np.asarray(e), np.asarray(n)
    e, n = _to_grid(grid.proj).transform(np.asarray(lon, float), np.asarray(lat, float))
    return np.asarray(e), np.asarray(n)


def from_grid(grid: Grid, east: Array, north: Array) -> tuple[Array, Array]:
    """Latitude, longitude (degrees) of grid east, north in the grid's unit, by PROJ."""
    if grid.proj.startswith("+"):
        tr = pyproj.Transformer.from_pipeline(
            f"+proj=pipeline +step +inv {grid.proj} +step +proj=unitconvert +xy_in=rad +xy_out=deg"
        )
        lon, lat = tr.transform(np.asarray(east, float), np.asarray(north, float))
    else:
        lon, lat = _to_grid(grid.proj).transform(
            np.asarray(east, float), np.asarray(north, float), direction="INVERSE"
        )
    return np.asarray(lat), np.asarray(lon)


def topocentric(origin: tuple[float, float, float], lat: Array, lon: Array, h: Array) -> Array:
    """Local east, north, up of positions seen from ``origin`` (lat, lon deg, h m), by PROJ."""
    lat0, lon0, h0 = origin
    tr = pyproj.Transformer.from_pipeline(
        f"+proj=pipeline +step +proj=cart {GRS80} +step +proj=topocentric {GRS80} "
        f"+lat_0={lat0!r} +lon_0={lon0!r} +h_0={h0!r}"
    )
    e, n, u = tr.transform(np.asarray(lon, float), np.asarray(lat, float), np.asarray(h, float))
    return np.stack([np.asarray(e), np.asarray(n), np.asarray(u)], axis=-1)


# --------------------------------------------------------------------------- the site


@dataclass(frozen=True)
class Mark:
    """A true mark: latitude, longitude (degrees, GRS80), orthometric height H, undulation N."""

    name: str
    lat: float
    lon: float
    height: float
    undulation: float
    role: str  # "control" (fix enh), "benchmark" (fix h, height only) or "new"
    own_geoid: bool = False  # written as geoid= on its point line

    @property
    def h(self) -> float:
        return self.height + self.undulation


@dataclass(frozen=True)
class Obs:
    """One observation as booked: SI value(s) (m, rad), its standard deviation(s) and line."""

    kind: str  # slope, zenith, direction, level, baseline
    frm: str
    to: str
    value: tuple[float, ...]
    sigma: tuple[float, ...]
    hi: float = 0.0
    ht: float = 0.0
    round_id: int = -1
    length_km: float = 0.0
    corr: tuple[float, ...] = ()  # a baseline's correlations XY, XZ, YZ (none: 0)

    def covariance(self) -> Array:
        """The 3×3 covariance of a baseline: diag(σ)·ρ·diag(σ)."""
        rho = np.eye(3)
        if self.corr:
            rho[0, 1] = rho[1, 0] = self.corr[0]
            rho[0, 2] = rho[2, 0] = self.corr[1]
            rho[1, 2] = rho[2, 1] = self.corr[2]
        sd = np.diag(self.sigma)
        return sd @ rho @ sd


@dataclass(frozen=True)
class Plan:
    """What to observe: setups (instrument, hi, targets with ht), baselines and level lines."""

    setups: tuple[tuple[str, float, tuple[tuple[str, float], ...]], ...]
    baselines: tuple[tuple[str, str], ...] = ()
    levels: tuple[tuple[str, str], ...] = ()
    slope_zenith: bool = True  # slope and zenith to each target of a setup
    k: float = 0.13
    slope_a: float = 0.001  # m
    slope_ppm: float = 1.5
    zenith_sd: float = 1.0 * ARCSEC
    direction_sd: float = 1.0 * ARCSEC
    level_per_sqrtkm: float = 0.001  # m
    baseline_sd: tuple[float, float, float] = (0.003, 0.003, 0.005)
    baseline_corr: tuple[float, ...] = ()


@dataclass(frozen=True)
class Site:
    """True marks by name, and the file-wide undulation."""

    marks: Mapping[str, Mark]
    undulation: float = -23.84

    def xyz(self, names: Sequence[str], lift: Sequence[float] | float = 0.0) -> Array:
        m = [self.marks[n] for n in names]
        lift_arr = np.broadcast_to(np.asarray(lift, float), (len(m),))
        return ecef(
            np.array([p.lat for p in m]),
            np.array([p.lon for p in m]),
            np.array([p.h for p in m]) + lift_arr,
        )


def _offset(lat0: float, lon0: float, east_m: float, north_m: float) -> tuple[float, float]:
    """Latitude, longitude (degrees) of a point east_m, north_m from the origin (geodesic)."""
    geod = pyproj.Geod(ellps="GRS80")
    az = math.degrees(math.atan2(east_m, north_m))
    lon, lat, _ = geod.fwd(lon0, lat0, az, math.hypot(east_m, north_m))
    return lat, lon


def harbor_site(rng: np.random.Generator | None = None) -> Site:
    """Three control marks, a benchmark and five new marks on a hillside, about 1.5 km across."""
    layout = {  # name: (east m, north m from the origin, H m, role)
        "RIDGE": (-620.0, 380.0, 142.318, "control"),
        "CEDAR": (710.0, 905.0, 118.902, "control"),
        "FERRY": (540.0, -690.0, 61.447, "control"),
        "BM-4": (-210.0, -340.0, 74.215, "benchmark"),
        "K-7": (-180.0, -260.0, 77.931, "new"),
        "K-8": (160.0, 250.0, 103.604, "new"),
        "K-9": (420.0, -120.0, 88.112, "new"),
        "K-10": (-350.0, 520.0, 131.250, "new"),
        "K-11": (90.0, 730.0, 112.478, "new"),
    }
    marks: dict[str, Mark] = {}
    for name, (e, n, height, role) in layout.items():
        if rng is not None:
            e, n = e + rng.uniform(-40, 40), n + rng.uniform(-40, 40)
        lat, lon = _offset(SITE_LAT, SITE_LON, e, n)
        own = name == "K-9"
        marks[name] = Mark(name, lat, lon, height, -23.80 if own else -23.84, role, own)
    return Site(marks)


HARBOR_PLAN = Plan(
    setups=(
        ("RIDGE", 1.532, (("CEDAR", 1.80), ("K-10", 1.80), ("K-8", 1.65), ("K-7", 1.80))),
        (
            "K-8",
            1.487,
            (("RIDGE", 1.80), ("K-11", 1.80), ("K-9", 1.80), ("K-7", 1.65), ("K-10", 1.80)),
        ),
        ("K-9", 1.601, (("FERRY", 1.80), ("K-7", 1.80), ("K-8", 1.80), ("CEDAR", 2.10))),
        ("K-7", 1.455, (("K-9", 1.80), ("RIDGE", 1.80), ("K-8", 1.80))),
        ("K-11", 1.512, (("CEDAR", 1.80), ("K-10", 1.80), ("K-8", 1.80))),
    ),
    baselines=(("CEDAR", "K-11"), ("FERRY", "K-9"), ("RIDGE", "K-10"), ("FERRY", "K-7")),
    levels=(("BM-4", "K-7"), ("K-7", "K-9")),
)


# --------------------------------------------------------------------------- observing


def true_observations(site: Site, plan: Plan) -> list[Obs]:
    """Every observation of the plan, error-free, from PROJ (cart, topocentric) and numpy."""
    out: list[Obs] = []
    for round_id, (at, hi, targets) in enumerate(plan.setups):
        station = site.marks[at]
        names = [t for t, _ in targets]
        ht = np.array([h for _, h in targets])
        m = [site.marks[t] for t in names]
        lat, lon = np.array([p.lat for p in m]), np.array([p.lon for p in m])
        h = np.array([p.h for p in m])
        at_mark = topocentric((station.lat, station.lon, station.h), lat, lon, h)
        azimuth = np.arctan2(at_mark[:, 0], at_mark[:, 1]) % (2 * math.pi)
        for name, az in zip(names, azimuth):
            out.append(
                Obs("direction", at, name, (float(az),), (plan.direction_sd,), round_id=round_id)
            )
        if not plan.slope_zenith:
            continue
        lifted = topocentric((station.lat, station.lon, station.h + hi), lat, lon, h + ht)
        slope = np.linalg.norm(site.xyz(names, ht) - site.xyz([at], hi), axis=1)
        zenith = np.arctan2(np.hypot(lifted[:, 0], lifted[:, 1]), lifted[:, 2])
        zenith = zenith - plan.k * slope / (2.0 * R_REFRACTION)
        for name, s, z, t in zip(names, slope, zenith, ht):
            sd = math.hypot(plan.slope_a, plan.slope_ppm * 1e-6 * s)
            out.append(Obs("slope", at, name, (float(s),), (sd,), hi=hi, ht=float(t)))
            out.append(Obs("zenith", at, name, (float(z),), (plan.zenith_sd,), hi=hi, ht=float(t)))
    for frm, to in plan.levels:
        a, b = site.marks[frm], site.marks[to]
        length = float(np.linalg.norm(site.xyz([to]) - site.xyz([frm]))) / 1000.0
        out.append(
            Obs(
                "level",
                frm,
                to,
                (b.height - a.height,),
                (plan.level_per_sqrtkm * math.sqrt(length),),
                length_km=length,
            )
        )
    for frm, to in plan.baselines:
        d = (site.xyz([to]) - site.xyz([frm]))[0]
        out.append(
            Obs(
                "baseline",
                frm,
                to,
                tuple(float(c) for c in d),
                plan.baseline_sd,
                corr=plan.baseline_corr,
            )
        )
    return out


def with_noise(observations: Sequence[Obs], rng: np.random.Generator) -> list[Obs]:
    """Each value plus a normal error with its own standard deviation (a baseline's three
    errors drawn together from its covariance)."""
    out = []
    for o in observations:
        if o.kind == "baseline":
            error = rng.multivariate_normal(np.zeros(3), o.covariance())
            out.append(replace(o, value=tuple(float(v) for v in np.asarray(o.value) + error)))
        else:
            out.append(replace(o, value=(o.value[0] + rng.normal(0.0, o.sigma[0]),)))
    return out


# --------------------------------------------------------------------------- writing


def dms(radians: float, decimals: int = 6) -> str:
    """D:M:S with ``decimals`` in the seconds, carried correctly (never 60 seconds)."""
    sign = "-" if radians < 0 else ""
    total = round(abs(math.degrees(radians)) * 3600.0, decimals)
    degrees, rest = divmod(total, 3600.0)
    minutes, seconds = divmod(rest, 60.0)
    seconds = round(seconds, decimals)
    if seconds >= 60.0:
        seconds, minutes = 0.0, minutes + 1
    if minutes >= 60:
        minutes, degrees = 0, degrees + 1
    return f"{sign}{int(degrees)}:{int(minutes):02d}:{seconds:0{3 + decimals}.{decimals}f}"


def dms_value(text: str) -> float:
    """Radians of a D:M:S text as written (the value the book really holds)."""
    sign = -1.0 if text.startswith("-") else 1.0
    d, m, s = text.lstrip("-").split(":")
    return sign * math.radians(int(d) + int(m) / 60.0 + float(s) / 3600.0)


@dataclass(frozen=True)
class Book:
    """A written field book and what it holds, in SI, for an independent solution."""

    text: str
    grid: Grid
    observations: tuple[Obs, ...]  # values as written (rounded), SI
    control: Mapping[str, tuple[float, float, float]]  # X, Y, Z of held marks as written
    benchmarks: Mapping[str, float]  # held orthometric heights of height-only marks
    undulation: Mapping[str, float]
    new: tuple[str, ...]  # marks to estimate, in order
    k: float
    lines: Mapping[int, int] = field(default_factory=dict)  # observation index → book line


def write_book(
    site: Site,
    observations: Sequence[Obs],
    grid: Grid,
    *,
    k: float = 0.13,
    title: str = "Harbor Hill - synthetic",
    decimals: int = 6,
    latlon: bool = False,
) -> Book:
    """The field book of ``observations`` with control written in ``grid``'s coordinates
    (or, with ``latlon``, by latitude and longitude in decimal degrees, every digit)."""
    per = grid.metres_per_unit
    unit = grid.unit

    def length(metres: float, places: int = decimals) -> str:
        return f"{metres / per:.{places}f}"

    lines = [
        "fieldbook 1",
        f'title "{title}"',
        f"units length={unit} angle=dms",
        grid.crs_line,
        f"geoid undulation={site.undulation}m",
        f"refraction k={k}",
        "defaults centering=0mm",
    ]
    control: dict[str, tuple[float, float, float]] = {}
    benchmarks: dict[str, float] = {}
    names_used = {n for o in observations for n in (o.frm, o.to)}
    new = tuple(n for n, m in site.marks.items() if m.role == "new" and n in names_used)
    for name, mark in site.marks.items():
        if name not in names_used:
            continue
        geoid = f" geoid={mark.undulation}m" if mark.own_geoid else ""
        height = length(mark.height)
        if mark.role == "control" and latlon:
            lines.append(
                f"point {name} lat={mark.lat!r}deg lon={mark.lon!r}deg height={height}{geoid} fix"
            )
            xyz = ecef(
                np.array([mark.lat]),
                np.array([mark.lon]),
                np.array([float(height) * per + mark.undulation]),
            )[0]
            control[name] = (float(xyz[0]), float(xyz[1]), float(xyz[2]))
        elif mark.role == "control":
            e, n = grid_of(grid, np.array([mark.lat]), np.array([mark.lon]))
            e_txt, n_txt = f"{e[0]:.{decimals + 3}f}", f"{n[0]:.{decimals + 3}f}"
            lines.append(f"point {name} east={e_txt} north={n_txt} height={height}{geoid} fix")
            lat, lon = from_grid(grid, np.array([float(e_txt)]), np.array([float(n_txt)]))
            xyz = ecef(lat, lon, np.array([float(height) * per + mark.undulation]))[0]
            control[name] = (float(xyz[0]), float(xyz[1]), float(xyz[2]))
        elif mark.role == "benchmark":
            lines.append(f"point {name} height={height}{geoid} fix")
            benchmarks[name] = float(height) * per
        elif geoid:
            lines.append(f"point {name}{geoid}")
    written: list[Obs] = []
    line_of: dict[int, int] = {}
    current_round = -2
    for o in observations:
        if o.kind == "direction":
            if o.round_id != current_round:
                if current_round != -2:
                    lines.append("end")
                lines.append(f"directions {o.frm} sd={o.sigma[0] / ARCSEC!r}sec")
                current_round = o.round_id
            text = dms(o.value[0] % (2 * math.pi))
            lines.append(f"  {o.to} {text}")
            written.append(replace(o, value=(dms_value(text),)))
            line_of[len(written) - 1] = len(lines)
            continue
        if current_round != -2:
            lines.append("end")
            current_round = -2
        hi_ht = f" hi={o.hi!r}m ht={o.ht!r}m"
        if o.kind == "slope":
            text = length(o.value[0])
            lines.append(f"slope {o.frm} {o.to} {text}{hi_ht} sd={o.sigma[0] * 1000.0!r}mm")
            value = (float(text) * per,)
        elif o.kind == "zenith":
            text = dms(o.value[0])
            lines.append(f"zenith {o.frm} {o.to} {text}{hi_ht} sd={o.sigma[0] / ARCSEC!r}sec")
            value = (dms_value(text),)
        elif o.kind == "level":
            text = length(o.value[0])
            lines.append(
                f"level {o.frm} {o.to} {text} len={o.length_km!r}km "
                f"sd={o.sigma[0] / math.sqrt(o.length_km) * 1000.0!r}mm/sqrtkm"
            )
            value = (float(text) * per,)
        elif o.kind == "baseline":
            parts = [f"{c:+.{decimals}f}" for c in o.value]  # metres, with the unit
            sds = ",".join(f"{s * 1000.0!r}mm" for s in o.sigma)
            corr = f" corr={','.join(repr(c) for c in o.corr)}" if o.corr else ""
            lines.append(
                f"baseline {o.frm} {o.to} " + " ".join(p + "m" for p in parts) + f" sd={sds}{corr}"
            )
            value = tuple(float(p) for p in parts)
        else:
            raise ValueError(o.kind)
        written.append(replace(o, value=value))
        line_of[len(written) - 1] = len(lines)
    if current_round != -2:
        lines.append("end")
    undulation = {n: m.undulation for n, m in site.marks.items()}
    return Book(
        "\n".join(lines) + "\n",
        grid,
        tuple(written),
        control,
        benchmarks,
        undulation,
        new,
        k,
        line_of,
    )


# --------------------------------------------------------------------------- the model


def local_axes(xyz: Array) -> Array:
    """Rows ê, n̂, û at each X, Y, Z (m, 3, 3), from the latitude and longitude PROJ gives."""
    lat, lon, _ = geodetic(xyz)
    phi, lam = np.radians(lat), np.radians(lon)
    sp, cp, sl, cl = np.sin(phi), np.cos(phi), np.sin(lam), np.cos(lam)
    zero = np.zeros_like(phi)
    return np.stack(
        [
            np.stack([-sl, cl, zero], -1),
            np.stack([-sp * cl, -sp * sl, cp], -1),
            np.stack([cp * cl, cp * sl, sp], -1),
        ],
        axis=1,
    )


def observe(book: Book, positions: Mapping[str, Array], orientation: Array) -> list[Array]:
    """Model values of the book's observations (SI; directions minus their round's
    orientation) at Earth-centred ``positions``: one array per observation."""
    obs = book.observations
    names = sorted(positions)
    index = {n: i for i, n in enumerate(names)}
    xyz = np.array([positions[n] for n in names])
    axes = local_axes(xyz)
    _, _, h = geodetic(xyz)
    out: list[Array] = []
    for o in obs:
        i, j = index.get(o.frm), index.get(o.to)
        if o.kind == "level":

            def height(name: str, k: int | None) -> float:
                if name in book.benchmarks:
                    return book.benchmarks[name]
                assert k is not None
                return float(h[k]) - book.undulation[name]

            out.append(np.array([height(o.to, j) - height(o.frm, i)]))
            continue
        assert i is not None and j is not None
        if o.kind == "baseline":
            out.append(xyz[j] - xyz[i])
        elif o.kind == "direction":
            d = xyz[j] - xyz[i]
            e, n = axes[i, 0] @ d, axes[i, 1] @ d
            out.append(np.array([math.atan2(e, n) - orientation[o.round_id]]))
        else:
            d = xyz[j] + o.ht * axes[j, 2] - xyz[i] - o.hi * axes[i, 2]
            s = float(np.linalg.norm(d))
            if o.kind == "slope":
                out.append(np.array([s]))
            else:
                zenith = math.acos(float(axes[i, 2] @ d) / s)
                out.append(np.array([zenith - book.k * s / (2.0 * R_REFRACTION)]))
    return out


def wrap(angle: Array) -> Array:
    """Angles into (−π, π]."""
    return np.asarray(-((-np.asarray(angle) + math.pi) % (2 * math.pi) - math.pi))


# --------------------------------------------------------------------------- own solution


@dataclass(frozen=True)
class Independent:
    """scipy's least-squares solution of a book with the model above."""

    positions: Mapping[str, Array]  # X, Y, Z of every mark the book uses
    orientation: Array
    vtpv: float
    redundancy: int
    residuals: tuple[Array, ...]  # adjusted − observed per observation (SI)
    jacobian: Array  # of the whitened residuals at the solution, central differences

    def redundancy_numbers(self) -> Array:
        """r_i = 1 − (J·(JᵀJ)⁻¹·Jᵀ)_ii per row (whitened rows: the hat matrix)."""
        J = self.jacobian
        return 1.0 - np.einsum("ij,ji->i", J, np.linalg.solve(J.T @ J, J.T))

    @property
    def variance_factor(self) -> float:
        return self.vtpv / self.redundancy


def spatial_names(book: Book) -> set[str]:
    return {n for o in book.observations if o.kind != "level" for n in (o.frm, o.to)}


def solve_independently(book: Book, start: Mapping[str, Array]) -> Independent:
    """Minimise Σ((model − observed)/σ)² with scipy.optimize.least_squares.

    Unknowns: X, Y, Z offsets of each new mark, the horizontal position (metres along the
    parallel and the meridian, h held) of each benchmark that is sighted, and one
    orientation per direction round.  The Jacobian is scipy's own finite differences.
    """
    from scipy.optimize import least_squares

    sighted = sorted(spatial_names(book) & set(book.benchmarks))
    bench_h = {n: book.benchmarks[n] + book.undulation[n] for n in sighted}
    bench_start = {n: geodetic(np.asarray(start[n])[None, :]) for n in sighted}
    n_new, n_bench = len(book.new), len(sighted)
    rounds = sorted({o.round_id for o in book.observations if o.kind == "direction"})
    observed = [np.asarray(o.value) for o in book.observations]
    # whitening: 1/σ, or the inverse Cholesky factor of a baseline's covariance
    whiten = [
        np.linalg.inv(np.linalg.cholesky(o.covariance()))
        if o.kind == "baseline"
        else np.array([[1.0 / o.sigma[0]]])
        for o in book.observations
    ]
    kinds = [o.kind for o in book.observations]
    start_new = np.array([start[n] for n in book.new]).reshape(-1, 3)

    def unpack(x: Array) -> tuple[dict[str, Array], Array]:
        positions: dict[str, Array] = {n: np.asarray(v) for n, v in book.control.items()}
        for k, name in enumerate(book.new):
            positions[name] = start_new[k] + x[3 * k : 3 * k + 3]
        base = 3 * n_new
        for k, name in enumerate(sighted):
            lat, lon, _ = bench_start[name]
            phi = math.radians(float(lat[0]))
            de, dn = x[base + 2 * k], x[base + 2 * k + 1]
            positions[name] = ecef(
                lat + math.degrees(dn / 6_371_000.0),
                lon + math.degrees(de / (6_371_000.0 * math.cos(phi))),
                np.array([bench_h[name]]),
            )[0]
        orientation = np.zeros(max(rounds, default=-1) + 1)
        orientation[rounds] = x[base + 2 * n_bench :]
        return positions, orientation

    def whitened(x: Array) -> Array:
        positions, orientation = unpack(x)
        parts = []
        for model, value, w, kind in zip(
            observe(book, positions, orientation), observed, whiten, kinds
        ):
            v = model - value
            parts.append(w @ (wrap(v) if kind == "direction" else v))
        return np.concatenate(parts)

    # start orientations: the mean of azimuth − direction over each round, at the start
    x0 = np.zeros(3 * n_new + 2 * n_bench + len(rounds))
    positions, _ = unpack(x0)
    azimuths = observe(book, positions, np.zeros(max(rounds, default=-1) + 1))
    for k, r in enumerate(rounds):
        offsets = [
            float(wrap(a - o.value[0])[0]) + 0.0
            for a, o in zip(azimuths, book.observations)
            if o.kind == "direction" and o.round_id == r
        ]
        x0[3 * n_new + 2 * n_bench + k] = math.atan2(
            np.mean(np.sin(offsets)), np.mean(np.cos(offsets))
        )
    fit = least_squares(
        whitened,
        x0,
        jac="3-point",
        diff_step=1e-6,
        method="trf",
        x_scale="jac",
        ftol=1e-14,
        xtol=1e-14,
        gtol=1e-14,
        max_nfev=200,
    )
    positions, orientation = unpack(fit.x)
    residuals = []
    for model, value, kind in zip(observe(book, positions, orientation), observed, kinds):
        v = model - value
        residuals.append(wrap(v) if kind == "direction" else v)
    rows = sum(len(v) for v in observed)
    vtpv = float(np.sum(whitened(fit.x) ** 2))
    # central differences, steps of 0.1 mm (and 1e-4 rad on the linear orientations):
    # rounding 1e-9 m / 1e-4 m and the truncation (h/D)² both stay below 1e-5
    step = 1e-4
    jacobian = np.empty((rows, len(x0)))
    for j in range(len(x0)):
        e = np.zeros(len(x0))
        e[j] = step
        jacobian[:, j] = (whitened(fit.x + e) - whitened(fit.x - e)) / (2.0 * step)
    return Independent(positions, orientation, vtpv, rows - len(x0), tuple(residuals), jacobian)


def true_positions(site: Site, names: Sequence[str]) -> dict[str, Array]:
    return {n: site.xyz([n])[0] for n in names}


def grid_and_height(book: Book, xyz: Array, name: str) -> tuple[float, float, float]:
    """Grid east, north (book unit) and orthometric height (book unit) of X, Y, Z, by PROJ."""
    lat, lon, h = geodetic(np.asarray(xyz)[None, :])
    e, n = grid_of(book.grid, lat, lon)
    per = book.grid.metres_per_unit
    return float(e[0]), float(n[0]), (float(h[0]) - book.undulation[name]) / per
