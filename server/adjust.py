"""The adjustment engine: Gauss–Newton iterations on the observation equations.

Each iteration linearises every used observation about the current
coordinates (``observations.py``), adds weighted control as direct
observations of coordinate components, and solves the normal equations

    N·dx = Aᵀ·P·l,   N = Aᵀ·P·A,   l = observed − computed

by Cholesky factorisation.  The iterations stop when the largest coordinate
correction is below ``tolerance`` metres (and orientations below the same
figure divided by a kilometre, so 1e-7 m ↔ 1e-10 rad), or fail after
``max_iterations`` naming the points that still move most.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from .approximate import approximate_coordinates
from .errors import ConvergenceError, NetworkError
from .network import Network
from .observations import EQUATIONS, a_priori_sigma
from .units import wrap_pi

#: Engine status → message; ``converged = status > 0``.
STATUS_MESSAGES: dict[int, str] = {
    1: "converged: the largest correction fell below the tolerance",
    2: "nothing to estimate: every point is held fixed, observations checked only",
    0: "did not converge within the iteration limit",
}


@dataclass(frozen=True, slots=True)
class ControlRow:
    """Weighted control treated as a direct observation of one coordinate component."""

    point: str
    component: str  # "E", "N" or "H"
    given: float
    sigma: float


@dataclass(frozen=True)
class Solution:
    """Everything the statistics need; arrays are read-only.

    Rows of ``design``, ``sigmas`` and ``residuals`` are the used field
    observations in ``network.used`` order, followed by ``control`` rows.
    """

    network: Network
    coordinates: dict[str, tuple[float, float, float]]
    orientations: dict[int, float]
    control: tuple[ControlRow, ...]
    design: np.ndarray
    sigmas: np.ndarray
    residuals: np.ndarray
    adjusted: np.ndarray
    qxx: np.ndarray
    iterations: int
    status: int

    @property
    def converged(self) -> bool:
        """True when the iterations settled (or there was nothing to estimate)."""
        return self.status > 0

    @property
    def message(self) -> str:
        """The engine's status in words."""
        return STATUS_MESSAGES[self.status]


def adjust(network: Network, *, max_iterations: int = 25, tolerance: float = 1e-7) -> Solution:
    """Adjust ``network`` by weighted least squares.

    Parameters
    ----------
    network : Network
        The model from ``network.build_network``.
    max_iterations : int
        Gauss–Newton iterations allowed before giving up.
    tolerance : float
        Largest coordinate correction (metres) that counts as converged.

    Raises
    ------
    NetworkError
        The normal equations are singular (a datum defect); the message
        names the points whose position is not determined.
    ConvergenceError
        The corrections did not settle within ``max_iterations``.
    """
    if max_iterations < 1:
        raise ValueError("`max_iterations` must be at least 1")
    if not tolerance > 0:
        raise ValueError("`tolerance` must be positive")
    coords = approximate_coordinates(network)
    orientations = _approximate_orientations(network, coords)
    control = _control_rows(network)
    index = {(p.point if p.kind != "O" else p.round_line, p.kind): k for k, p in enumerate(network.parameters)}
    n_unknowns = len(network.parameters)

    status, iterations = 0, 0
    qxx = np.zeros((n_unknowns, n_unknowns))
    for iterations in range(1, max_iterations + 1):
        design, sigmas, misclosure, _ = _linearise(network, coords, orientations, control, index)
        if n_unknowns == 0:
            status = 2
            break
        weights = 1.0 / sigmas**2
        normal = design.T @ (design * weights[:, None])
        rhs = design.T @ (weights * misclosure)
        constraints = _inner_constraints(network, coords) if network.free_datum else None
        correction, qxx = _solve(network, normal, rhs, constraints)
        _apply(network, coords, orientations, correction)
        if _largest_move(network, correction) < tolerance:
            status = 1
            break
    if status == 0:
        raise ConvergenceError(_divergence_message(network, correction, max_iterations))

    design, sigmas, misclosure, computed = _linearise(network, coords, orientations, control, index)
    for array in (design, sigmas, computed, qxx):
        array.flags.writeable = False
    residuals = -misclosure  # v = computed − observed at the solution
    residuals.flags.writeable = False
    return Solution(
        network=network,
        coordinates=coords,
        orientations=orientations,
        control=control,
        design=design,
        sigmas=sigmas,
        residuals=residuals,
        adjusted=computed,
        qxx=qxx,
        iterations=iterations,
        status=status,
    )


def _control_rows(network: Network) -> tuple[ControlRow, ...]:
    rows: list[ControlRow] = []
    estimated = {(p.point, p.kind) for p in network.parameters}
    for p in network.points:
        if "en" in p.weighted and (p.name, "E") in estimated:
            assert p.east is not None and p.north is not None and p.sd_en is not None
            rows += [ControlRow(p.name, "E", p.east, p.sd_en), ControlRow(p.name, "N", p.north, p.sd_en)]
        if "h" in p.weighted and (p.name, "H") in estimated:
            assert p.height is not None and p.sd_h is not None
            rows.append(ControlRow(p.name, "H", p.height, p.sd_h))
    return tuple(rows)


_COMPONENT = {"E": 0, "N": 1, "H": 2}


def _linearise(
    network: Network,
    coords: dict[str, tuple[float, float, float]],
    orientations: dict[int, float],
    control: tuple[ControlRow, ...],
    index: dict[tuple[object, str], int],
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Design matrix, a priori σ, misclosures l = observed − computed, computed values."""
    n_rows = len(network.used) + len(control)
    design = np.zeros((n_rows, len(network.parameters)))
    sigmas = np.empty(n_rows)
    misclosure = np.empty(n_rows)
    computed = np.empty(n_rows)
    for row, obs in enumerate(network.used):
        value, partials = EQUATIONS[obs.kind](obs, coords, orientations)
        for unknown, coefficient in partials:
            column = index.get(unknown)
            if column is not None:
                design[row, column] += coefficient
        difference = obs.value - value
        if obs.kind != "level" and obs.kind != "distance":
            difference = wrap_pi(difference)
        misclosure[row] = difference
        computed[row] = obs.value - difference
        sigmas[row] = a_priori_sigma(obs, coords)
    for offset, c in enumerate(control):
        row = len(network.used) + offset
        design[row, index[(c.point, c.component)]] = 1.0
        value = coords[c.point][_COMPONENT[c.component]]
        misclosure[row] = c.given - value
        computed[row] = value
        sigmas[row] = c.sigma
    return design, sigmas, misclosure, computed


def _solve(
    network: Network, normal: np.ndarray, rhs: np.ndarray, constraints: np.ndarray | None
) -> tuple[np.ndarray, np.ndarray]:
    """Solve the normal equations; returns the correction and Qxx.

    With a datum set by control, N is symmetric positive definite and
    Cholesky is used.  A free network is solved with its inner constraints
    Gᵀ·dx = 0 by the bordered system [[N, G], [Gᵀ, 0]], whose inverse holds
    Qxx in its upper-left block.
    """
    if constraints is not None:
        return _solve_bordered(network, normal, rhs, constraints)
    try:
        factor = scipy.linalg.cho_factor(normal, lower=True, check_finite=False)
    except np.linalg.LinAlgError:
        raise NetworkError(*_singular_diagnosis(network, normal)) from None
    diagonal = np.diag(factor[0])
    # Cholesky of a numerically singular matrix may succeed with a vanishing pivot
    if diagonal.min() ** 2 <= 1e-12 * np.abs(np.diag(normal)).max():
        raise NetworkError(*_singular_diagnosis(network, normal))
    correction = scipy.linalg.cho_solve(factor, rhs, check_finite=False)
    qxx = scipy.linalg.cho_solve(factor, np.eye(len(rhs)), check_finite=False)
    return correction, qxx


def _solve_bordered(
    network: Network, normal: np.ndarray, rhs: np.ndarray, constraints: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:
    n, k = constraints.shape
    # scale G to N's magnitude so the bordered matrix stays well conditioned
    scale = math.sqrt(float(np.abs(np.diag(normal)).max()) or 1.0)
    g = constraints * scale
    bordered = np.block([[normal, g], [g.T, np.zeros((k, k))]])
    try:
        inverse = scipy.linalg.inv(bordered, check_finite=False)
    except (np.linalg.LinAlgError, ValueError):
        raise NetworkError(*_singular_diagnosis(network, normal + g @ g.T)) from None
    if not np.all(np.isfinite(inverse)) or np.linalg.cond(bordered) > 1e14:
        raise NetworkError(*_singular_diagnosis(network, normal + g @ g.T))
    qxx = inverse[:n, :n]
    qxx = 0.5 * (qxx + qxx.T)
    return qxx @ rhs, qxx


def _inner_constraints(network: Network, coords: dict[str, tuple[float, float, float]]) -> np.ndarray:
    """G for the free datum: translations in E and N, and rotation about the centroid."""
    columns = {"E": [], "N": []}  # parameter index lists
    for k, p in enumerate(network.parameters):
        if p.kind in columns:
            columns[p.kind].append(k)
    east = np.array([coords[network.parameters[k].point][0] for k in columns["E"]])
    north = np.array([coords[network.parameters[k].point][1] for k in columns["N"]])
    g = np.zeros((len(network.parameters), 3 if "rotation" in network.free_datum else 2))
    g[columns["E"], 0] = 1.0
    g[columns["N"], 1] = 1.0
    if "rotation" in network.free_datum:
        spread = max(float(np.max(np.hypot(east - east.mean(), north - north.mean()))), 1.0)
        g[columns["E"], 2] = (north - north.mean()) / spread
        g[columns["N"], 2] = -(east - east.mean()) / spread
    return g / np.linalg.norm(g, axis=0)


def _singular_diagnosis(network: Network, normal: np.ndarray) -> tuple[str, list[str]]:
    """Name the points that move freely in the null space of the normal matrix."""
    scale = np.sqrt(np.maximum(np.diag(normal), 1e-300))
    scaled = normal / np.outer(scale, scale)
    eigenvalues, vectors = np.linalg.eigh(scaled)
    null = vectors[:, eigenvalues < 1e-10 * max(eigenvalues.max(), 1.0)]
    free = np.abs(null).max(axis=1) > 1e-6 if null.size else np.zeros(len(normal), bool)
    names: list[str] = []
    for k in np.flatnonzero(free):
        p = network.parameters[k]
        label = p.point if p.kind != "O" else f"orientation of the round at {p.point}"
        if label and label not in names:
            names.append(label)
    shown = ", ".join(names[:12]) + (f" and {len(names) - 12} more" if len(names) > 12 else "")
    return (
        f"the observations do not determine these unknowns (a datum defect or too few "
        f"observations): {shown}",
        [n for n in names if not n.startswith("orientation")],
    )


def _apply(
    network: Network,
    coords: dict[str, tuple[float, float, float]],
    orientations: dict[int, float],
    correction: np.ndarray,
) -> None:
    for k, p in enumerate(network.parameters):
        if p.kind == "O":
            assert p.round_line is not None
            orientations[p.round_line] += correction[k]
            continue
        assert p.point is not None
        current = list(coords[p.point])
        current[_COMPONENT[p.kind]] += correction[k]
        coords[p.point] = (current[0], current[1], current[2])


def _largest_move(network: Network, correction: np.ndarray) -> float:
    """Largest correction in metres; orientations count at a 1 km lever arm."""
    moves = [abs(c) * (1000.0 if p.kind == "O" else 1.0) for p, c in zip(network.parameters, correction)]
    return max(moves, default=0.0)


def _divergence_message(network: Network, correction: np.ndarray, limit: int) -> str:
    moves: dict[str, float] = {}
    for p, c in zip(network.parameters, correction):
        if p.kind != "O" and p.point is not None:
            moves[p.point] = max(moves.get(p.point, 0.0), abs(float(c)))
    worst = sorted(moves, key=moves.__getitem__, reverse=True)[:5]
    listing = ", ".join(f"{name} ({moves[name]:.3g} m)" for name in worst)
    return (
        f"the adjustment did not converge in {limit} iterations; the points still moving "
        f"most are {listing}. Check their observations and approximate coordinates"
    )


def _approximate_orientations(network: Network, coords: dict[str, tuple[float, float, float]]) -> dict[int, float]:
    """Each round's orientation as the mean of (azimuth − direction) over its targets."""
    sums: dict[int, list[float]] = {}
    for obs in network.used:
        if obs.kind != "direction" or obs.round_line is None:
            continue
        east_i, north_i, _ = coords[obs.from_point]
        east_j, north_j, _ = coords[obs.to]
        if any(math.isnan(v) for v in (east_i, north_i, east_j, north_j)):
            continue
        offset = math.atan2(east_j - east_i, north_j - north_i) - obs.value
        sums.setdefault(obs.round_line, []).append(offset)
    orientations: dict[int, float] = {}
    for line, offsets in sums.items():
        # average on the circle: offsets near 0 and 2π must not cancel
        orientations[line] = math.atan2(
            sum(math.sin(o) for o in offsets), sum(math.cos(o) for o in offsets)
        )
    for p in network.parameters:
        if p.kind == "O" and p.round_line is not None:
            orientations.setdefault(p.round_line, 0.0)
    return orientations
