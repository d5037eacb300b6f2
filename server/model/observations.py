"""Observation equations: the computed value of each kind and its partial derivatives.

Model (Gauss–Markov, linearised about the current coordinates)::

    l + v = f(x),   A = ∂f/∂x,   P = diag(1/σ²)

with ``l`` the observed values, ``v`` the residuals, ``x`` the unknowns
(eastings E, northings N, heights H and one orientation O per direction
round) and σ the a priori standard deviations.  Each function below returns
the value computed from the current coordinates and its derivatives as
``(unknown, coefficient)`` pairs, where an unknown is ``(point, "E"|"N"|"H")``
or ``(round_line, "O")``.

Horizontal geometry, with ΔE = E_j − E_i, ΔN = N_j − N_i and s² = ΔE² + ΔN²:

* distance   s;            ∂s/∂E_j = ΔE/s,  ∂s/∂N_j = ΔN/s   (negated for point i)
* azimuth    t = atan2(ΔE, ΔN), clockwise from grid north;
             ∂t/∂E_j = ΔN/s², ∂t/∂N_j = −ΔE/s²           (negated for point i)
* direction  t(AT→TO) − O,   ∂/∂O = −1
* angle      t(AT→FORE) − t(AT→BACK)

A priori standard deviations with centering c (standard error propagation,
as in Ghilani, *Adjustment Computations*, 6th ed., Wiley 2017, chapter on
weights of angles and distances; recalled from memory):

* distance   σ² = a² + (b·D·10⁻⁶)² + 2c²
* direction  σ² = σ_d² + 2c²/D²
* angle      σ² = σ_a² + c²·D₃²/(D₁²·D₂²) + c²·(1/D₁² + 1/D₂²)
  (instrument centering, then the two targets; D₃ the BACK–FORE distance)
* level      σ² = c² + k²·L + s²·K  (per √km of run and per setup)
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping

from server.fieldbook.model import Observation

Unknown = tuple[object, str]
Partials = list[tuple[Unknown, float]]
#: Current coordinates: point name → (east, north, height) in metres (NaN where absent).
Coordinates = Mapping[str, tuple[float, float, float]]


def _polar(coords: Coordinates, i: str, j: str) -> tuple[float, float, float]:
    """ΔE, ΔN and s² from point i to point j."""
    d_east = coords[j][0] - coords[i][0]
    d_north = coords[j][1] - coords[i][1]
    return d_east, d_north, d_east * d_east + d_north * d_north


def horizontal_distance(coords: Coordinates, i: str, j: str) -> float:
    """Grid distance between two points from the current coordinates."""
    return math.sqrt(_polar(coords, i, j)[2])


def _azimuth_partials(coords: Coordinates, i: str, j: str, sign: float) -> tuple[float, Partials]:
    d_east, d_north, s2 = _polar(coords, i, j)
    if s2 == 0.0:
        raise ZeroDivisionError(f"points {i} and {j} coincide")
    value = math.atan2(d_east, d_north)
    de, dn = sign * d_north / s2, -sign * d_east / s2
    return value, [((j, "E"), de), ((j, "N"), dn), ((i, "E"), -de), ((i, "N"), -dn)]


def level(obs: Observation, coords: Coordinates, orientation: Mapping[int, float]) -> tuple[float, Partials]:
    """Height difference H(TO) − H(FROM)."""
    value = coords[obs.to][2] - coords[obs.from_point][2]
    return value, [((obs.to, "H"), 1.0), ((obs.from_point, "H"), -1.0)]


def distance(obs: Observation, coords: Coordinates, orientation: Mapping[int, float]) -> tuple[float, Partials]:
    """Horizontal grid distance FROM–TO."""
    d_east, d_north, s2 = _polar(coords, obs.from_point, obs.to)
    s = math.sqrt(s2)
    if s == 0.0:
        raise ZeroDivisionError(f"points {obs.from_point} and {obs.to} coincide")
    de, dn = d_east / s, d_north / s
    i, j = obs.from_point, obs.to
    return s, [((j, "E"), de), ((j, "N"), dn), ((i, "E"), -de), ((i, "N"), -dn)]


def azimuth(obs: Observation, coords: Coordinates, orientation: Mapping[int, float]) -> tuple[float, Partials]:
    """Grid azimuth FROM→TO, clockwise from grid north."""
    return _azimuth_partials(coords, obs.from_point, obs.to, 1.0)


def direction(obs: Observation, coords: Coordinates, orientation: Mapping[int, float]) -> tuple[float, Partials]:
    """Azimuth AT→TO less the round's orientation unknown."""
    assert obs.round_line is not None
    value, partials = _azimuth_partials(coords, obs.from_point, obs.to, 1.0)
    partials.append(((obs.round_line, "O"), -1.0))
    return value - orientation[obs.round_line], partials


def angle(obs: Observation, coords: Coordinates, orientation: Mapping[int, float]) -> tuple[float, Partials]:
    """Clockwise angle at AT from BACK to FORE."""
    assert obs.at is not None
    fore, fore_partials = _azimuth_partials(coords, obs.at, obs.to, 1.0)
    back, back_partials = _azimuth_partials(coords, obs.at, obs.from_point, -1.0)
    return fore - back, fore_partials + back_partials


#: The observation equation for each kind.
EQUATIONS: dict[str, Callable[[Observation, Coordinates, Mapping[int, float]], tuple[float, Partials]]] = {
    "level": level,
    "distance": distance,
    "azimuth": azimuth,
    "direction": direction,
    "angle": angle,
}


def a_priori_sigma(obs: Observation, coords: Coordinates) -> float:
    """The a priori standard deviation of ``obs`` in SI units, centering included."""
    q = obs.sigma
    c = obs.centering
    if obs.kind == "level":
        return q.sigma_level(obs.length_km, obs.setups)
    if obs.kind == "distance":
        return math.sqrt(q.sigma_distance(obs.value) ** 2 + 2.0 * c * c)
    if obs.kind == "direction":
        if not c:
            return q.constant
        d = horizontal_distance(coords, obs.from_point, obs.to)
        return math.sqrt(q.constant**2 + 2.0 * c * c / (d * d))
    if obs.kind == "angle":
        if not c:
            return q.constant
        assert obs.at is not None
        d1 = horizontal_distance(coords, obs.at, obs.from_point)
        d2 = horizontal_distance(coords, obs.at, obs.to)
        d3 = horizontal_distance(coords, obs.from_point, obs.to)
        instrument = c * c * d3 * d3 / (d1 * d1 * d2 * d2)
        targets = c * c * (1.0 / (d1 * d1) + 1.0 / (d2 * d2))
        return math.sqrt(q.constant**2 + instrument + targets)
    return q.constant  # azimuth: no centering, by the contract
