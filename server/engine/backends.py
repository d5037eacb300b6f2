"""Factorization back ends of the normal equations, behind one ``Factorization`` interface.

Three back ends give the same results (to rounding):

* dense LAPACK (``scipy.linalg.cho_factor``) for small networks: N as a full
  array, its Cholesky factor, and Qxx = N⁻¹ in full for the statistics;

and, for everything else, a sparse N on a fixed pattern (computed once per
adjustment by ``kernels.normal_pattern``; each iteration refills its numbers
and refactorizes with the fill-reducing ordering found the first time):

* CHOLMOD (SuiteSparse) through scikit-sparse, when it is installed: its own
  ordering (AMD, or METIS where built in) and a supernodal factorization;
* scipy's SuperLU otherwise, used as a symmetric LDLᵀ: minimum degree on
  N + Nᵀ (``MMD_AT_PLUS_A``), diagonal pivots only, symmetric mode.  The
  ordering of the first factorization is kept and later matrices are handed
  over already permuted.

``STATIONFIT_FACTORIZATION=superlu`` (or ``cholmod``) forces a sparse back end.

After the last iteration the factor is written as L·D·Lᵀ = N[order][:, order]
(L unit lower triangular) and ``kernels.selected_inverse`` gives the
elements of Qxx = N⁻¹ on the pattern of L, which contains the pattern of N:
every pair of unknowns that share an observation.  ``Cofactor`` serves any
element from there, and solves for the few that lie elsewhere.
"""

from __future__ import annotations

import os
import warnings
from types import ModuleType
from typing import Any

import numpy as np
import scipy.sparse

#: Environment variable that forces a factorization back end.
BACKEND_VARIABLE = "STATIONFIT_FACTORIZATION"
#: A pivot below this fraction of its own diagonal element of N means N is singular
#: (the same test as the dense Cholesky's).  Relative to its own element, not to N's
#: largest, so weights many orders apart (1″ directions with 1 km distances) are not
#: mistaken for a datum defect.
SINGULAR_PIVOT = 1e-12


def _kernels() -> ModuleType:
    """The compiled kernels, loaded on first use: the dense back end of small networks never
    needs them (and where the C extension is missing, importing them loads numba)."""
    from server.engine import kernels

    return kernels


def __getattr__(name: str) -> ModuleType:
    # ``backends.kernels`` as before the kernels were loaded lazily (the benchmark patches it)
    if name == "kernels":
        return _kernels()
    raise AttributeError(f"module {__name__!r} has no attribute {name!r}")


class SingularMatrixError(Exception):
    """The normal matrix is singular (or not positive definite)."""


def cholmod_available() -> bool:
    """True when scikit-sparse's CHOLMOD can be imported."""
    try:
        import sksparse.cholmod  # noqa: F401
    except ImportError:
        return False
    return True


def choose_backend(requested: str | None = None) -> str:
    """The sparse back end, ``"cholmod"`` or ``"superlu"``: the argument, else the
    environment, else the fastest installed."""
    choice = (requested or os.environ.get(BACKEND_VARIABLE, "") or "auto").lower()
    if choice not in ("auto", "cholmod", "superlu"):
        raise ValueError(f"unknown factorization back end {choice!r} (use cholmod or superlu)")
    if choice == "auto":
        return "cholmod" if cholmod_available() else "superlu"
    if choice == "cholmod" and not cholmod_available():
        raise ValueError("the CHOLMOD back end was requested but scikit-sparse is not installed")
    return choice


class NormalPattern:
    """The fixed sparsity pattern of N for a layout of A's rows."""

    def __init__(self, n: int, row_ptr: np.ndarray, slot_col: np.ndarray) -> None:
        self.n = n
        self.row_ptr = row_ptr
        self.indptr, self.indices, self.pair_ptr, self.targets = _kernels().normal_pattern(
            n, row_ptr, slot_col
        )
        self.indptr32 = self.indptr.astype(np.int32)
        self.indices32 = self.indices.astype(np.int32)

    @property
    def nnz(self) -> int:
        return int(self.indptr[-1])

    def fill(self, slot_val: np.ndarray, weights: np.ndarray) -> np.ndarray:
        """The data of N = AᵀPA on the pattern."""
        return _kernels().fill_normal(
            self.nnz, self.row_ptr, slot_val, weights, self.pair_ptr, self.targets
        )

    def matrix(self, data: np.ndarray) -> scipy.sparse.csc_matrix:
        return scipy.sparse.csc_matrix(
            (data, self.indices32, self.indptr32), shape=(self.n, self.n), copy=False
        )

    def diagonal_positions(self) -> np.ndarray:
        columns = np.arange(self.n, dtype=np.int64)
        return _kernels().lookup(self.indptr, self.indices, columns, columns)

    def row_quadratic(self, slot_val: np.ndarray, q_data: np.ndarray) -> np.ndarray:
        """a_r·Q·a_rᵀ for each row, Q given on N's pattern."""
        return _kernels().row_quadratic(self.row_ptr, slot_val, self.pair_ptr, self.targets, q_data)


class Factorization:
    """A Cholesky-type factorization of N with a fixed ordering (base class).

    ``dense`` back ends take N as a full array, the others as CSC on N's pattern.
    """

    name = ""
    dense = False

    def factorize(self, matrix: Any, check: bool) -> None:
        """Factorize N; with ``check`` also test the pivots (``SingularMatrixError``)."""
        raise NotImplementedError

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        raise NotImplementedError

    def check(self) -> None:
        """Raise ``SingularMatrixError`` if a pivot is negligible against N's diagonal."""
        raise NotImplementedError

    def ldl(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """(indptr, indices, unit-lower data, pivots d, order) with L·D·Lᵀ = N[order][:, order]."""
        raise NotImplementedError

    def cofactor(self, n: int) -> Cofactor | DenseCofactor:
        """Elements of Qxx = N⁻¹ from the last factor (a selected inverse when sparse)."""
        return Cofactor(self, n)


#: The back ends by name.
BACKENDS = ("dense", "cholmod", "superlu")


def make_factorization(backend: str) -> Factorization:
    """The back end called ``backend`` (one of ``BACKENDS``)."""
    if backend == "dense":
        return DenseLapack()
    return _Cholmod() if backend == "cholmod" else _SuperLU()


class DenseCofactor:
    """Qxx held in full (small networks)."""

    def __init__(self, qxx: np.ndarray) -> None:
        self.qxx = qxx

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        return self.qxx[np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)]


class DenseLapack(Factorization):
    """LAPACK's Cholesky of a full N (``cho_factor``): the fastest for small networks."""

    name = "dense"
    dense = True

    def __init__(self) -> None:
        self._factor: tuple[np.ndarray, bool] | None = None

    def factorize(self, matrix: Any, check: bool) -> None:
        # the pivots are always examined: for a full N that costs nothing
        del check
        import scipy.linalg  # here: the sparse path need not load LAPACK's wrappers at start

        try:
            self._factor = scipy.linalg.cho_factor(matrix, lower=True, check_finite=False)
        except np.linalg.LinAlgError:
            raise SingularMatrixError from None
        # Cholesky of a numerically singular matrix may succeed with a vanishing pivot
        _check_pivots(np.diag(self._factor[0]) ** 2, np.diag(matrix))

    def check(self) -> None:
        """Done by ``factorize``."""

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        assert self._factor is not None
        import scipy.linalg

        return scipy.linalg.cho_solve(self._factor, rhs, check_finite=False)

    def cofactor(self, n: int) -> DenseCofactor:
        qxx = self.solve(np.eye(n))
        qxx.flags.writeable = False
        return DenseCofactor(qxx)


class _Cholmod(Factorization):
    name = "cholmod"

    def __init__(self) -> None:
        from sksparse import cholmod

        self._cholmod = cholmod
        self._factor: Any = None
        self._diagonal = np.ones(0)  # N's diagonal in the factor's (pivot) order

    def factorize(self, matrix: scipy.sparse.csc_matrix, check: bool) -> None:
        cholmod = self._cholmod
        with warnings.catch_warnings():
            # scikit-sparse warns on its own type conversions; the matrix is already CSC float64
            warnings.simplefilter("ignore", cholmod.CholmodTypeConversionWarning)
            try:
                if self._factor is None:
                    self._factor = _analyze(cholmod, matrix)
                self._factor.cholesky_inplace(matrix)
            except cholmod.CholmodNotPositiveDefiniteError:
                raise SingularMatrixError from None
        self._diagonal = matrix.diagonal()[np.asarray(self._factor.P())]
        if check:
            self.check()

    def check(self) -> None:
        assert self._factor is not None
        # D of a copy: converting the factor itself would change its kind
        _check_pivots(self._factor.copy().D(), self._diagonal)

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        assert self._factor is not None
        return self._factor(rhs)

    def ldl(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        assert self._factor is not None
        factor = self._factor.copy()
        lower = factor.L().tocsc()
        lower.sort_indices()
        indptr = lower.indptr.astype(np.int64)
        indices = lower.indices.astype(np.int64)
        diagonal = lower.data[indptr[:-1]]
        pivots = diagonal * diagonal
        _check_pivots(pivots, self._diagonal)
        # in place: the factor is our copy, and fresh memory costs more than the division
        unit = lower.data
        unit /= np.repeat(diagonal, np.diff(indptr))
        return indptr, indices, unit, pivots, np.asarray(factor.P(), dtype=np.int64)


class _SuperLU(Factorization):
    name = "superlu"

    def __init__(self) -> None:
        self._order: np.ndarray | None = None  # N[order][:, order] is factorized
        self._gather: np.ndarray | None = None  # data of the permuted matrix from N's data
        self._permuted: tuple[np.ndarray, np.ndarray] | None = None
        self._lu: Any = None
        self._diagonal = np.ones(0)  # N's diagonal in the order of U's pivots
        self._inner: np.ndarray | None = None  # SuperLU's own column order of the permuted matrix

    def factorize(self, matrix: scipy.sparse.csc_matrix, check: bool) -> None:
        n = matrix.shape[0]
        if self._order is None:
            lu = self._splu(matrix, "MMD_AT_PLUS_A")
            self._order = np.argsort(lu.perm_c).astype(np.int64)
            # where each element of the permuted matrix comes from in N's data
            marker = scipy.sparse.csc_matrix(
                (np.arange(matrix.nnz, dtype=float), matrix.indices, matrix.indptr),
                shape=matrix.shape,
            )
            permuted = marker[self._order][:, self._order].tocsc()
            permuted.sort_indices()
            self._gather = permuted.data.astype(np.int64)
            self._permuted = (permuted.indices.copy(), permuted.indptr.copy())
        assert self._gather is not None and self._permuted is not None
        indices, indptr = self._permuted
        permuted = scipy.sparse.csc_matrix(
            (matrix.data[self._gather], indices, indptr), shape=(n, n)
        )
        self._lu = self._splu(permuted, "NATURAL")
        perm_r, perm_c = self._lu.perm_r, self._lu.perm_c
        if not np.array_equal(perm_r, perm_c):
            raise SingularMatrixError  # an off-diagonal pivot: a zero on the diagonal
        self._inner = np.argsort(perm_c).astype(np.int64)
        # U's j-th pivot belongs to column inner[j] of the permuted matrix
        self._diagonal = matrix.diagonal()[self._order[self._inner]]
        if check:
            self.check()

    def check(self) -> None:
        assert self._lu is not None
        _check_pivots(self._lu.U.diagonal(), self._diagonal)

    @staticmethod
    def _splu(matrix: scipy.sparse.csc_matrix, ordering: str) -> Any:
        import scipy.sparse.linalg  # here: only this back end needs it

        try:
            return scipy.sparse.linalg.splu(
                matrix,
                permc_spec=ordering,
                diag_pivot_thresh=0.0,
                options={"SymmetricMode": True},
            )
        except RuntimeError:  # "Factor is exactly singular"
            raise SingularMatrixError from None

    def solve(self, rhs: np.ndarray) -> np.ndarray:
        assert self._lu is not None and self._order is not None
        out = np.empty_like(rhs)
        out[self._order] = self._lu.solve(rhs[self._order])
        return out

    def ldl(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        assert self._lu is not None and self._order is not None and self._inner is not None
        lower = self._lu.L.tocsc()
        lower.sort_indices()
        pivots = self._lu.U.diagonal().copy()
        _check_pivots(pivots, self._diagonal)
        order = self._order[self._inner]
        return (
            lower.indptr.astype(np.int64),
            lower.indices.astype(np.int64),
            lower.data.copy(),
            pivots,
            order,
        )


def _analyze(cholmod: Any, matrix: scipy.sparse.csc_matrix) -> Any:
    """CHOLMOD's symbolic analysis with nested dissection (METIS) where it is built in.

    Measured on the benchmark's 2D networks: METIS leaves about 30 % less fill
    than AMD and factorizes faster; on leveling its analysis only costs time.
    Where CHOLMOD lacks METIS, its default.
    """
    n = matrix.shape[0]
    if n >= METIS_FROM and matrix.nnz >= METIS_DENSITY * n:
        try:
            return cholmod.analyze(matrix, mode="auto", ordering_method="metis")
        except cholmod.CholmodError:  # CHOLMOD built without METIS: its default below
            return cholmod.analyze(matrix, mode="auto")
    return cholmod.analyze(matrix, mode="auto")


#: METIS is asked for from this many unknowns and this many nonzeros per column of N
#: (horizontal networks); its analysis costs more than AMD's and gains nothing on leveling.
METIS_FROM = 5000
METIS_DENSITY = 10


def _check_pivots(pivots: np.ndarray, diagonal: np.ndarray) -> None:
    """Raise ``SingularMatrixError`` when a pivot has lost all but ``SINGULAR_PIVOT`` of its
    diagonal element."""
    if pivots.size and not np.all(pivots > SINGULAR_PIVOT * diagonal):
        raise SingularMatrixError


class Cofactor:
    """Elements of Qxx = N⁻¹ (in the unknowns' own order) from a selected inverse.

    ``entries(rows, cols)`` returns Qxx[rows[p], cols[p]].  Pairs on the
    pattern of the factor come from the selected inverse; any other pair
    is computed by solving N·x = e_j for its column.
    """

    def __init__(self, factorization: Factorization, n: int) -> None:
        indptr, indices, unit, pivots, order = factorization.ldl()
        self.n = n
        self._factorization = factorization
        self._indptr, self._indices = indptr, indices
        self._z = _kernels().selected_inverse(indptr, indices, unit, pivots)
        self._position = np.empty(n, np.int64)  # unknown → row/column of the factor
        self._position[order] = np.arange(n, dtype=np.int64)

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        rows = np.asarray(rows, dtype=np.int64)
        cols = np.asarray(cols, dtype=np.int64)
        a, b = self._position[rows], self._position[cols]
        low = np.minimum(a, b)
        high = np.maximum(a, b, out=a)  # a is ours: no third array of the queries' length
        where = _kernels().lookup(self._indptr, self._indices, high, low)
        if where.size and where.min() >= 0:  # all on the pattern (N's own pattern always is)
            return self._z[where]
        out = np.empty(rows.shape[0])
        found = where >= 0
        out[found] = self._z[where[found]]
        missing = np.flatnonzero(~found)
        if missing.size:
            for column in np.unique(cols[missing]):
                unit = np.zeros(self.n)
                unit[column] = 1.0
                solved = self._factorization.solve(unit)
                pick = missing[cols[missing] == column]
                out[pick] = solved[rows[pick]]
        return out
