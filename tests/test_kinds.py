"""The kinds table: partial derivatives against finite differences, σ against closed forms.

The partials of every kind are compared with a numerical Jacobian of the kind's own
equation (``scipy.optimize._numdiff.approx_derivative``, central differences), on
random geometry with well-separated points, so a wrong sign, a swapped role or a
missing column fails.  The a priori σ of each kind is compared with its closed form
(error propagation of centering as in Ghilani, *Adjustment Computations*, 6th ed.,
chapter on weights of angles and distances; recalled from memory) and, for the
centering terms, with linear propagation of an isotropic centering error c at each
occupied mark through the finite-difference gradient: Σ_marks c²·|∂f/∂mark|².
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy.optimize._numdiff import approx_derivative

from server.fieldbook.model import ANGULAR_KINDS, HORIZONTAL_KINDS, Observation
from server.model.kinds import (
    KINDS,
    Batch,
    CoincidentPointsError,
    Kind,
    Positions,
    evaluate_one,
    sigma_one,
)
from server.units import Quantity, wrap_pi

N_POINTS, N_ROUNDS, M = 12, 3, 40
OFFSET = {"E": 0, "N": 1, "H": 2}


def _geometry(seed: int) -> Positions:
    """Points on a jittered 4 × 3 grid 200 m apart: every pair at least ~100 m apart."""
    rng = np.random.default_rng(seed)
    grid = np.array([(200.0 * i, 200.0 * j) for i in range(4) for j in range(3)])
    grid += rng.uniform(-50.0, 50.0, grid.shape)
    height = rng.uniform(10.0, 90.0, N_POINTS)
    orientation = rng.uniform(-math.pi, math.pi, N_ROUNDS)
    return Positions(grid[:, 0].copy(), grid[:, 1].copy(), height, orientation)


def _batch(kind: Kind, seed: int, centering: float = 0.0) -> Batch:
    rng = np.random.default_rng(seed)
    trios = np.array([rng.choice(N_POINTS, 3, replace=False) for _ in range(M)])
    frm, at, to = trios[:, 0], trios[:, 1] if kind.has_station else trios[:, 0], trios[:, 2]
    return Batch(
        frm=frm,
        at=at,
        to=to,
        rnd=rng.integers(0, N_ROUNDS, M) if kind.has_round else np.zeros(M, np.int64),
        value=rng.uniform(1.0, 500.0, M),
        constant=rng.uniform(1e-3, 3e-3, M),
        ppm=rng.uniform(0.0, 3.0, M),
        per_sqrtkm=rng.uniform(0.0, 2e-3, M),
        per_setup=rng.uniform(0.0, 5e-4, M),
        length_km=rng.uniform(0.1, 3.0, M),
        setups=rng.integers(1, 30, M).astype(float),
        centering=np.full(M, centering),
    )


def _vector(at: Positions) -> np.ndarray:
    return np.concatenate(
        [np.stack([at.east, at.north, at.height], axis=1).ravel(), at.orientation]
    )


def _positions(x: np.ndarray) -> Positions:
    xyz = x[: 3 * N_POINTS].reshape(-1, 3)
    return Positions(xyz[:, 0], xyz[:, 1], xyz[:, 2], x[3 * N_POINTS :])


def _analytic_jacobian(kind: Kind, batch: Batch, at: Positions) -> np.ndarray:
    """The kind's partials scattered into columns (point·3 + E/N/H, or rounds after)."""
    partials = kind.equation(batch, at).partials
    jacobian = np.zeros((batch.size, 3 * N_POINTS + N_ROUNDS))
    rows = np.arange(batch.size)
    for c, (role, unknown) in enumerate(kind.columns):
        index = batch.role(role)
        column = 3 * N_POINTS + index if unknown == "O" else 3 * index + OFFSET[unknown]
        np.add.at(jacobian, (rows, column), partials[:, c])
    return jacobian


def _numerical_jacobian(kind: Kind, batch: Batch, at: Positions) -> np.ndarray:
    x0 = _vector(at)
    f0 = kind.equation(batch, at).value

    def f(x: np.ndarray) -> np.ndarray:
        change = kind.equation(batch, _positions(x)).value - f0
        # an azimuth may step across ±π between the two evaluations
        return f0 + (np.vectorize(wrap_pi)(change) if kind.angular else change)

    return approx_derivative(f, x0, method="3-point", abs_step=1e-4)


def test_the_table_covers_the_adjusted_kinds_with_their_angular_flag():
    assert set(KINDS) == HORIZONTAL_KINDS | {"level"}
    for kind in KINDS.values():
        assert kind.angular == (kind.name in ANGULAR_KINDS)
        assert kind.components == 1
        assert {role for role, _ in kind.columns} <= {"from", "at", "to", "round"}


@pytest.mark.parametrize("name", sorted(KINDS))
@pytest.mark.parametrize("seed", [1, 2, 3])
def test_partials_equal_finite_differences(name, seed):
    kind = KINDS[name]
    at = _geometry(seed)
    batch = _batch(kind, seed + 100)
    analytic = _analytic_jacobian(kind, batch, at)
    numerical = _numerical_jacobian(kind, batch, at)
    assert np.abs(analytic).max() > 0.0
    # central differences with a 0.1 mm step: truncation ~ h²·f‴ ≪ 1e-7 of the partials
    scale = np.abs(analytic).max(axis=1, keepdims=True)
    np.testing.assert_allclose(analytic / scale, numerical / scale, rtol=0, atol=1e-7)


def _distances(batch: Batch, at: Positions) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """D₁ = AT–BACK (FROM), D₂ = AT–TO, D₃ = FROM–TO, computed with math.hypot row by row."""

    def d(i: np.ndarray, j: np.ndarray) -> np.ndarray:
        return np.array(
            [math.hypot(at.east[b] - at.east[a], at.north[b] - at.north[a]) for a, b in zip(i, j)]
        )

    return d(batch.at, batch.frm), d(batch.at, batch.to), d(batch.frm, batch.to)


def _closed_form(name: str, batch: Batch, at: Positions) -> np.ndarray:
    """Ghilani, Adjustment Computations (6th ed.), weights of angles and distances, and the
    usual leveling model σ² = c² + k²·L + s²·K; all recalled from memory."""
    c = batch.centering
    d1, d2, d3 = _distances(batch, at)
    if name == "distance":  # a + b ppm in quadrature, instrument and target centering
        variance = batch.constant**2 + (batch.ppm * 1e-6 * batch.value) ** 2 + 2 * c**2
    elif name == "direction":  # c/D at either end of the line
        variance = batch.constant**2 + 2 * c**2 / d2**2
    elif name == "angle":  # instrument c·D₃/(D₁·D₂), targets c/D₁ and c/D₂
        variance = (
            batch.constant**2 + c**2 * d3**2 / (d1**2 * d2**2) + c**2 * (1 / d1**2 + 1 / d2**2)
        )
    elif name == "level":
        variance = (
            batch.constant**2
            + batch.per_sqrtkm**2 * batch.length_km
            + batch.per_setup**2 * batch.setups
        )
    else:  # azimuth: its own σ, no centering
        variance = batch.constant**2
    return np.sqrt(variance)


@pytest.mark.parametrize("name", sorted(KINDS))
@pytest.mark.parametrize("centering", [0.0, 0.0015])
def test_sigma_equals_the_closed_form(name, centering):
    kind = KINDS[name]
    at = _geometry(7)
    batch = _batch(kind, 8, centering)
    np.testing.assert_allclose(kind.sigma(batch, at), _closed_form(name, batch, at), rtol=1e-12)


@pytest.mark.parametrize("name", ["distance", "direction", "angle"])
def test_centering_terms_equal_propagation_through_the_numerical_gradient(name):
    """σ² − σ_instrument² = Σ over the occupied and sighted marks of c²·|∂f/∂(E, N)|²."""
    kind = KINDS[name]
    at = _geometry(11)
    c = 0.002
    with_centering = _batch(kind, 12, c)
    without = _batch(kind, 12, 0.0)
    numerical = _numerical_jacobian(kind, with_centering, at)
    horizontal = numerical[:, : 3 * N_POINTS].reshape(M, N_POINTS, 3)[:, :, :2]
    propagated = c**2 * (horizontal**2).sum(axis=(1, 2))
    difference = kind.sigma(with_centering, at) ** 2 - kind.sigma(without, at) ** 2
    np.testing.assert_allclose(difference, propagated, rtol=1e-6)


def _observation(kind: str, at: str | None = None, **extra: object) -> Observation:
    return Observation(
        line=3,
        kind=kind,
        from_point="A",
        at=at,
        to="B" if kind != "angle" else "C",
        value=1.0,
        sigma=Quantity(constant=0.002, ppm=2.0),
        centering=0.001,
        **extra,
    )  # type: ignore[arg-type]


def test_one_observation_is_a_batch_of_one_row():
    coords = {"A": (100.0, 200.0, 5.0), "B": (400.0, 600.0, 7.0), "C": (-50.0, 350.0, 1.0)}
    angle = _observation("angle", at="B")
    one = evaluate_one(angle, coords, {})
    # B's azimuths: to C minus to A (clockwise angle BACK→FORE at B)
    to_c = math.atan2(-50.0 - 400.0, 350.0 - 600.0)
    to_a = math.atan2(100.0 - 400.0, 200.0 - 600.0)
    assert one.value[0] == pytest.approx(to_c - to_a, abs=1e-15)
    direction = _observation("direction", at="A", round_line=2)
    assert evaluate_one(direction, coords, {2: 0.25}).value[0] == pytest.approx(
        math.atan2(300.0, 400.0) - 0.25, abs=1e-15
    )
    distance = _observation("distance")
    assert evaluate_one(distance, coords, {}).value[0] == 500.0  # a 3-4-5 triangle
    assert sigma_one(distance, coords) == pytest.approx(
        math.sqrt(0.002**2 + (2e-6 * 1.0) ** 2 + 2 * 0.001**2), rel=1e-15
    )


def test_one_observation_without_positions_is_refused_not_divided_by_zero():
    coords = {"A": (1.0, 2.0, 0.0), "B": (1.0, 2.0, 0.0)}
    with pytest.raises(CoincidentPointsError):
        evaluate_one(_observation("azimuth"), coords, {})
    with pytest.raises(KeyError):
        evaluate_one(_observation("distance"), {"A": (0.0, 0.0, 0.0)}, {})
    # σ of a direction across coincident points is not finite: the caller falls back
    assert not math.isfinite(sigma_one(_observation("direction", at="A"), coords))
