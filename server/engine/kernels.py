"""Compiled loops of the sparse engine.

Four small kernels whose loops cannot be written as whole-array numpy
operations without materialising far more than they compute:

* ``normal_pattern``: the sparsity pattern of N = AᵀPA (a symbolic product)
  and, for every product term w_r·a_rs·a_rt, the position in N's data it adds
  to, so that each iteration only refills the numbers (``fill_normal``);
* ``row_quadratic``: a_r·Q·a_rᵀ for every row, with Q given on N's pattern;
* ``selected_inverse``: the elements of Z = (L·D·Lᵀ)⁻¹ on the pattern of L by
  the Takahashi recurrences (Takahashi, Fagan and Chen 1973; Erisman and
  Tinney, *Comm. ACM* 18(3), 1975)::

      Z_ij = −Σ_{k∈S_j} Z_ik·L_kj            (i ∈ S_j)
      Z_jj = 1/d_j − Σ_{k∈S_j} L_kj·Z_kj

  for j = n−1 … 0, with S_j the rows of column j of L below the diagonal.
  Every Z_ik needed lies on the pattern of L (the filled graph is chordal), so
  the recurrences never leave it;
* ``lookup``: positions of (row, column) pairs in a CSC pattern.

A pure-Python loop over 100 000 columns costs seconds before any arithmetic
(measured: about 10 µs per column for the slicing alone), which is why these
are compiled.  Matrices are CSC with sorted row indices; int64 indices and
float64 values throughout.

Three builds of the same loops; the first that loads serves (``IMPLEMENTATION``):

* ``"C"``: the extension ``_kernels_c`` (kernels.c), compiled when the package is
  installed (setup.py).  It loads in about a millisecond, where numba costs every
  command-line run 0.45 s (its import 0.15 s, loading the cached kernels 0.30 s);
  it checks every index it is given (ValueError, never a read out of bounds).
  These wrappers allocate its outputs with numpy, so it needs no numpy headers.
* ``"numba"``: kernels_numba.py, where the extension is not built (a checkout run
  without an install, a machine without a C compiler).  numba stays a
  dependency for that fallback; it is not even imported when the C build loads.
* ``"Python"``: the numba functions run undecorated where numba is missing too
  (correct, slow).

The C build follows the numba loops statement for statement and calls the same
BLAS/LAPACK routines with the same arguments where they do, so all builds give
the same bits (tests/test_kernels_c.py).
"""

from __future__ import annotations

import numpy as np

try:  # (a compiled module: mypy sees no source for it)
    from server.engine import _kernels_c as _c  # type: ignore[attr-defined]
except ImportError:  # not built: numba's kernels below
    _c = None


def normal_pattern(
    n: int, row_ptr: np.ndarray, slot_col: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """Pattern of AᵀA (CSC, sorted) and the data position of every slot pair.

    Row r of A has slots row_ptr[r] … row_ptr[r+1]−1 with columns slot_col.
    The pair (s, t) of row r (both slot numbers) is term number
    pair_ptr[r] + (s − row_ptr[r])·k_r + (t − row_ptr[r]), k_r the row's
    slot count; ``targets`` gives its position in N's data (N_{col(s), col(t)}).
    """
    row_ptr, slot_col = _contiguous(row_ptr), _contiguous(slot_col)
    pairs = _c.pair_count(row_ptr, slot_col)
    indptr = np.empty(int(n) + 1, np.int64)
    pair_ptr = np.empty(row_ptr.shape[0], np.int64)
    targets = np.empty(pairs, np.int64)
    indices = np.empty(pairs, np.int64)  # an upper bound, trimmed below
    nnz = _c.normal_pattern(n, row_ptr, slot_col, indptr, indices, pair_ptr, targets)
    return indptr, indices[:nnz].copy(), pair_ptr, targets


def fill_normal(
    nnz: int,
    row_ptr: np.ndarray,
    slot_val: np.ndarray,
    weights: np.ndarray,
    pair_ptr: np.ndarray,
    targets: np.ndarray,
) -> np.ndarray:
    """N's data: Σ_r w_r·a_rs·a_rt, each term added to its fixed position.

    The term of a pair and of its mirror is the same product, so N is
    symmetric to the last bit.
    """
    data = np.empty(nnz, np.float64)
    _c.fill_normal(*map(_contiguous, (row_ptr, slot_val, weights, pair_ptr, targets)), data)
    return data


def row_quadratic(
    row_ptr: np.ndarray,
    slot_val: np.ndarray,
    pair_ptr: np.ndarray,
    targets: np.ndarray,
    q_data: np.ndarray,
) -> np.ndarray:
    """a_r·Q·a_rᵀ for every row r, with Q's elements on N's pattern in ``q_data``."""
    out = np.empty(max(row_ptr.shape[0] - 1, 0), np.float64)
    _c.row_quadratic(*map(_contiguous, (row_ptr, slot_val, pair_ptr, targets, q_data)), out)
    return out


def supernodes(indptr: np.ndarray, indices: np.ndarray) -> np.ndarray:
    """Start columns of the supernodes of L (columns sharing one structure below them).

    Column j joins column j+1's supernode when its first row below the
    diagonal is j+1 and it holds exactly one row more: on a filled pattern
    the two structures below the block are then equal.
    """
    starts = np.empty(indptr.shape[0], np.int64)
    count = _c.supernodes(_contiguous(indptr), _contiguous(indices), starts)
    return starts[: count + 1].copy()


def selected_inverse(
    indptr: np.ndarray, indices: np.ndarray, lower: np.ndarray, pivots: np.ndarray
) -> np.ndarray:
    """Z = (L·D·Lᵀ)⁻¹ on the pattern of L (unit lower, diagonal stored first per column).

    Blocked by supernodes: for a supernode J with rows R below it,
    Y = L_RJ·L_JJ⁻¹, Z_RJ = −Z_RR·Y and Z_JJ = L_JJ⁻ᵀ·D_J⁻¹·L_JJ⁻¹ − Yᵀ·Z_RJ,
    Z_RR gathered from the supernodes already done (the product is the BLAS
    call that carries most of the work).
    """
    z = np.empty(lower.shape[0], np.float64)
    _c.selected_inverse(*map(_contiguous, (indptr, indices, lower, pivots)), z)
    return z


def selected_inverse_columns(
    indptr: np.ndarray, indices: np.ndarray, lower: np.ndarray, pivots: np.ndarray
) -> np.ndarray:
    """The same as ``selected_inverse``, one column at a time (the plain recurrences).

    Kept as the readable form of the algorithm and as a check on the blocked one.
    """
    z = np.empty(lower.shape[0], np.float64)
    _c.selected_inverse_columns(*map(_contiguous, (indptr, indices, lower, pivots)), z)
    return z


def lookup(
    indptr: np.ndarray, indices: np.ndarray, rows: np.ndarray, cols: np.ndarray
) -> np.ndarray:
    """Data positions of (rows[p], cols[p]) in a CSC pattern with sorted rows; −1 if absent."""
    out = np.empty(rows.shape[0], np.int64)
    _c.lookup(*map(_contiguous, (indptr, indices, rows, cols)), out)
    return out


def _contiguous(array: np.ndarray) -> np.ndarray:
    """The array itself when C-contiguous (the usual case), else a contiguous copy; the
    extension checks the type and length of every array it is given."""
    return np.ascontiguousarray(array)


IMPLEMENTATION = "C"
if _c is None:
    from server.engine import kernels_numba

    IMPLEMENTATION = "numba" if kernels_numba.COMPILED else "Python"
    normal_pattern = kernels_numba.normal_pattern
    fill_normal = kernels_numba.fill_normal
    row_quadratic = kernels_numba.row_quadratic
    supernodes = kernels_numba.supernodes
    selected_inverse = kernels_numba.selected_inverse
    selected_inverse_columns = kernels_numba.selected_inverse_columns
    lookup = kernels_numba.lookup


def warm_up() -> None:
    """Load every kernel on a tiny problem (numba: compile, or load from its disk cache)."""
    row_ptr = np.array([0, 2, 4, 5], np.int64)
    slot_col = np.array([0, 1, 1, 2, 2], np.int64)
    values = np.array([1.0, -1.0, 1.0, -1.0, 1.0])
    indptr, _, pair_ptr, targets = normal_pattern(3, row_ptr, slot_col)
    data = fill_normal(int(indptr[-1]), row_ptr, values, np.ones(3), pair_ptr, targets)
    row_quadratic(row_ptr, values, pair_ptr, targets, data)
    lower = np.array([1.0, -0.5, 1.0, -0.5, 1.0])
    l_indptr = np.array([0, 2, 4, 5], np.int64)
    l_indices = np.array([0, 1, 1, 2, 2], np.int64)
    pivots = np.array([2.0, 1.5, 1.0])
    selected_inverse(l_indptr, l_indices, lower, pivots)
    selected_inverse_columns(l_indptr, l_indices, lower, pivots)
    lookup(l_indptr, l_indices, np.array([1], np.int64), np.array([0], np.int64))
    supernodes(l_indptr, l_indices)
