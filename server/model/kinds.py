"""The observation kinds: one table holding each kind's equation, partials and a priori σ.

Model (Gauss–Markov, linearised about the current coordinates)::

    l + v = f(x),   A = ∂f/∂x,   P = Σ⁻¹  (diagonal: 1/σ²)

with ``l`` the observed values, ``v`` the residuals, ``x`` the unknowns
(eastings E, northings N, heights H and one orientation O per direction
round) and σ the a priori standard deviations.  Every function here works on
a whole ``Batch`` (all observations of one kind) with numpy; the assembly
calls them once per kind and iteration, and a single observation (an ignored
one, a test) is evaluated as a batch of one row.

A kind observes ``components`` numbers per observation (1 for all kinds
here; 3 for a coordinate-difference vector), so a batch of m observations has
m·components rows, observation-major.  ``columns`` name, for each partial
derivative, the point role (``from``, ``at``, ``to``) or ``round`` and the
unknown (E, N, H, O); the assembly turns them into columns of A.

Horizontal geometry, with ΔE = E_j − E_i, ΔN = N_j − N_i and s² = ΔE² + ΔN²:

* distance   s;            ∂s/∂E_j = ΔE/s,  ∂s/∂N_j = ΔN/s   (negated for point i)
* azimuth    t = atan2(ΔE, ΔN), clockwise from grid north;
             ∂t/∂E_j = ΔN/s², ∂t/∂N_j = −ΔE/s²           (negated for point i)
* direction  t(AT→TO) − O,   ∂/∂O = −1
* angle      t(AT→FORE) − t(AT→BACK); AT's partials are minus the sum of the others
* level      H_TO − H_FROM

A priori standard deviations with centering c (standard error propagation,
as in Ghilani, *Adjustment Computations*, 6th ed., Wiley 2017, chapter on
weights of angles and distances; recalled from memory):

* distance   σ² = a² + (b·D·10⁻⁶)² + 2c²    (instrument and target each off by c)
* direction  σ² = σ_d² + 2c²/D²             (c across the line at either end, over D)
* angle      σ² = σ_a² + c²·D₃²/(D₁²·D₂²) + c²·(1/D₁² + 1/D₂²)
  (instrument centering, then the two targets; D₁ AT–BACK, D₂ AT–FORE, D₃ BACK–FORE)
* level      σ² = c² + k²·L + s²·K  (per √km of run and per setup)
* azimuth    σ = a (no centering, by the contract)
"""

from __future__ import annotations

from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np

from server.fieldbook.model import Observation
from server.fieldbook.table import NONE, ObservationTable

#: Point roles of an observation; ``round`` indexes the orientation unknowns.
ROLES = ("from", "at", "to")

Array = np.ndarray
_EMPTY = np.zeros(0)


class CoincidentPointsError(Exception):
    """Two points of some rows of a batch share a position: no direction between them.

    ``rows`` are observation indices within the batch, in the order found.
    """

    def __init__(self, rows: Array) -> None:
        super().__init__(f"coincident points in rows {rows.tolist()}")
        self.rows = rows


@dataclass(frozen=True, slots=True)
class Positions:
    """Current coordinates (metres) per point index and orientations (radians) per round."""

    east: Array
    north: Array
    height: Array
    orientation: Array


@dataclass(frozen=True, slots=True)
class Batch:
    """The observations of one kind as arrays, one entry per observation.

    ``frm``/``at``/``to`` are point indices (``at`` equals ``frm`` where the
    kind has no separate station), ``rnd`` round indices (0 where none);
    ``value`` holds the observed numbers, ``components`` per observation.
    The σ parts are those of ``units.Quantity`` in SI, ``centering`` metres;
    ``instrument_height``/``target_height`` (hi, ht) metres, 0 where not given;
    ``covariance`` the booked (components × components) block of a vector kind
    in m² (shape (m, k, k); empty for the scalar kinds); ``geoid_from``/``geoid_to``
    the geoid undulations N of the two ends (geodetic model; 0 elsewhere).
    """

    frm: Array
    at: Array
    to: Array
    rnd: Array
    value: Array
    constant: Array
    ppm: Array
    per_sqrtkm: Array
    per_setup: Array
    length_km: Array
    setups: Array
    centering: Array
    #: (m, k, k) covariance of each observation's components as booked (kinds with k > 1)
    covariance: Array | None = None
    # the geodetic model's inputs; empty where a kind does not use them
    instrument_height: Array = field(default_factory=lambda: _EMPTY)
    target_height: Array = field(default_factory=lambda: _EMPTY)
    geoid_from: Array = field(default_factory=lambda: _EMPTY)
    geoid_to: Array = field(default_factory=lambda: _EMPTY)

    @property
    def size(self) -> int:
        """Number of observations."""
        return int(self.frm.shape[0])

    def role(self, name: str) -> Array:
        """Point indices of a role (``from``, ``at``, ``to``) or round indices (``round``)."""
        return {"from": self.frm, "at": self.at, "to": self.to, "round": self.rnd}[name]


@dataclass(frozen=True, slots=True)
class Linearised:
    """Computed values (m·k,) and partial derivatives (m·k, len(columns)) of a batch."""

    value: Array
    partials: Array


Equation = Callable[[Batch, Positions], Linearised]
Sigma = Callable[[Batch, Positions], Array]
#: (m, k, k) covariance of each observation's k components, for a correlated kind
Covariance = Callable[[Batch, Positions], Array]


@dataclass(frozen=True, slots=True)
class Kind:
    """One observation kind of the model.

    ``columns`` list (role, unknown) for each partial derivative, in the order
    ``equation`` returns them; ``angular`` kinds have their misclosures reduced
    to (−π, π].  ``sigma`` gives each row's a priori σ (centering included).
    A kind whose components are correlated gives their k×k ``covariance`` per
    observation; its rows are then whitened (``whitening.py``), and ``sigma``
    is the square root of the covariance's diagonal.
    """

    name: str
    columns: tuple[tuple[str, str], ...]
    angular: bool
    equation: Equation
    sigma: Sigma
    components: int = 1
    #: True when ``at`` is a point of its own (an angle's station), else it equals ``from``
    has_station: bool = False
    #: True when the kind has an orientation unknown per round
    has_round: bool = False
    covariance: Covariance | None = None


def _polar(i: Array, j: Array, at: Positions) -> tuple[Array, Array, Array]:
    """ΔE, ΔN and s² from points i to points j; rows with s² not above 0 are refused."""
    d_east = at.east[j] - at.east[i]
    d_north = at.north[j] - at.north[i]
    s2 = d_east * d_east + d_north * d_north
    bad = np.flatnonzero(~(s2 > 0.0))  # NaN too: a point without a position
    if bad.size:
        raise CoincidentPointsError(bad)
    return d_east, d_north, s2


def _azimuth_terms(i: Array, j: Array, at: Positions, sign: float) -> tuple[Array, ...]:
    """t = atan2(ΔE, ΔN) and sign·∂t/∂E_j, sign·∂t/∂N_j, and s²."""
    d_east, d_north, s2 = _polar(i, j, at)
    value = np.arctan2(d_east, d_north)
    return value, sign * d_north / s2, -sign * d_east / s2, s2


def _distance_between(i: Array, j: Array, at: Positions) -> Array:
    """Grid distances i–j without the coincidence check (σ only: 0 gives an infinite σ)."""
    d_east = at.east[j] - at.east[i]
    d_north = at.north[j] - at.north[i]
    return np.sqrt(d_east * d_east + d_north * d_north)


def _level(batch: Batch, at: Positions) -> Linearised:
    value = at.height[batch.to] - at.height[batch.frm]
    partials = np.empty((batch.size, 2))
    partials[:, 0] = 1.0
    partials[:, 1] = -1.0
    return Linearised(value, partials)


def _level_sigma(batch: Batch, at: Positions) -> Array:
    # σ² = c² + k²·L + s²·K; a part is added only where it is given (L or K may be unknown)
    k, s = batch.per_sqrtkm, batch.per_setup
    variance = batch.constant**2
    variance = np.where(k != 0.0, variance + k**2 * batch.length_km, variance)
    variance = np.where(s != 0.0, variance + s**2 * batch.setups, variance)
    return np.sqrt(variance)


def _distance(batch: Batch, at: Positions) -> Linearised:
    d_east, d_north, s2 = _polar(batch.frm, batch.to, at)
    s = np.sqrt(s2)
    de, dn = d_east / s, d_north / s
    return Linearised(s, np.stack([de, dn, -de, -dn], axis=1))


def _distance_sigma(batch: Batch, at: Positions) -> Array:
    instrument = np.hypot(batch.constant, batch.ppm * 1e-6 * batch.value)
    return np.sqrt(instrument**2 + 2.0 * batch.centering**2)


def _azimuth(batch: Batch, at: Positions) -> Linearised:
    value, de, dn, _ = _azimuth_terms(batch.frm, batch.to, at, 1.0)
    return Linearised(value, np.stack([de, dn, -de, -dn], axis=1))


def _constant_sigma(batch: Batch, at: Positions) -> Array:
    return batch.constant


def _direction(batch: Batch, at: Positions) -> Linearised:
    value, de, dn, _ = _azimuth_terms(batch.frm, batch.to, at, 1.0)
    partials = np.stack([de, dn, -de, -dn, np.full(de.shape, -1.0)], axis=1)
    return Linearised(value - at.orientation[batch.rnd], partials)


def _direction_sigma(batch: Batch, at: Positions) -> Array:
    c = batch.centering
    d = _distance_between(batch.frm, batch.to, at)
    with np.errstate(divide="ignore", invalid="ignore"):
        centred = np.sqrt(batch.constant**2 + 2.0 * c * c / (d * d))
    return np.where(c != 0.0, centred, batch.constant)


def _angle(batch: Batch, at: Positions) -> Linearised:
    fore, de_f, dn_f, _ = _azimuth_terms(batch.at, batch.to, at, 1.0)
    back, de_b, dn_b, _ = _azimuth_terms(batch.at, batch.frm, at, -1.0)
    partials = np.stack([de_f, dn_f, de_b, dn_b, -de_f - de_b, -dn_f - dn_b], axis=1)
    return Linearised(fore - back, partials)


def _angle_sigma(batch: Batch, at: Positions) -> Array:
    c = batch.centering
    d1 = _distance_between(batch.at, batch.frm, at)
    d2 = _distance_between(batch.at, batch.to, at)
    d3 = _distance_between(batch.frm, batch.to, at)
    with np.errstate(divide="ignore", invalid="ignore"):
        instrument = c * c * d3 * d3 / (d1 * d1 * d2 * d2)
        targets = c * c * (1.0 / (d1 * d1) + 1.0 / (d2 * d2))
        centred = np.sqrt(batch.constant**2 + instrument + targets)
    return np.where(c != 0.0, centred, batch.constant)


_EN_TO_FROM = (("to", "E"), ("to", "N"), ("from", "E"), ("from", "N"))

#: Every kind the model adjusts, in the order their rows are assembled.
KINDS: dict[str, Kind] = {
    kind.name: kind
    for kind in (
        Kind("level", (("to", "H"), ("from", "H")), False, _level, _level_sigma),
        Kind("distance", _EN_TO_FROM, False, _distance, _distance_sigma),
        Kind("azimuth", _EN_TO_FROM, True, _azimuth, _constant_sigma),
        Kind(
            "direction",
            (*_EN_TO_FROM, ("round", "O")),
            True,
            _direction,
            _direction_sigma,
            has_round=True,
        ),
        # FORE, BACK, AT: AT's two azimuth partials combined
        Kind(
            "angle",
            (*_EN_TO_FROM, ("at", "E"), ("at", "N")),
            True,
            _angle,
            _angle_sigma,
            has_station=True,
        ),
    )
}


def batch_of(
    kind: Kind,
    observations: Sequence[Observation],
    point_index: Mapping[str, int],
    round_index: Mapping[int, int],
    undulation: Mapping[str, float] | None = None,
) -> Batch:
    """The arrays of a list of observations of ``kind`` (KeyError for an unknown point);
    ``undulation`` gives the geoid undulation of each point name (geodetic model)."""
    und = undulation or {}
    frm = np.array([point_index[o.from_point] for o in observations], dtype=np.int64)
    to = np.array([point_index[o.to] for o in observations], dtype=np.int64)
    at = frm
    if kind.has_station:
        at = np.array([point_index[o.at or ""] for o in observations], dtype=np.int64)
    rnd = np.zeros(len(observations), np.int64)
    if kind.has_round:
        rnd = np.array([round_index[o.round_line or 0] for o in observations], dtype=np.int64)
    value = np.array([o.value for o in observations], dtype=float)
    covariance = None
    if kind.components > 1:  # a vector observation: its components and their covariance
        vectors = [o.baseline for o in observations]
        if any(v is None for v in vectors):
            raise ValueError(f"a {kind.name} observation lacks its {kind.components} components")
        value = np.array([v.components for v in vectors if v], dtype=float).reshape(-1)
        covariance = np.array([v.covariance for v in vectors if v], dtype=float)
    return Batch(
        frm=frm,
        at=at,
        to=to,
        rnd=rnd,
        value=value,
        constant=np.array([o.sigma.constant for o in observations], dtype=float),
        ppm=np.array([o.sigma.ppm for o in observations], dtype=float),
        per_sqrtkm=np.array([o.sigma.per_sqrtkm for o in observations], dtype=float),
        per_setup=np.array([o.sigma.per_setup for o in observations], dtype=float),
        length_km=np.array([o.length_km or 0.0 for o in observations], dtype=float),
        setups=np.array([o.setups or 0 for o in observations], dtype=float),
        centering=np.array([o.centering for o in observations], dtype=float),
        instrument_height=np.array([o.instrument_height or 0.0 for o in observations]),
        target_height=np.array([o.target_height or 0.0 for o in observations]),
        covariance=covariance,
        geoid_from=np.array([und.get(o.from_point, 0.0) for o in observations], dtype=float),
        geoid_to=np.array([und.get(o.to, 0.0) for o in observations], dtype=float),
    )


def table_batch(
    kind: Kind,
    table: ObservationTable,
    rows: np.ndarray,
    point: np.ndarray,
    round_index: Mapping[int, int],
    undulation: Mapping[str, float] | None = None,
) -> Batch:
    """The arrays of some rows of an observation table, all of ``kind``: ``batch_of`` without
    the objects, giving the same numbers.

    ``point`` is the point index of each name of ``table.names`` (−1: not a point, a
    KeyError naming it if a row uses it); ``round_index`` and ``undulation`` are as for
    ``batch_of``.
    """
    rows = np.asarray(rows, dtype=np.int64)
    frm = _points(point, table, table.frm[rows])
    to = _points(point, table, table.to[rows])
    at = _points(point, table, table.at[rows]) if kind.has_station else frm
    rnd = np.zeros(rows.size, np.int64)
    if kind.has_round:
        lines = np.maximum(table.round_line[rows], 0)  # an absent round as line 0
        distinct, inverse = np.unique(lines, return_inverse=True)
        rnd = np.array([round_index[line] for line in distinct.tolist()], np.int64)[inverse]
    value = table.value[rows]
    covariance = None
    if kind.components > 1:  # a vector observation: its components and their covariance
        vectors = [table.baselines.get(k) for k in rows.tolist()]
        if any(v is None for v in vectors):
            raise ValueError(f"a {kind.name} observation lacks its {kind.components} components")
        value = np.array([v.components for v in vectors if v], dtype=float).reshape(-1)
        covariance = np.array([v.covariance for v in vectors if v], dtype=float)
    und = undulation or {}
    names = table.names
    return Batch(
        frm=frm,
        at=at,
        to=to,
        rnd=rnd,
        value=value,
        constant=table.sigma_part("constant")[rows],
        ppm=table.sigma_part("ppm")[rows],
        per_sqrtkm=table.sigma_part("per_sqrtkm")[rows],
        per_setup=table.sigma_part("per_setup")[rows],
        length_km=_zero_where_nan(table.length_km[rows]),
        setups=np.maximum(table.setups[rows], 0).astype(float),
        centering=table.centering[rows],
        instrument_height=_zero_where_nan(table.instrument_height[rows]),
        target_height=_zero_where_nan(table.target_height[rows]),
        covariance=covariance,
        geoid_from=np.array([und.get(names[k], 0.0) for k in table.frm[rows].tolist()])
        if und
        else np.zeros(rows.size),
        geoid_to=np.array([und.get(names[k], 0.0) for k in table.to[rows].tolist()])
        if und
        else np.zeros(rows.size),
    )


def _zero_where_nan(values: np.ndarray) -> np.ndarray:
    """0 for an absent value (NaN in the table), as ``batch_of`` reads ``value or 0.0``."""
    return np.where(np.isnan(values), 0.0, values)


def _points(point: np.ndarray, table: ObservationTable, names: np.ndarray) -> np.ndarray:
    """Point indices of name indices; KeyError naming the first that is not a point."""
    index = np.where(names >= 0, point[names], NONE)
    if index.size and index.min() < 0:
        bad = int(names[np.flatnonzero(index < 0)[0]])
        raise KeyError(table.names[bad] if bad >= 0 else "")
    return index


def _one(
    obs: Observation,
    coordinates: Mapping[str, tuple[float, float, float]],
    orientations: Mapping[int, float],
    kinds: Mapping[str, Kind],
    undulation: Mapping[str, float] | None,
) -> tuple[Kind, Batch, Positions]:
    """A single observation as a batch of one, over just the points it names."""
    kind = kinds[obs.kind]
    station = (obs.at,) if kind.has_station and obs.at is not None else ()
    names = list(dict.fromkeys((obs.from_point, *station, obs.to)))
    table = np.array([coordinates[n] for n in names], dtype=float).reshape(-1, 3)
    rounds = {obs.round_line or 0: 0} if kind.has_round else {}
    orientation = np.array([orientations.get(r, np.nan) for r in rounds], dtype=float)
    positions = Positions(table[:, 0], table[:, 1], table[:, 2], orientation)
    batch = batch_of(kind, [obs], {n: k for k, n in enumerate(names)}, rounds, undulation)
    return kind, batch, positions


def evaluate_one(
    obs: Observation,
    coordinates: Mapping[str, tuple[float, float, float]],
    orientations: Mapping[int, float],
    kinds: Mapping[str, Kind] | None = None,
    undulation: Mapping[str, float] | None = None,
) -> Linearised:
    """Value and partials of one observation, as a batch of one (``kinds``: the plane
    table unless the geodetic model's is given, with its ``undulation`` per point).

    Raises KeyError for a kind not in the table or a point not in ``coordinates``, and
    ``CoincidentPointsError`` when its points coincide or lack a position.  A round without an
    orientation gives NaN.
    """
    kind, batch, positions = _one(obs, coordinates, orientations, kinds or KINDS, undulation)
    return kind.equation(batch, positions)


def sigma_one(
    obs: Observation,
    coordinates: Mapping[str, tuple[float, float, float]],
    kinds: Mapping[str, Kind] | None = None,
) -> float:
    """The a priori σ of one observation in SI units, centering included (NaN or inf when
    its points coincide or lack coordinates); a vector kind gives its first component's."""
    kind, batch, positions = _one(obs, coordinates, {}, kinds or KINDS, None)
    return float(kind.sigma(batch, positions)[0])
