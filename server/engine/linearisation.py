"""One linearisation at given coordinates, with no values: the engine's part of a design.

A planned network has standard deviations but no observed values, so there is nothing to
iterate on.  Its precision and reliability depend only on A and P, and A needs only
positions: the approximate coordinates the surveyor gives.  This module evaluates the
assembly once there, forms and factorizes N = AᵀPA with the adjustment's own back ends (the
free network's datum and S-transformation included) and returns the same ``Solution`` the
statistics read, with every residual zero (no misclosure exists).  ``shifts`` then gives,
for chosen rows, the change of the unknowns that a unit error in that row alone causes.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from server.engine.backends import choose_backend, make_factorization
from server.engine.datum import s_transform
from server.engine.gauss_newton import DENSE_LIMIT, Solution, _Engine, _one_blas_thread
from server.engine.state import State
from server.model.assembly import Evaluation
from server.model.network import Network

#: ``Solution.status`` of a design: one linearisation, no values, no iterations.
DESIGN_STATUS = 3


@dataclass(frozen=True)
class Linearisation:
    """The design's ``Solution`` and a way to carry a row's error into the unknowns."""

    solution: Solution
    #: rows ↦ (unknowns × rows): dx caused by +1 (SI) in each row alone, others error-free
    shifts: Callable[[np.ndarray], np.ndarray]


def linearise_once(
    network: Network, state: State, *, method: str = "auto", factorization: str | None = None
) -> Linearisation:
    """Evaluate A at ``state`` once and factorize N; no misclosure enters anywhere.

    Raises ``NetworkError`` (naming the points) when N is singular, as the adjustment does.
    """
    n_unknowns = len(network.parameters)
    if method == "auto" or n_unknowns == 0:
        method = "dense" if n_unknowns <= DENSE_LIMIT else "sparse"
    backend = "dense" if method == "dense" else choose_backend(factorization)
    engine = _Engine(network, state, make_factorization(backend))
    with _one_blas_thread():
        evaluation = engine.assembly.evaluate(*state.arrays())
        # no values: l = 0, so the step solves N·dx = 0 (it factorizes N and, in a free
        # network, sets up the S-transformation)
        evaluation.misclosure = np.zeros_like(evaluation.misclosure)
        if n_unknowns:
            engine.step(evaluation)
        cofactor, explained = engine.statistics(evaluation)
        hat = engine.hat(evaluation) if n_unknowns else None
    residuals = np.zeros(engine.assembly.n_rows)
    for array in (evaluation.sigmas, evaluation.computed, residuals, explained):
        array.flags.writeable = False
    solution = Solution(
        network=network,
        coordinates=state.coordinates(),
        orientations=state.orientation_dict(),
        control=state.control_rows,
        sigmas=evaluation.sigmas,
        residuals=residuals,
        adjusted=evaluation.computed,
        adjusted_cofactor=explained,
        iterations=0,
        status=DESIGN_STATUS,
        cofactor=cofactor,
        method=engine.name,
        hat=hat,
        positions=state.positions(),
    )
    return Linearisation(solution, _shift_operator(engine, evaluation))


def _shift_operator(engine: _Engine, evaluation: Evaluation) -> Callable[[np.ndarray], np.ndarray]:
    """rows ↦ Qxx·Aᵀ·P·E_rows: dx for a unit error in each row (S-transformed if free)."""
    design = engine.normals.design(evaluation).tocsc()
    weights = evaluation.weights
    solve = engine.factorization.solve
    n, kept = engine.n, engine.kept

    def shifts(rows: np.ndarray) -> np.ndarray:
        rows = np.asarray(rows, dtype=np.int64)
        out = np.zeros((n, rows.size))
        if kept.size == 0 or rows.size == 0:
            return out
        # Aᵀ·P·e_r is row r of A (transposed) times its weight
        rhs = design[rows, :].T.toarray() * weights[rows][None, :]
        with _one_blas_thread():
            out[kept, :] = np.asarray(solve(np.ascontiguousarray(rhs))).reshape(kept.size, -1)
        if engine._datum is not None:
            g, h = engine._datum
            out = s_transform(out, g, h)
        return out

    return shifts
