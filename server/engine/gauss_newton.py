"""The adjustment engine: Gauss–Newton iterations on the observation equations.

Each iteration linearises every used observation about the current
coordinates (``model/kinds.py`` defines each kind, ``model/assembly.py``
lays out the rows and whitens correlated blocks), adds weighted control as
direct observations of coordinate components, and solves the normal
equations

    N·dx = Aᵀ·P·l,   N = Aᵀ·P·A,   l = observed − computed

by a Cholesky-type factorization.  The iterations stop when the largest
coordinate correction is below ``tolerance`` metres (and orientations below
the same figure divided by a kilometre, so 1e-7 m ↔ 1e-10 rad), or fail
after ``max_iterations`` naming the points that still move most.

One engine, three factorization back ends (``backends.py``): dense LAPACK
for small networks (at most ``DENSE_LIMIT`` unknowns), CHOLMOD or SuperLU on
N's sparse pattern for the rest (``normals.py`` forms N for each).  A free
network is always solved with a minimal datum and carried to the inner
constraints by the S-transformation (``datum.py``); a singular N is
explained by ``diagnosis.py``.

The statistics need only a few elements of Qxx: those of each row's
unknowns (for a_i·Qxx·a_iᵀ), of each point's coordinates, and of joined
pairs.  ``Solution.covariance_block`` serves them.
"""

from __future__ import annotations

import contextlib
import sys
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np

from server.engine.backends import (
    DenseCofactor,
    Factorization,
    SingularMatrixError,
    choose_backend,
    make_factorization,
)
from server.engine.datum import (
    FreeDatumCofactor,
    datum_directions,
    inner_constraints,
    minimal_datum,
    s_transform,
)
from server.engine.diagnosis import diagnose
from server.engine.normals import NormalEquations
from server.engine.state import ControlRow, State
from server.errors import ConvergenceError, NetworkError
from server.model.assembly import Assembly, Evaluation
from server.model.kinds import KINDS, Kind
from server.model.network import Network
from server.model.start_values import start_coordinates
from server.model.whitening import CorrelatedBlock

#: Engine status → message; ``converged = status > 0``.
STATUS_MESSAGES: dict[int, str] = {
    1: "converged: the largest correction fell below the tolerance",
    2: "nothing to estimate: every point is held fixed, observations checked only",
    0: "did not converge within the iteration limit",
    3: "design: one linearisation at the approximate coordinates, no observed values",
}
#: Networks with at most this many unknowns use the dense back end (measured crossover,
#: see DEVELOPERS.md "Benchmark"); larger ones a sparse one.
DENSE_LIMIT = 60
#: A correction this large (metres, or radians) means a negligible pivot, or start values
#: far off; a sparse back end then examines its factor's pivots.
IMPLAUSIBLE_CORRECTION = 1e4
#: Columns of the identity per solve in ``HatProduct.inverse``: 64 columns of solutions
#: stay in cache (measured 32-128 alike on the typical book; all 574 at once 20 % slower).
INVERSE_BLOCK = 64

#: ``progress(stage, step)``: stage is "start values", "iteration" (step = 1, 2, …)
#: or "statistics"; the pipeline adds "parse", "network" and "result".
ProgressCallback = Callable[[str, int], None]

__all__ = ["ControlRow", "DenseCofactor", "HatProduct", "Solution", "adjust"]


@dataclass(frozen=True)
class Solution:
    """Everything the statistics need; arrays are read-only.

    Rows of ``sigmas``, ``residuals``, ``adjusted`` and
    ``adjusted_cofactor`` are the used field observations in
    ``network.used`` order (``components`` rows each), followed by
    ``control`` rows.  Unknowns are numbered as ``network.parameters``.
    Rows of correlated blocks are whitened (``model/whitening.py``): their
    residuals, σ (= 1) and cofactors are the decorrelated observations', so
    Σ(v/σ)² is vᵀPv and r = 1 − cofactor/σ² sum to the redundancy; ``adjusted``
    is always the observations' own computed values.
    """

    network: Network
    coordinates: dict[str, tuple[float, float, float]]
    orientations: dict[int, float]
    control: tuple[ControlRow, ...]
    sigmas: np.ndarray
    residuals: np.ndarray
    adjusted: np.ndarray
    #: (A·Qxx·Aᵀ)_ii: cofactor of each adjusted observation; r_i = 1 − it/σ_i²
    adjusted_cofactor: np.ndarray
    iterations: int
    status: int
    cofactor: object  # DenseCofactor or backends.Cofactor (or FreeDatumCofactor)
    method: str = "dense"  # "dense", "cholmod" or "superlu"
    #: hat(B) = A·Qxx·Aᵀ·B for a block B of rows × k (``separability.py``); None if not kept
    hat: HatProduct | None = None
    #: geodetic model: Earth-centred X, Y, Z of each point (``coordinates`` then hold grid
    #: east, north in metres and orthometric heights); None in the plane model
    positions: dict[str, tuple[float, float, float]] | None = None

    @property
    def converged(self) -> bool:
        """True when the iterations settled (or there was nothing to estimate)."""
        return self.status > 0

    @property
    def message(self) -> str:
        """The engine's status in words."""
        return STATUS_MESSAGES[self.status]

    def covariance_entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        """Qxx[rows[p], cols[p]]: the a priori covariance (σ₀ = 1) of pairs of unknowns."""
        rows = np.asarray(rows, dtype=np.int64)
        if rows.size == 0:
            return np.zeros(0)
        return self.cofactor.entries(rows, cols)  # type: ignore[attr-defined]

    def covariance_block(self, indices: list[int] | np.ndarray) -> np.ndarray:
        """Qxx[indices][:, indices], the a priori covariance (σ₀ = 1) of a few unknowns."""
        index = np.asarray(indices, dtype=np.int64)
        k = index.size
        rows = np.repeat(index, k)
        cols = np.tile(index, k)
        return self.covariance_entries(rows, cols).reshape(k, k)


def adjust(
    network: Network,
    *,
    max_iterations: int = 25,
    tolerance: float = 1e-7,
    method: str = "auto",
    factorization: str | None = None,
    progress: ProgressCallback | None = None,
    kinds: Mapping[str, Kind] = KINDS,
    correlated: Sequence[CorrelatedBlock] = (),
) -> Solution:
    """Adjust ``network`` by weighted least squares.

    Parameters
    ----------
    network : Network
        The model from ``network.build_network``.
    max_iterations : int
        Gauss–Newton iterations allowed before giving up.
    tolerance : float
        Largest coordinate correction (metres) that counts as converged.
    method : {"auto", "dense", "sparse"}
        The algebra; "auto" takes the dense back end for small networks.
        All back ends give the same results.
    factorization : {None, "cholmod", "superlu"}
        The sparse back end; None takes ``$STATIONFIT_FACTORIZATION``, else
        CHOLMOD when installed, else SuperLU.
    progress : callable, optional
        Called as ``progress(stage, step)`` at each stage and iteration.
    kinds : mapping
        The observation kinds (``model.kinds.KINDS``).
    correlated : sequence of CorrelatedBlock
        Rows of ``network.used`` with a full covariance; they are whitened, and
        the ``Solution`` holds their whitened residuals, σ = 1 and cofactors (the
        statistics of the decorrelated observations, see ``model/whitening.py``).

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
    if method not in ("auto", "dense", "sparse"):
        raise ValueError("`method` must be 'auto', 'dense' or 'sparse'")
    report = progress or _quiet
    report("start values", 0)
    state: State
    if network.geodetic is not None:
        from server.engine.geodetic_state import GeodeticState  # it builds on State

        state = GeodeticState(network, correlated)
    else:
        state = State(network, start_coordinates(network), kinds, correlated)
    n_unknowns = len(network.parameters)
    if method == "auto" or n_unknowns == 0:
        method = "dense" if n_unknowns <= DENSE_LIMIT else "sparse"
    backend = "dense" if method == "dense" else choose_backend(factorization)
    engine = _Engine(network, state, make_factorization(backend))
    with _one_blas_thread():
        return _iterate(network, state, engine, max_iterations, tolerance, report)


def _iterate(
    network: Network,
    state: State,
    engine: _Engine,
    max_iterations: int,
    tolerance: float,
    report: ProgressCallback,
) -> Solution:
    n_unknowns = len(network.parameters)
    status, iterations = 0, 0
    correction = np.zeros(n_unknowns)
    evaluation = None
    for iterations in range(1, max_iterations + 1):
        report("iteration", iterations)
        evaluation = engine.assembly.evaluate(*state.arrays())
        if n_unknowns == 0:
            status = 2
            break
        correction = engine.step(evaluation)
        state.apply(correction)
        if state.largest_move(correction) < tolerance:
            status = 1
            break
    if status == 0:
        raise ConvergenceError(_divergence_message(network, correction, max_iterations))

    report("statistics", 0)
    if status == 1:
        evaluation = engine.assembly.evaluate(*state.arrays())
    assert evaluation is not None
    cofactor, explained = engine.statistics(evaluation)
    residuals = -evaluation.misclosure  # v = computed − observed at the solution
    for array in (evaluation.sigmas, evaluation.computed, residuals, explained):
        array.flags.writeable = False
    return Solution(
        network=network,
        coordinates=state.coordinates(),
        orientations=state.orientation_dict(),
        control=state.control_rows,
        sigmas=evaluation.sigmas,
        residuals=residuals,
        adjusted=evaluation.computed,
        adjusted_cofactor=explained,
        iterations=iterations,
        status=status,
        cofactor=cofactor,
        method=engine.name,
        hat=engine.hat(evaluation) if n_unknowns else None,
        positions=state.positions(),
    )


def _quiet(stage: str, step: int) -> None:
    del stage, step


_controller: list[object] = []  # (ThreadpoolController, module count when made)


def _one_blas_thread() -> Any:
    """A context that runs BLAS on one thread (measured faster here; see DEVELOPERS.md).

    The controller lists the BLAS libraries loaded when it is made; it is
    made again when more modules (such as CHOLMOD's) have been imported.
    """
    try:
        from threadpoolctl import ThreadpoolController
    except ImportError:  # optional: without it BLAS keeps its own setting
        return contextlib.nullcontext()
    if not _controller or _controller[1] != len(sys.modules):
        _controller[:] = [ThreadpoolController(), len(sys.modules)]
    return _controller[0].limit(limits=1, user_api="blas")  # type: ignore[attr-defined]


class _Engine:
    """Gauss–Newton steps and statistics over one factorization back end.

    The factor's unknowns are all of the network's, less a minimal datum in a
    free network (``datum.py``); ``factor_column`` maps an unknown to its
    column of the factor (−1: held for the datum).
    """

    def __init__(self, network: Network, state: State, factorization: Factorization) -> None:
        self.network = network
        self.state = state
        self.factorization = factorization
        self.name = factorization.name
        self.n = len(network.parameters)
        removed = minimal_datum(state) if network.free_datum else np.zeros(0, np.int64)
        keep = np.ones(self.n, bool)
        keep[removed] = False
        self.kept = np.flatnonzero(keep)
        self.factor_column = np.full(self.n, -1, np.int64)
        self.factor_column[self.kept] = np.arange(self.kept.size)
        columns = state.column  # every unknown is a column of the factor, unless ...
        if removed.size:  # ... a minimal datum is held: the others renumbered
            columns = {
                c: np.where(a >= 0, self.factor_column[np.maximum(a, 0)], -1)
                for c, a in state.column.items()
            }
        self.assembly: Assembly = state.assembly(columns)
        self.normals = NormalEquations(self.kept.size, self.assembly, factorization.dense)
        self._datum: tuple[np.ndarray, np.ndarray] | None = None

    def step(self, evaluation: Evaluation) -> np.ndarray:
        """The correction dx of all unknowns (S-transformed in a free network)."""
        matrix, rhs = self.normals.form(evaluation)
        try:
            self.factorization.factorize(matrix, check=False)
            solved = self.factorization.solve(rhs)
            # a negligible pivot shows as an absurd correction; only then are the pivots
            # examined, which costs a sparse back end a factor conversion
            if not np.all(np.abs(solved) < IMPLAUSIBLE_CORRECTION):
                self.factorization.check()
        except SingularMatrixError:
            raise NetworkError(*diagnose(self.network, matrix, self.kept)) from None
        correction = np.zeros(self.n)
        correction[self.kept] = solved
        if self.network.free_datum:
            g = inner_constraints(self.state)
            h = datum_directions(self.state, g)
            self._datum = (g, h)
            correction = s_transform(correction, g, h)
        return correction

    def statistics(self, evaluation: Evaluation) -> tuple[object, np.ndarray]:
        """Qxx (as an object serving its elements) and a_i·Qxx·a_iᵀ of every row."""
        if self.kept.size == 0:  # nothing estimated: observations checked only
            return DenseCofactor(np.zeros((0, 0))), np.zeros(self.assembly.n_rows)
        try:
            cofactor = self.factorization.cofactor(self.kept.size)
        except SingularMatrixError:
            matrix, _ = self.normals.form(evaluation)
            raise NetworkError(*diagnose(self.network, matrix, self.kept)) from None
        # in a free network A·H = 0, so the minimal-datum Qxx gives the same a·Qxx·aᵀ
        explained = self.normals.row_quadratic(evaluation, cofactor)
        if self._datum is None:
            return cofactor, explained
        g, h = self._datum
        free = FreeDatumCofactor(cofactor, self.factorization, self.factor_column, g, h)
        return free, explained

    def hat(self, evaluation: Evaluation) -> HatProduct:
        """B ↦ A·N⁻¹·Aᵀ·B with the last factor.  In a free network the minimal-datum factor
        gives the same product as the inner-constraint Qxx (A·H = 0)."""
        return HatProduct(self.normals.design(evaluation), self.factorization.solve, self.kept.size)


class HatProduct:
    """``hat(B) = A·N⁻¹·Aᵀ·B`` with the adjustment's last factor (``separability.py``).

    Besides the product of a dense block, its two halves for unit columns: ``solve_rows``
    gives N⁻¹·Aᵀ·B for B = scale·e_rows straight from those rows of A (no rows × k block
    of zeros to multiply), and ``design`` is A (CSR), so ``design[rows] @ solved`` gives any
    rows of the product.  They are the same operations in the same order as ``hat``'s, so
    the same numbers to the last bit.  The solves run on one BLAS/OpenMP thread.
    """

    def __init__(self, design: Any, solve: Callable[[np.ndarray], np.ndarray], n: int) -> None:
        self.design = design
        self._solve = solve
        self._n = n

    def __call__(self, block: np.ndarray) -> np.ndarray:
        if self._n == 0:
            return np.zeros_like(block)
        with _one_blas_thread():
            return self.design @ self._solve(np.ascontiguousarray(self.design.T @ block))

    def inverse(self) -> np.ndarray:
        """N⁻¹ in full (u × u, C order): for small networks, where one solve of the identity
        is cheaper than a solve for every observation.  The identity is solved
        ``INVERSE_BLOCK`` columns at a time, so each block of solutions stays in cache
        (574 unknowns: 4.8 ms against 5.7 for all columns in one solve, the same numbers)."""
        n = self._n
        inverse = np.empty((n, n))  # C order: what the sparse products with it read
        with _one_blas_thread():
            for start in range(0, n, INVERSE_BLOCK):
                end = min(n, start + INVERSE_BLOCK)
                unit = np.zeros((n, end - start), order="F")
                unit[np.arange(start, end), np.arange(end - start)] = 1.0
                inverse[:, start:end] = self._solve(unit)
        return inverse

    def solve_rows(self, rows: np.ndarray, scale: np.ndarray) -> np.ndarray:
        """N⁻¹·Aᵀ·B, B the n × k block with B[rows[c], c] = scale[c] and zeros elsewhere."""
        rows = np.asarray(rows, dtype=np.int64)
        if self._n == 0:
            return np.zeros((0, rows.size))
        picked = self.design[rows]
        # Aᵀ·B column c is row rows[c] of A times scale[c]: the products the dense
        # Aᵀ·B forms (every other term is an exact zero), summed in the same order
        picked.data = picked.data * np.repeat(scale, np.diff(picked.indptr))
        rhs = picked.T.toarray(order="F")  # column order: the solver copies any other
        with _one_blas_thread():
            return self._solve(rhs)


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
