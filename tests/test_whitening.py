"""Correlated observations: whitened rows give the full-weight-matrix least-squares solution.

Two small networks with correlated 3×3 blocks are adjusted by the engine (dense and
sparse algebra) and solved independently:

* by Gauss–Newton with the full weight matrix in numpy, x ← x + (AᵀPA)⁻¹AᵀP(l − f(x)),
  P = C⁻¹ of the whole covariance C, A a finite-difference Jacobian of a model written
  here (``scipy.optimize._numdiff.approx_derivative``);
* by ``scipy.optimize.least_squares`` on the whitened residual L⁻¹(l − f(x)), C = LLᵀ.

Coordinates and vᵀPv must agree to 1e-9 relative.  The redundancy numbers of all rows
must add up to n − u (tr R = n − u for any P; e.g. Ghilani, *Adjustment Computations*,
on redundancy numbers; recalled from memory).
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
from scipy.optimize import least_squares
from scipy.optimize._numdiff import approx_derivative

from server.engine import backends
from server.engine import gauss_newton as engine
from server.fieldbook.model import BaselineVector, Fieldbook, Observation
from server.fieldbook.parser import parse_fieldbook
from server.model.kinds import KINDS, Batch, Kind, Linearised, Positions
from server.model.network import Network, NetworkPoint, Parameter, build_network
from server.model.whitening import CorrelatedBlock
from server.units import Quantity

METHODS = [("dense", None), ("sparse", "superlu")] + (
    [("sparse", "cholmod")] if backends.cholmod_available() else []
)


# ------------------------------------------------------------------ a test-local vector kind


def _vector(batch: Batch, at: Positions) -> Linearised:
    """ΔE, ΔN, ΔH of TO − FROM: three rows per observation, unit partials."""
    m = batch.size
    value = np.stack(
        [
            at.east[batch.to] - at.east[batch.frm],
            at.north[batch.to] - at.north[batch.frm],
            at.height[batch.to] - at.height[batch.frm],
        ],
        axis=1,
    ).reshape(-1)
    partials = np.zeros((m, 3, 6))
    for c in range(3):
        partials[:, c, c] = 1.0
        partials[:, c, 3 + c] = -1.0
    return Linearised(value, partials.reshape(-1, 6))


def _vector_covariance(batch: Batch, at: Positions) -> np.ndarray:
    assert batch.covariance is not None
    return batch.covariance


VECTOR = Kind(
    "vector",
    (("to", "E"), ("to", "N"), ("to", "H"), ("from", "E"), ("from", "N"), ("from", "H")),
    False,
    _vector,
    lambda batch, at: np.sqrt(np.einsum("mii->mi", batch.covariance).reshape(-1)),
    components=3,
    covariance=_vector_covariance,
)


def _spd(rng: np.random.Generator, sd: float) -> np.ndarray:
    """A random 3×3 covariance with correlations up to about ±0.8."""
    root = rng.normal(size=(3, 3)) + 2.0 * np.eye(3)
    c = root @ root.T
    d = np.sqrt(np.diag(c))
    return sd * sd * c / np.outer(d, d)


def _reference(model, observed, covariance, x0):
    """Full-P Gauss–Newton and least_squares on the whitened residual; (x, x, vᵀPv)."""
    weight = np.linalg.inv(covariance)
    x = x0.copy()
    for _ in range(20):
        a = approx_derivative(model, x, method="3-point", abs_step=1e-4)
        step = np.linalg.solve(a.T @ weight @ a, a.T @ weight @ (observed - model(x)))
        x += step
        if np.abs(step).max() < 1e-12:
            break
    v = model(x) - observed
    lower = np.linalg.cholesky(covariance)

    def whitened(y):
        return scipy.linalg.solve_triangular(lower, observed - model(y), lower=True)

    fit = least_squares(whitened, x0, method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15)
    return x, fit.x, float(v @ weight @ v)


# ------------------------------------------------------------------ network 1: vector blocks

#: True positions (east, north, height) in metres; A and B are held, P, Q and R adjusted.
TRUTH = {
    "A": (1000.0, 2000.0, 50.0),
    "B": (1800.0, 2100.0, 62.0),
    "P": (1300.0, 2600.0, 55.0),
    "Q": (1700.0, 2700.0, 71.0),
    "R": (1500.0, 2300.0, 48.0),
}
FREE = ("P", "Q", "R")
VECTORS = [("A", "P"), ("B", "P"), ("P", "Q"), ("A", "Q"), ("Q", "R"), ("B", "R"), ("R", "P")]


def _vector_network(rng: np.random.Generator):
    """Vectors with 3×3 covariances, plus a level row and a distance row (diagonal)."""
    used, blocks, observed = [], [], []
    for line, (a, b) in enumerate(VECTORS, start=1):
        c = _spd(rng, 0.004)
        true = np.subtract(TRUTH[b], TRUTH[a])
        value = true + np.linalg.cholesky(c) @ rng.normal(size=3)
        vector = BaselineVector(tuple(value), (0.004,) * 3, covariance=tuple(map(tuple, c)))
        used.append(
            Observation(
                line,
                "vector",
                a,
                None,
                b,
                float(np.linalg.norm(value)),
                Quantity(0.004),
                baseline=vector,
            )
        )
        blocks.append(c)
        observed += list(value)
    level = TRUTH["Q"][2] - TRUTH["B"][2] + rng.normal(0, 0.002)
    used.append(Observation(20, "level", "B", None, "Q", level, Quantity(0.002)))
    distance = math.dist(TRUTH["P"][:2], TRUTH["R"][:2]) + rng.normal(0, 0.003)
    used.append(Observation(21, "distance", "P", None, "R", distance, Quantity(0.003)))
    observed += [level, distance]
    covariance = scipy.linalg.block_diag(*blocks, 0.002**2, 0.003**2)
    start = {
        n: np.add(TRUTH[n], rng.uniform(-0.3, 0.3, 3)) if n in FREE else TRUTH[n] for n in TRUTH
    }
    points = tuple(
        NetworkPoint(
            n,
            *map(float, start[n]),
            fixed="" if n in FREE else "enh",
            weighted="",
            sd_en=None,
            sd_h=None,
            line=None,
            in_use=True,
        )
        for n in TRUTH
    )
    parameters = tuple(Parameter(c, n) for n in FREE for c in "ENH")
    network = Network(Fieldbook(), 3, points, tuple(used), parameters, ())
    return network, np.array(observed), covariance, start


def _vector_model(x: np.ndarray) -> np.ndarray:
    """The same observations computed from x = (E, N, H) of P, Q, R, written out here."""
    xyz = dict(TRUTH)
    for k, n in enumerate(FREE):
        xyz[n] = tuple(x[3 * k : 3 * k + 3])
    out = [np.subtract(xyz[b], xyz[a]) for a, b in VECTORS]
    out.append([xyz["Q"][2] - xyz["B"][2]])
    out.append([math.hypot(xyz["R"][0] - xyz["P"][0], xyz["R"][1] - xyz["P"][1])])
    return np.concatenate(out)


def _check(solution, free, expected_x, lsq_x, expected_vpv, n_rows):
    per_point = len(expected_x) // len(free)  # E, N (and H)
    adjusted = np.array([solution.coordinates[n][c] for n in free for c in range(per_point)])
    np.testing.assert_allclose(adjusted, expected_x, rtol=1e-9)
    np.testing.assert_allclose(adjusted, lsq_x, rtol=1e-9)
    sigmas = np.asarray(solution.sigmas)
    vpv = float(np.sum((np.asarray(solution.residuals) / sigmas) ** 2))
    assert vpv == pytest.approx(expected_vpv, rel=1e-9)
    assert expected_vpv > 1.0  # the noise is real: a zero vᵀPv would prove nothing
    redundancy = 1.0 - np.asarray(solution.adjusted_cofactor) / sigmas**2
    assert redundancy.sum() == pytest.approx(n_rows - len(expected_x), rel=1e-9)


@pytest.mark.parametrize(("method", "backend"), METHODS)
def test_vector_blocks_give_the_full_weight_matrix_solution(method, backend):
    rng = np.random.default_rng(5)
    network, observed, covariance, start = _vector_network(rng)
    x0 = np.concatenate([start[n] for n in FREE])
    expected, fitted, vpv = _reference(_vector_model, observed, covariance, x0)
    kinds = {**KINDS, "vector": VECTOR}
    solution = engine.adjust(
        network, method=method, factorization=backend, kinds=kinds, tolerance=1e-10
    )
    _check(solution, FREE, expected, fitted, vpv, observed.size)
    # the observations' own residuals: adjusted − observed (computed before whitening)
    v = np.asarray(solution.adjusted)[: observed.size] - observed
    np.testing.assert_allclose(v, _vector_model(expected) - observed, atol=1e-9)


# ------------------------------------------------------------------ network 2: a given block

BOOK = """
defaults distance=3mm+2ppm azimuth=2sec
point A east=1000 north=1000 fix
point B east=1900 north=1150 fix
point P east=1200.4 north=1700.2
point Q east=1750.1 north=1600.3
point R east=1450.2 north=1350.1
"""
PAIRS = [
    ("A", "P"),
    ("A", "R"),
    ("B", "Q"),
    ("B", "R"),
    ("P", "Q"),
    ("P", "R"),
    ("Q", "R"),
    ("A", "Q"),
]
CORRELATED_ROWS = (1, 4, 6)  # three distances correlated (say, one EDM calibration)


def _true2d():
    return {
        "A": (1000.0, 1000.0),
        "B": (1900.0, 1150.0),
        "P": (1200.0, 1700.0),
        "Q": (1750.0, 1600.0),
        "R": (1450.0, 1350.0),
    }


def _covariance(network) -> np.ndarray:
    """σ = √(a² + (b·D·10⁻⁶)²) for a distance, a for an azimuth; three rows correlated."""
    sigmas = np.array(
        [
            o.sigma.constant
            if o.kind == "azimuth"
            else math.hypot(o.sigma.constant, o.sigma.ppm * 1e-6 * o.value)
            for o in network.used
        ]
    )
    covariance = np.diag(sigmas**2)
    rows = list(CORRELATED_ROWS)
    correlation = np.array([[1.0, 0.6, -0.3], [0.6, 1.0, 0.4], [-0.3, 0.4, 1.0]])
    covariance[np.ix_(rows, rows)] = correlation * np.outer(sigmas[rows], sigmas[rows])
    return covariance


def _book_network(rng: np.random.Generator):
    truth = _true2d()
    lines = [BOOK]
    values = []
    for a, b in PAIRS:
        d = math.dist(truth[a], truth[b])
        values.append(("distance", a, b, d))
    for a, b in (("A", "P"), ("B", "Q")):
        t = math.atan2(truth[b][0] - truth[a][0], truth[b][1] - truth[a][1]) % (2 * math.pi)
        values.append(("azimuth", a, b, t))
    network0 = build_network(
        parse_fieldbook(
            BOOK
            + "".join(
                f"{k} {a} {b} {v:.6f}\n"
                if k == "distance"
                else f"{k} {a} {b} {math.degrees(v):.9f}deg\n"
                for k, a, b, v in values
            )
        )
    )
    noise = np.linalg.cholesky(_covariance(network0)) @ rng.normal(size=len(values))
    noisy = [(k, a, b, v + e) for (k, a, b, v), e in zip(values, noise)]
    for k, a, b, v in noisy:
        lines.append(
            f"distance {a} {b} {v:.9f}\n"
            if k == "distance"
            else f"azimuth {a} {b} {math.degrees(v):.12f}deg\n"
        )
    network = build_network(parse_fieldbook("".join(lines)))
    observed = np.array([o.value for o in network.used])
    covariance = _covariance(network)  # σ of a distance depends on its (noisy) value
    rows = list(CORRELATED_ROWS)
    block = CorrelatedBlock(CORRELATED_ROWS, covariance[np.ix_(rows, rows)])
    return network, observed, covariance, block


def _book_model(x: np.ndarray, network) -> np.ndarray:
    xy = {"A": (1000.0, 1000.0), "B": (1900.0, 1150.0)}
    for k, n in enumerate(("P", "Q", "R")):
        xy[n] = (x[2 * k], x[2 * k + 1])
    out = []
    for o in network.used:
        (ea, na), (eb, nb) = xy[o.from_point], xy[o.to]
        if o.kind == "distance":
            out.append(math.hypot(eb - ea, nb - na))
        else:  # the observed azimuth's branch, so that l − f(x) is small
            t = math.atan2(eb - ea, nb - na)
            out.append(o.value + math.remainder(t - o.value, 2 * math.pi))
    return np.array(out)


@pytest.mark.parametrize(("method", "backend"), METHODS)
def test_a_given_block_gives_the_full_weight_matrix_solution(method, backend):
    rng = np.random.default_rng(11)
    network, observed, covariance, block = _book_network(rng)
    x0 = np.array([1200.4, 1700.2, 1750.1, 1600.3, 1450.2, 1350.1])
    expected, fitted, vpv = _reference(lambda x: _book_model(x, network), observed, covariance, x0)
    solution = engine.adjust(
        network, method=method, factorization=backend, correlated=[block], tolerance=1e-10
    )
    _check(solution, ("P", "Q", "R"), expected, fitted, vpv, observed.size)


def test_without_blocks_nothing_is_whitened():
    """An uncorrelated block (a diagonal covariance) gives the unblocked solution."""
    rng = np.random.default_rng(11)
    network, _, covariance, _ = _book_network(rng)
    rows = list(CORRELATED_ROWS)
    diagonal = CorrelatedBlock(CORRELATED_ROWS, np.diag(np.diag(covariance)[rows]))
    plain = engine.adjust(network, method="dense", tolerance=1e-10)
    blocked = engine.adjust(network, method="dense", correlated=[diagonal], tolerance=1e-10)
    for name in ("P", "Q", "R"):
        np.testing.assert_allclose(blocked.coordinates[name], plain.coordinates[name], rtol=1e-12)
    np.testing.assert_allclose(
        blocked.adjusted_cofactor / blocked.sigmas**2,
        plain.adjusted_cofactor / plain.sigmas**2,
        atol=1e-12,
    )


def test_a_bad_block_is_refused_with_its_number():
    network, _, _, _ = _book_network(np.random.default_rng(1))
    with pytest.raises(ValueError, match="block 1: the covariance is not positive definite"):
        engine.adjust(
            network, correlated=[CorrelatedBlock((0, 1), np.array([[1.0, 2.0], [2.0, 1.0]]))]
        )
    with pytest.raises(ValueError, match="block 2: needs k distinct rows"):
        engine.adjust(
            network,
            correlated=[CorrelatedBlock((0,), np.eye(1)), CorrelatedBlock((1, 1), np.eye(2))],
        )


def test_unwhitened_misclosures_are_the_observations_own():
    """L·(L⁻¹·l) gives back l = observed − computed for every row, whitened or not."""
    from server.engine.state import State

    network, observed, covariance, start = _vector_network(np.random.default_rng(2))
    state = State(
        network, {n: tuple(map(float, start[n])) for n in start}, {**KINDS, "vector": VECTOR}
    )
    evaluation = state.assembly(state.column).evaluate(*state.arrays())
    raw = observed - _vector_model(np.concatenate([start[n] for n in FREE]))
    whitened = scipy.linalg.solve_triangular(np.linalg.cholesky(covariance), raw, lower=True)
    blocks = 3 * len(VECTORS)  # the level and distance rows stay as they are, with their σ
    np.testing.assert_allclose(evaluation.misclosure[:blocks], whitened[:blocks], rtol=1e-9)
    np.testing.assert_allclose(evaluation.misclosure[blocks:], raw[blocks:], rtol=1e-12)
    assert np.all(evaluation.sigmas[:blocks] == 1.0) and np.all(evaluation.sigmas[blocks:] > 1e-3)
    np.testing.assert_allclose(evaluation.unwhiten(evaluation.misclosure), raw, atol=1e-12)
    np.testing.assert_allclose(evaluation.computed, observed - raw, atol=1e-9)
