"""The adjustment engine: Gauss–Newton iterations on the observation equations.

Each iteration linearises every used observation about the current
coordinates (``kinds.py`` defines each kind, ``assembly.py`` lays out the
rows), adds weighted control as direct observations of
coordinate components, and solves the normal equations

    N·dx = Aᵀ·P·l,   N = Aᵀ·P·A,   l = observed − computed

by Cholesky factorisation.  The iterations stop when the largest coordinate
correction is below ``tolerance`` metres (and orientations below the same
figure divided by a kilometre, so 1e-7 m ↔ 1e-10 rad), or fail after
``max_iterations`` naming the points that still move most.

Two algebra paths give the same numbers:

* dense, for small networks (at most ``DENSE_LIMIT`` unknowns): N as a full
  array, Cholesky, and Qxx = N⁻¹ in full; a free network by the bordered
  inner-constraint system;
* sparse, for everything else (``sparse.py``): N on a fixed pattern, one
  fill-reducing ordering, a sparse Cholesky factor (CHOLMOD or SuperLU), and
  the elements of Qxx on the factor's pattern by a selected inverse.  A free
  network is solved with a minimal datum (one point's E and N held, and one
  more component for rotation) and carried to the inner constraints by the
  S-transformation  dx = S·dx_min,  Qxx = S·Q_min·Sᵀ,  S = I − H·(GᵀH)⁻¹·Gᵀ,
  with H the datum directions (N·H = 0) and G the inner constraints.

Either way the statistics need only a few elements of Qxx: those of each
row's unknowns (for a_i·Qxx·a_iᵀ), of each point's coordinates, and of
joined pairs.  ``Solution.covariance_block`` serves them.
"""

from __future__ import annotations

import contextlib
import math
import sys
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import scipy.linalg

from server.model.start_values import approximate_coordinates
from server.model.assembly import Assembly, ControlEquation
from server.model.kinds import KINDS, Kind
from server.model.whitening import CorrelatedBlock
from server.errors import ConvergenceError, NetworkError
from server.model.network import Network

#: Engine status → message; ``converged = status > 0``.
STATUS_MESSAGES: dict[int, str] = {
    1: "converged: the largest correction fell below the tolerance",
    2: "nothing to estimate: every point is held fixed, observations checked only",
    0: "did not converge within the iteration limit",
}
#: Networks with at most this many unknowns use the dense path (measured crossover,
#: see DEVELOPERS.md "Benchmark"); larger ones the sparse path.
DENSE_LIMIT = 60
#: A correction this large (metres, or radians) means a negligible pivot, or start values
#: far off; the sparse path then examines its factor's pivots.
IMPLAUSIBLE_CORRECTION = 1e4
#: Above this many unknowns a singular N is diagnosed without a dense eigendecomposition.
DENSE_DIAGNOSIS_LIMIT = 3000

#: ``progress(stage, step)``: stage is "start values", "iteration" (step = 1, 2, …)
#: or "statistics"; the pipeline adds "parse", "network" and "result".
ProgressCallback = Callable[[str, int], None]

_COMPONENT = {"E": 0, "N": 1, "H": 2}


@dataclass(frozen=True, slots=True)
class ControlRow:
    """Weighted control treated as a direct observation of one coordinate component."""

    point: str
    component: str  # "E", "N" or "H"
    given: float
    sigma: float


class DenseCofactor:
    """Qxx held in full (small networks)."""

    def __init__(self, qxx: np.ndarray) -> None:
        self.qxx = qxx

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        return self.qxx[np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)]


@dataclass(frozen=True)
class Solution:
    """Everything the statistics need; arrays are read-only.

    Rows of ``sigmas``, ``residuals``, ``adjusted`` and
    ``adjusted_cofactor`` are the used field observations in
    ``network.used`` order, followed by ``control`` rows.  Unknowns are
    numbered as ``network.parameters``.
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
    cofactor: object  # DenseCofactor or sparse.Cofactor (or its free-datum form)
    method: str = "dense"  # "dense", "cholmod" or "superlu"
    #: hat(B) = A·Qxx·Aᵀ·B for a block B of rows × k (``separability.py``); None if not kept
    hat: Callable[[np.ndarray], np.ndarray] | None = None
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
        The algebra; "auto" takes dense for small networks.  Both give the
        same results.
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
    state: _State
    if network.geodetic is not None:
        from server.engine.geodetic_state import GeodeticState  # it builds on _State

        state = GeodeticState(network, correlated)
    else:
        state = _State(network, approximate_coordinates(network), kinds, correlated)
    n_unknowns = len(network.parameters)
    if method == "auto" or n_unknowns == 0:
        method = "dense" if n_unknowns <= DENSE_LIMIT else "sparse"
    if method == "dense":
        engine: _Engine = _DenseEngine(network, state)
    else:
        from server.engine.backends import choose_backend

        engine = _SparseEngine(network, state, choose_backend(factorization))
    with _one_blas_thread():
        return _iterate(network, state, engine, max_iterations, tolerance, report)


def _iterate(
    network: Network,
    state: _State,
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
        correction = engine.step(evaluation, first=iterations == 1)
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


def _one_blas_thread():
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


class _State:
    """Coordinates and orientations as arrays, and the column of each unknown."""

    def __init__(
        self,
        network: Network,
        coords: dict[str, tuple[float, float, float]],
        kinds: Mapping[str, Kind] = KINDS,
        correlated: Sequence[CorrelatedBlock] = (),
    ) -> None:
        self.kinds, self.correlated = kinds, correlated
        self.network = network
        self.names = [p.name for p in network.points]
        self.point_index = {name: k for k, name in enumerate(self.names)}
        values = np.array([coords[name] for name in self.names], dtype=float).reshape(-1, 3)
        self.east, self.north, self.height = (values[:, c].copy() for c in range(3))
        params = network.parameters
        self.round_lines = sorted({p.round_line for p in params if p.kind == "O"})  # type: ignore[type-var]
        self.round_index = {line: k for k, line in enumerate(self.round_lines)}
        n_points = len(self.names)
        self.column = {c: np.full(n_points, -1, np.int64) for c in "ENH"}
        self.column["O"] = np.full(len(self.round_lines), -1, np.int64)
        kind = np.empty(len(params), np.int64)  # 0 E, 1 N, 2 H, 3 O
        target = np.empty(len(params), np.int64)  # point or round index
        for k, p in enumerate(params):
            if p.kind == "O":
                index = self.round_index[p.round_line]  # type: ignore[index]
                kind[k] = 3
            else:
                index = self.point_index[p.point]  # type: ignore[index]
                kind[k] = _COMPONENT[p.kind]
            self.column[p.kind][index] = k
            target[k] = index
        self.kind, self.target = kind, target
        self.orientation = self._start_orientations()
        self.control_rows = _control_rows(network)
        self.control = [
            ControlEquation(self.point_index[c.point], _COMPONENT[c.component], c.given, c.sigma)
            for c in self.control_rows
        ]

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        return self.east, self.north, self.height, self.orientation

    def assembly(self, columns: dict[str, np.ndarray]) -> Assembly:
        return Assembly(
            self.network.used, self.point_index, self.round_index,
            columns["E"], columns["N"], columns["H"], columns["O"], self.control,
            self.kinds, self.correlated,
        )

    def apply(self, correction: np.ndarray) -> None:
        for code, array in enumerate((self.east, self.north, self.height, self.orientation)):
            pick = self.kind == code
            array[self.target[pick]] += correction[pick]  # one unknown per component: no repeats

    def largest_move(self, correction: np.ndarray) -> float:
        """Largest correction in metres; orientations count at a 1 km lever arm."""
        if correction.size == 0:
            return 0.0
        return float(np.max(np.abs(correction) * np.where(self.kind == 3, 1000.0, 1.0)))

    def coordinates(self) -> dict[str, tuple[float, float, float]]:
        return dict(zip(self.names, zip(self.east.tolist(), self.north.tolist(), self.height.tolist())))

    def positions(self) -> dict[str, tuple[float, float, float]] | None:
        """Earth-centred positions (geodetic model only)."""
        return None

    def orientation_dict(self) -> dict[int, float]:
        return dict(zip(self.round_lines, self.orientation.tolist()))

    def _start_orientations(self) -> np.ndarray:
        """Each round's orientation as the mean of (azimuth − direction) over its targets."""
        rounds = [
            (self.round_index[o.round_line], self.point_index[o.from_point], self.point_index[o.to], o.value)
            for o in self.network.used
            if o.kind == "direction" and o.round_line in self.round_index
        ]
        orientation = np.zeros(len(self.round_lines))
        if not rounds:
            return orientation
        table = np.array(rounds, dtype=float)
        r, i, j = (table[:, c].astype(np.int64) for c in range(3))
        d_east = self.east[j] - self.east[i]
        d_north = self.north[j] - self.north[i]
        ok = np.isfinite(d_east) & np.isfinite(d_north)
        offset = np.arctan2(d_east[ok], d_north[ok]) - table[ok, 3]
        # average on the circle: offsets near 0 and 2π must not cancel
        sines = np.bincount(r[ok], weights=np.sin(offset), minlength=len(self.round_lines))
        cosines = np.bincount(r[ok], weights=np.cos(offset), minlength=len(self.round_lines))
        return np.arctan2(sines, cosines)

    def inner_constraints(self) -> np.ndarray:
        """G for the free datum: translations in E and N, and rotation about the centroid."""
        network = self.network
        n = len(network.parameters)
        e_cols = np.flatnonzero(self.kind == 0)
        n_cols = np.flatnonzero(self.kind == 1)
        east = self.east[self.target[e_cols]]
        north = self.north[self.target[n_cols]]
        rotation = "rotation" in network.free_datum
        g = np.zeros((n, 3 if rotation else 2))
        g[e_cols, 0] = 1.0
        g[n_cols, 1] = 1.0
        if rotation:
            spread = max(float(np.max(np.hypot(east - east.mean(), north - north.mean()))), 1.0)
            g[e_cols, 2] = (north - north.mean()) / spread
            g[n_cols, 2] = -(east - east.mean()) / spread
        return g / np.linalg.norm(g, axis=0)

    def datum_directions(self, g: np.ndarray) -> np.ndarray:
        """H with N·H = 0: G's translations, and its rotation carried into the orientations.

        Turning every point about the centroid by ε turns every azimuth, so
        each round's orientation turns with it by the same angle.
        """
        h = g.copy()
        if h.shape[1] == 3:
            e_cols = np.flatnonzero(self.kind == 0)
            n_cols = np.flatnonzero(self.kind == 1)
            # G's rotation column is (N − N̄, −(E − Ē))/‖(N − N̄, −(E − Ē))‖: a step of ε
            # along it turns the figure by ε/‖·‖ radians, and every orientation with it.
            east = self.east[self.target[e_cols]]
            north = self.north[self.target[n_cols]]
            lever = np.concatenate([north - north.mean(), -(east - east.mean())])
            h[self.kind == 3, 2] = 1.0 / float(np.linalg.norm(lever))
        return h


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


class _Engine:
    name = ""
    assembly: Assembly

    def step(self, evaluation, first: bool) -> np.ndarray:  # pragma: no cover - interface
        raise NotImplementedError

    def statistics(self, evaluation) -> tuple[object, np.ndarray]:  # pragma: no cover
        raise NotImplementedError

    def hat(self, evaluation) -> Callable[[np.ndarray], np.ndarray]:  # pragma: no cover
        raise NotImplementedError


class _DenseEngine(_Engine):
    """Full N, Cholesky and full Qxx; the bordered system for a free network."""

    name = "dense"

    def __init__(self, network: Network, state: _State) -> None:
        self.network = network
        self.state = state
        self.assembly = state.assembly(state.column)
        self.n = len(network.parameters)
        self.qxx = np.zeros((self.n, self.n))

    def _design(self, evaluation) -> np.ndarray:
        return self.assembly.design_matrix(evaluation.slot_val, self.n).toarray()

    def step(self, evaluation, first: bool) -> np.ndarray:
        design = self._design(evaluation)
        weights = evaluation.weights
        normal = design.T @ (design * weights[:, None])
        rhs = design.T @ (weights * evaluation.misclosure)
        constraints = self.state.inner_constraints() if self.network.free_datum else None
        correction, self.qxx = _solve_dense(self.network, normal, rhs, constraints)
        return correction

    def statistics(self, evaluation) -> tuple[object, np.ndarray]:
        design = self._design(evaluation)
        explained = np.einsum("ij,jk,ik->i", design, self.qxx, design) if self.n else np.zeros(len(design))
        self.qxx.flags.writeable = False
        return DenseCofactor(self.qxx), explained

    def hat(self, evaluation) -> Callable[[np.ndarray], np.ndarray]:
        design, qxx = self._design(evaluation), self.qxx
        return lambda block: design @ (qxx @ (design.T @ block))


class _SparseEngine(_Engine):
    """N on a fixed pattern, a sparse factor, and a selected inverse (see ``sparse.py``)."""

    def __init__(self, network: Network, state: _State, backend: str) -> None:
        from server.engine import backends as sparse

        self._sparse = sparse
        self.network = network
        self.state = state
        self.n = len(network.parameters)
        # unknowns of the factor: all of them, less a minimal datum in a free network
        self.removed = _minimal_datum(state) if network.free_datum else np.zeros(0, np.int64)
        keep = np.ones(self.n, bool)
        keep[self.removed] = False
        self.kept = np.flatnonzero(keep)
        self.factor_column = np.full(self.n, -1, np.int64)
        self.factor_column[self.kept] = np.arange(self.kept.size)
        columns = {c: np.where(a >= 0, self.factor_column[np.maximum(a, 0)], -1)
                   for c, a in state.column.items()}
        self.assembly = state.assembly(columns)
        self.pattern = sparse.NormalPattern(self.kept.size, self.assembly.row_ptr, self.assembly.slot_col)
        self.factorization = sparse.make_factorization(backend)
        self.name = backend
        self._slot_row = np.repeat(
            np.arange(self.assembly.n_rows, dtype=np.int64), np.diff(self.assembly.row_ptr)
        )
        self._datum: tuple[np.ndarray, np.ndarray] | None = None

    def step(self, evaluation, first: bool) -> np.ndarray:
        weights = evaluation.weights
        data = self.pattern.fill(evaluation.slot_val, weights)
        matrix = self.pattern.matrix(data)
        try:
            self.factorization.factorize(matrix, check=False)
            terms = evaluation.slot_val * (weights * evaluation.misclosure)[self._slot_row]
            rhs = np.bincount(self.assembly.slot_col, weights=terms, minlength=self.kept.size)
            solved = self.factorization.solve(rhs)
            # a negligible pivot shows as an absurd correction; only then are the pivots
            # examined (the same test as the dense path's), which costs a factor conversion
            if not np.all(np.abs(solved) < IMPLAUSIBLE_CORRECTION):
                self.factorization.check()
        except self._sparse.SingularMatrix:
            raise NetworkError(*self._diagnosis(matrix)) from None
        correction = np.zeros(self.n)
        correction[self.kept] = solved
        if self.network.free_datum:
            g = self.state.inner_constraints()
            h = self.state.datum_directions(g)
            self._datum = (g, h)
            # dx = S·dx_min with S = I − H·(GᵀH)⁻¹·Gᵀ
            correction -= h @ np.linalg.solve(g.T @ h, g.T @ correction)
        return correction

    def statistics(self, evaluation) -> tuple[object, np.ndarray]:
        sparse = self._sparse
        try:
            cofactor = sparse.Cofactor(self.factorization, self.kept.size)
        except sparse.SingularMatrix:
            weights = evaluation.weights
            matrix = self.pattern.matrix(self.pattern.fill(evaluation.slot_val, weights))
            raise NetworkError(*self._diagnosis(matrix)) from None
        columns = np.repeat(np.arange(self.kept.size, dtype=np.int64), np.diff(self.pattern.indptr))
        q_on_pattern = cofactor.entries(self.pattern.indices, columns)
        explained = self.pattern.row_quadratic(evaluation.slot_val, q_on_pattern)
        if not self.network.free_datum:
            return cofactor, explained
        assert self._datum is not None
        g, h = self._datum
        return _FreeDatumCofactor(cofactor, self.factorization, self.factor_column, g, h), explained

    def hat(self, evaluation) -> Callable[[np.ndarray], np.ndarray]:
        """A·N⁻¹·Aᵀ·B with the last factor.  In a free network the minimal-datum factor
        gives the same product as the inner-constraint Qxx (A·H = 0)."""
        design = self.assembly.design_matrix(evaluation.slot_val, self.kept.size)
        solve = self.factorization.solve

        def apply(block: np.ndarray) -> np.ndarray:
            if self.kept.size == 0:
                return np.zeros_like(block)
            return design @ solve(np.ascontiguousarray(design.T @ block))

        return apply

    def _diagnosis(self, matrix) -> tuple[str, list[str]]:
        parameters = self.kept
        if matrix.shape[0] <= DENSE_DIAGNOSIS_LIMIT:
            return _singular_diagnosis(self.network, matrix.toarray(), parameters)
        return _sparse_singular_diagnosis(self.network, matrix, parameters)


class _FreeDatumCofactor:
    """Qxx of the inner-constraint solution from the minimal-datum one.

    Qxx = S·Qm·Sᵀ, S = I − H·C·Gᵀ, C = (GᵀH)⁻¹, Qm the minimal-datum cofactor
    (zero for the held unknowns); with W = Qm·G:
    Qxx = Qm − H·C·Wᵀ − W·Cᵀ·Hᵀ + H·C·(GᵀW)·Cᵀ·Hᵀ.
    """

    def __init__(self, base, factorization, factor_column: np.ndarray, g: np.ndarray, h: np.ndarray) -> None:
        self.base = base
        self.factor_column = factor_column
        kept = factor_column >= 0
        w = np.zeros_like(g)
        for k in range(g.shape[1]):
            w[kept, k] = factorization.solve(np.ascontiguousarray(g[kept, k]))
        c = np.linalg.inv(g.T @ h)
        self.hc = h @ c
        self.w = w
        self.middle = g.T @ w

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        fr, fc = self.factor_column[rows], self.factor_column[cols]
        both = (fr >= 0) & (fc >= 0)
        base = np.zeros(rows.shape[0])
        base[both] = self.base.entries(fr[both], fc[both])
        hc_r, hc_c = self.hc[rows], self.hc[cols]
        return (
            base
            - np.einsum("pk,pk->p", hc_r, self.w[cols])
            - np.einsum("pk,pk->p", self.w[rows], hc_c)
            + np.einsum("pk,kl,pl->p", hc_r, self.middle, hc_c)
        )


def _minimal_datum(state: _State) -> np.ndarray:
    """Unknowns to hold for a minimal datum: E and N of the first point, and for rotation
    the component of the farthest point that the rotation moves most."""
    e_cols = np.flatnonzero(state.kind == 0)
    if e_cols.size == 0:
        return np.zeros(0, np.int64)
    first = int(state.target[e_cols[0]])
    held = [int(state.column["E"][first]), int(state.column["N"][first])]
    if "rotation" in state.network.free_datum:
        points = state.target[e_cols]
        d_east = state.east[points] - state.east[first]
        d_north = state.north[points] - state.north[first]
        far = int(points[np.argmax(np.hypot(d_east, d_north))])
        de, dn = state.east[far] - state.east[first], state.north[far] - state.north[first]
        # a rotation moves the far point along (ΔN, −ΔE): hold the larger of the two
        held.append(int(state.column["E" if abs(dn) >= abs(de) else "N"][far]))
    return np.array(held, dtype=np.int64)


def _solve_dense(
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
    # Cholesky of a numerically singular matrix may succeed with a vanishing pivot; each
    # pivot is judged against its own diagonal element (weights may be far apart)
    if not np.all(diagonal**2 > 1e-12 * np.diag(normal)):
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


def _singular_diagnosis(
    network: Network, normal: np.ndarray, parameters: np.ndarray | None = None
) -> tuple[str, list[str]]:
    """Name the points that move freely in the null space of the normal matrix.

    ``parameters`` gives the unknown of each row of ``normal`` (all, in order, if None).
    """
    scale = np.sqrt(np.maximum(np.diag(normal), 1e-300))
    scaled = normal / np.outer(scale, scale)
    eigenvalues, vectors = np.linalg.eigh(scaled)
    null = vectors[:, eigenvalues < 1e-10 * max(eigenvalues.max(), 1.0)]
    free = np.abs(null).max(axis=1) > 1e-6 if null.size else np.zeros(len(normal), bool)
    return _name_free(network, np.flatnonzero(free), parameters)


def _sparse_singular_diagnosis(network: Network, matrix, parameters: np.ndarray) -> tuple[str, list[str]]:
    """The same for large N: inverse iteration on N + ε·diag(N) brings out its null space."""
    import scipy.sparse
    import scipy.sparse.linalg

    diagonal = np.maximum(matrix.diagonal(), 1e-300)
    scale = scipy.sparse.diags(1.0 / np.sqrt(diagonal))
    scaled = (scale @ matrix @ scale).tocsc()
    shifted = (scaled + 1e-9 * scipy.sparse.identity(scaled.shape[0], format="csc")).tocsc()
    lu = scipy.sparse.linalg.splu(shifted, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0,
                                  options={"SymmetricMode": True})
    vectors = np.random.default_rng(0).normal(size=(scaled.shape[0], 8))
    for _ in range(3):
        vectors = lu.solve(vectors)
        vectors, _ = np.linalg.qr(vectors)
    # keep the directions that N (scaled) leaves unstretched: its near-null space
    stretch = np.linalg.norm(scaled @ vectors, axis=0)
    null = vectors[:, stretch < 1e-6]
    free = np.abs(null).max(axis=1) > 1e-3 if null.size else np.zeros(scaled.shape[0], bool)
    return _name_free(network, np.flatnonzero(free), parameters)


def _name_free(network: Network, rows: np.ndarray, parameters: np.ndarray | None) -> tuple[str, list[str]]:
    names: list[str] = []
    for k in rows:
        p = network.parameters[int(k) if parameters is None else int(parameters[k])]
        label = p.point if p.kind != "O" else f"orientation of the round at {p.point}"
        if label and label not in names:
            names.append(label)
    shown = ", ".join(names[:12]) + (f" and {len(names) - 12} more" if len(names) > 12 else "")
    return (
        (
            "the observations do not determine these unknowns (a datum defect or too few "
            f"observations): {shown}"
        ),
        [n for n in names if not n.startswith("orientation")],
    )


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
