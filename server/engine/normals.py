"""The normal equations N·dx = Aᵀ·P·l in the form a factorization back end takes.

    N = Aᵀ·P·A,   rhs = Aᵀ·P·l,   P = diag(w)  (correlated rows arrive whitened)

and, after the last factorization, a_r·Qxx·a_rᵀ for every row r: the
cofactor of each adjusted observation, from which redundancy numbers
r = 1 − a·Qxx·aᵀ/σ², w-tests and MDBs follow.

Sparse back ends get N on its fixed pattern (``backends.NormalPattern``,
refilled by a compiled kernel) and a·Qxx·aᵀ from the elements of Qxx on that
pattern, which holds every pair of unknowns that share a row.  The dense back
end gets N from one BLAS product of the full A and a·Qxx·aᵀ from the full
Qxx: for a small network the fastest, and exactly the arithmetic the results
were first computed with.
"""

from __future__ import annotations

from typing import Any, Protocol

import numpy as np

from server.engine.backends import DenseCofactor, NormalPattern
from server.model.assembly import Assembly, Evaluation


class Entries(Protocol):
    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray: ...


class NormalEquations:
    """N and Aᵀ·P·l of an assembly's rows over ``n`` columns, and a·Qxx·aᵀ per row."""

    def __init__(self, n: int, assembly: Assembly, dense: bool) -> None:
        self.n = n
        self.assembly = assembly
        self.dense = dense
        self.pattern = None if dense else NormalPattern(n, assembly.row_ptr, assembly.slot_col)
        # the row of every slot, for Aᵀ·P·l by one bincount
        self._slot_row = np.repeat(
            np.arange(assembly.n_rows, dtype=np.int64), np.diff(assembly.row_ptr)
        )

    def design(self, evaluation: Evaluation) -> Any:
        """A as a scipy CSR matrix."""
        return self.assembly.design_matrix(evaluation.slot_val, self.n)

    def form(self, evaluation: Evaluation) -> tuple[Any, np.ndarray]:
        """(N, Aᵀ·P·l): N a full array for a dense back end, else CSC on the pattern."""
        weights = evaluation.weights
        if self.pattern is None:
            design = self.design(evaluation).toarray()
            normal = design.T @ (design * weights[:, None])
            return normal, design.T @ (weights * evaluation.misclosure)
        matrix = self.pattern.matrix(self.pattern.fill(evaluation.slot_val, weights))
        terms = evaluation.slot_val * (weights * evaluation.misclosure)[self._slot_row]
        rhs = np.bincount(self.assembly.slot_col, weights=terms, minlength=self.n)
        return matrix, rhs

    def row_quadratic(self, evaluation: Evaluation, cofactor: Entries) -> np.ndarray:
        """a_r·Qxx·a_rᵀ for every row r, Qxx the cofactor of the unknowns of the factor."""
        if self.n == 0:
            return np.zeros(self.assembly.n_rows)
        if self.pattern is None:
            assert isinstance(cofactor, DenseCofactor)  # what the dense back end gives
            design = self.design(evaluation).toarray()
            return np.einsum("ij,jk,ik->i", design, cofactor.qxx, design)
        pattern = self.pattern
        columns = np.repeat(np.arange(self.n, dtype=np.int64), np.diff(pattern.indptr))
        q_on_pattern = cofactor.entries(pattern.indices, columns)
        return pattern.row_quadratic(evaluation.slot_val, q_on_pattern)
