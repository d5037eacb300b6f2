"""The sparse engine's kernels as numba functions (cached on disk after the first run).

The fallback of ``kernels`` where its C extension is not built (kernels.py says when and why
both exist); without numba the same functions run as plain Python (correct, slow).  The
algorithms are described in kernels.py; kernels.c repeats these loops statement for statement,
and tests/test_kernels_c.py holds the two to identical bits.
"""

from __future__ import annotations

from typing import Any

import numpy as np

try:  # numba is a declared dependency; the fallback keeps the module importable
    from numba import njit

    COMPILED = True
except ImportError:  # pragma: no cover - exercised only where numba is missing
    COMPILED = False

    def njit(*args: Any, **kwargs: Any) -> Any:  # type: ignore[no-redef]
        if args and callable(args[0]):
            return args[0]
        return lambda function: function


@njit(cache=True, nogil=True)
def normal_pattern(
    n: int, row_ptr: np.ndarray, slot_col: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:  # pragma: no cover - compiled
    """Pattern of AᵀA (CSC, sorted) and the data position of every slot pair.

    Row r of A has slots row_ptr[r] … row_ptr[r+1]−1 with columns slot_col.
    The pair (s, t) of row r (both slot numbers) is term number
    pair_ptr[r] + (s − row_ptr[r])·k_r + (t − row_ptr[r]), k_r the row's
    slot count; ``targets`` gives its position in N's data (N_{col(s), col(t)}).
    """
    m = row_ptr.shape[0] - 1
    nnz_a = slot_col.shape[0]
    # A by columns: for each column the slots that hold it
    counts = np.zeros(n + 1, np.int64)
    for q in range(nnz_a):
        counts[slot_col[q] + 1] += 1
    col_ptr = np.cumsum(counts)
    col_slot = np.empty(nnz_a, np.int64)
    col_row = np.empty(nnz_a, np.int64)
    fill = col_ptr[:-1].copy()
    for r in range(m):
        for q in range(row_ptr[r], row_ptr[r + 1]):
            c = slot_col[q]
            col_slot[fill[c]] = q
            col_row[fill[c]] = r
            fill[c] += 1
    pair_ptr = np.zeros(m + 1, np.int64)
    for r in range(m):
        k = row_ptr[r + 1] - row_ptr[r]
        pair_ptr[r + 1] = pair_ptr[r] + k * k
    targets = np.empty(pair_ptr[m], np.int64)
    indptr = np.zeros(n + 1, np.int64)
    indices = np.empty(pair_ptr[m], np.int64)  # upper bound, trimmed below
    mark = np.full(n, -1, np.int64)
    position = np.zeros(n, np.int64)
    buffer = np.empty(n, np.int64)
    nnz = 0
    for j in range(n):
        found = 0
        for q in range(col_ptr[j], col_ptr[j + 1]):
            r = col_row[q]
            for s in range(row_ptr[r], row_ptr[r + 1]):
                i = slot_col[s]
                if mark[i] != j:
                    mark[i] = j
                    buffer[found] = i
                    found += 1
        rows = np.sort(buffer[:found])
        for p in range(found):
            indices[nnz + p] = rows[p]
            position[rows[p]] = nnz + p
        for q in range(col_ptr[j], col_ptr[j + 1]):
            r = col_row[q]
            t = col_slot[q]
            start = row_ptr[r]
            k = row_ptr[r + 1] - start
            for s in range(start, row_ptr[r + 1]):
                targets[pair_ptr[r] + (s - start) * k + (t - start)] = position[slot_col[s]]
        nnz += found
        indptr[j + 1] = nnz
    return indptr, indices[:nnz].copy(), pair_ptr, targets


@njit(cache=True, nogil=True)
def fill_normal(
    nnz: int,
    row_ptr: np.ndarray,
    slot_val: np.ndarray,
    weights: np.ndarray,
    pair_ptr: np.ndarray,
    targets: np.ndarray,
) -> np.ndarray:  # pragma: no cover - compiled
    """N's data: Σ_r w_r·a_rs·a_rt, each term added to its fixed position.

    The term of a pair and of its mirror is the same product, so N is
    symmetric to the last bit.
    """
    data = np.zeros(nnz, np.float64)
    m = row_ptr.shape[0] - 1
    for r in range(m):
        start = row_ptr[r]
        k = row_ptr[r + 1] - start
        base = pair_ptr[r]
        w = weights[r]
        for a in range(k):
            wa = w * slot_val[start + a]
            data[targets[base + a * k + a]] += wa * slot_val[start + a]
            for b in range(a + 1, k):
                term = wa * slot_val[start + b]
                data[targets[base + a * k + b]] += term
                data[targets[base + b * k + a]] += term
    return data


@njit(cache=True, nogil=True)
def row_quadratic(
    row_ptr: np.ndarray,
    slot_val: np.ndarray,
    pair_ptr: np.ndarray,
    targets: np.ndarray,
    q_data: np.ndarray,
) -> np.ndarray:  # pragma: no cover - compiled
    """a_r·Q·a_rᵀ for every row r, with Q's elements on N's pattern in ``q_data``."""
    m = row_ptr.shape[0] - 1
    out = np.zeros(m, np.float64)
    for r in range(m):
        start = row_ptr[r]
        k = row_ptr[r + 1] - start
        base = pair_ptr[r]
        total = 0.0
        for a in range(k):
            for b in range(k):
                q = q_data[targets[base + a * k + b]]
                total += slot_val[start + a] * slot_val[start + b] * q
        out[r] = total
    return out


@njit(cache=True, nogil=True)
def supernodes(indptr: np.ndarray, indices: np.ndarray) -> np.ndarray:  # pragma: no cover
    """Start columns of the supernodes of L (columns sharing one structure below them).

    Column j joins column j+1's supernode when its first row below the
    diagonal is j+1 and it holds exactly one row more: on a filled pattern
    the two structures below the block are then equal.
    """
    n = indptr.shape[0] - 1
    starts = np.empty(n + 1, np.int64)
    count = 0
    for j in range(n):
        if j == 0:
            starts[count] = 0
            count += 1
            continue
        previous = j - 1
        size_previous = indptr[j] - indptr[previous]
        size_here = indptr[j + 1] - indptr[j]
        joined = size_previous == size_here + 1 and size_previous >= 2
        if joined and indices[indptr[previous] + 1] != j:
            joined = False
        if not joined:
            starts[count] = j
            count += 1
    starts[count] = n
    return starts[: count + 1].copy()


@njit(cache=True, nogil=True)
def selected_inverse(
    indptr: np.ndarray, indices: np.ndarray, lower: np.ndarray, pivots: np.ndarray
) -> np.ndarray:  # pragma: no cover - compiled
    """Z = (L·D·Lᵀ)⁻¹ on the pattern of L (unit lower, diagonal stored first per column).

    Blocked by supernodes: for a supernode J with rows R below it,
    Y = L_RJ·L_JJ⁻¹, Z_RJ = −Z_RR·Y and Z_JJ = L_JJ⁻ᵀ·D_J⁻¹·L_JJ⁻¹ − Yᵀ·Z_RJ,
    Z_RR gathered from the supernodes already done (the product is the BLAS
    call that carries most of the work).
    """
    n = indptr.shape[0] - 1
    z = np.zeros(lower.shape[0], np.float64)
    starts = supernodes(indptr, indices)
    column_supernode = np.empty(n, np.int64)
    for s in range(starts.shape[0] - 1):
        column_supernode[starts[s] : starts[s + 1]] = s
    for s in range(starts.shape[0] - 2, -1, -1):
        j0 = starts[s]
        j1 = starts[s + 1]
        width = j1 - j0
        # rows below the block: the tail of the last column of the supernode
        tail_first = indptr[j1 - 1] + 1
        height = indptr[j1] - tail_first
        rows = indices[tail_first : indptr[j1]]
        ljj, lrj = _supernode_block(indptr, lower, j0, width, height)
        linv, zjj = _diagonal_block(ljj, pivots[j0:j1])
        if height > 0:
            zrr = _gather(z, indptr, indices, rows, starts, column_supernode)
            zry = _below_block(lrj, linv, zrr, zjj)
            for c in range(width):
                p = indptr[j0 + c] + width - c
                for a in range(height):
                    z[p + a] = -zry[a, c]
        for c in range(width):
            p = indptr[j0 + c]
            for a in range(c, width):
                z[p + a - c] = zjj[a, c]
    return z


@njit(cache=True, nogil=True)
def _supernode_block(
    indptr: np.ndarray, lower: np.ndarray, j0: int, width: int, height: int
) -> tuple[np.ndarray, np.ndarray]:  # pragma: no cover - compiled
    """The supernode's dense unit lower L_JJ (width²) and the rows below it, L_RJ."""
    ljj = np.zeros((width, width))
    lrj = np.empty((height, width))
    for c in range(width):
        p = indptr[j0 + c]
        for a in range(c, width):
            ljj[a, c] = lower[p + a - c]
        for a in range(height):
            lrj[a, c] = lower[p + width - c + a]
    return ljj, lrj


@njit(cache=True, nogil=True)
def _diagonal_block(
    ljj: np.ndarray, pivots: np.ndarray
) -> tuple[np.ndarray, np.ndarray]:  # pragma: no cover - compiled
    """L_JJ⁻¹ and L_JJ⁻ᵀ·D_J⁻¹·L_JJ⁻¹ (lower triangle): loops for a narrow block, BLAS else."""
    width = ljj.shape[0]
    if width > 24:
        linv = np.ascontiguousarray(np.linalg.inv(ljj))
        return linv, np.dot(linv.T / pivots, linv)
    # L_JJ⁻¹ by forward substitution (unit diagonal)
    linv = np.zeros((width, width))
    for c in range(width):
        linv[c, c] = 1.0
        for a in range(c + 1, width):
            total = 0.0
            for b in range(c, a):
                total += ljj[a, b] * linv[b, c]
            linv[a, c] = -total
    zjj = np.zeros((width, width))
    for a in range(width):
        for b in range(a + 1):
            total = 0.0
            for k in range(a, width):
                total += linv[k, a] * linv[k, b] / pivots[k]
            zjj[a, b] = total
    return linv, zjj


@njit(cache=True, nogil=True)
def _below_block(
    lrj: np.ndarray, linv: np.ndarray, zrr: np.ndarray, zjj: np.ndarray
) -> np.ndarray:  # pragma: no cover - compiled
    """Z_RR·Y with Y = L_RJ·L_JJ⁻¹ (= −Z_RJ); adds Yᵀ·Z_RR·Y to ``zjj`` (lower triangle).

    Small products by loops, large ones by BLAS (measured crossovers).
    """
    height, width = lrj.shape
    y = np.dot(lrj, linv) if height * width > 64 else _small_product(lrj, linv)
    zry = np.dot(zrr, y) if height * height * width > 4096 else _small_product(zrr, y)
    if height * width * width > 4096:
        zjj += np.dot(y.T, zry)
        return zry
    for a in range(width):
        for b in range(a + 1):
            total = 0.0
            for k in range(height):
                total += y[k, a] * zry[k, b]
            zjj[a, b] += total
    return zry


@njit(cache=True, nogil=True)
def _gather(
    z: np.ndarray,
    indptr: np.ndarray,
    indices: np.ndarray,
    rows: np.ndarray,
    starts: np.ndarray,
    column_supernode: np.ndarray,
) -> np.ndarray:  # pragma: no cover - compiled
    """Z_RR (dense, both triangles) from the columns of the supernodes already done.

    The rows R fall into a few later supernodes T.  Within T every column
    shares the rows below T, so the positions of R's later rows among them
    are found once per T (binary search) and serve all of T's columns.
    """
    height = rows.shape[0]
    zrr = np.empty((height, height))
    below = np.empty(height, np.int64)
    b = 0
    while b < height:
        t = column_supernode[rows[b]]
        t1 = starts[t + 1]
        b2 = b
        while b2 < height and rows[b2] < t1:
            b2 += 1
        tail_first = indptr[t1 - 1] + 1
        tail_last = indptr[t1]
        for a in range(b2, height):  # position of rows[a] among the rows below T
            lo, hi = tail_first, tail_last
            while lo < hi:
                mid = (lo + hi) >> 1
                if indices[mid] < rows[a]:
                    lo = mid + 1
                else:
                    hi = mid
            below[a] = lo - tail_first
        for bb in range(b, b2):
            c = rows[bb]
            pc = indptr[c]
            for a in range(bb, b2):
                value = z[pc + rows[a] - c]
                zrr[a, bb] = value
                zrr[bb, a] = value
            offset = pc + t1 - c
            for a in range(b2, height):
                value = z[offset + below[a]]
                zrr[a, bb] = value
                zrr[bb, a] = value
        b = b2
    return zrr


@njit(cache=True, nogil=True)
def _small_product(a: np.ndarray, b: np.ndarray) -> np.ndarray:  # pragma: no cover - compiled
    out = np.zeros((a.shape[0], b.shape[1]))
    for i in range(a.shape[0]):
        for k in range(a.shape[1]):
            aik = a[i, k]
            if aik != 0.0:
                for j in range(b.shape[1]):
                    out[i, j] += aik * b[k, j]
    return out


@njit(cache=True, nogil=True)
def selected_inverse_columns(
    indptr: np.ndarray, indices: np.ndarray, lower: np.ndarray, pivots: np.ndarray
) -> np.ndarray:  # pragma: no cover - compiled
    """The same as ``selected_inverse``, one column at a time (the plain recurrences).

    Kept as the readable form of the algorithm and as a check on the blocked one.
    """
    n = indptr.shape[0] - 1
    z = np.zeros(lower.shape[0], np.float64)
    slot = np.full(n, -1, np.int64)
    acc = np.zeros(n, np.float64)
    for j in range(n - 1, -1, -1):
        first = indptr[j] + 1
        last = indptr[j + 1]
        for q in range(first, last):
            slot[indices[q]] = q - first
            acc[q - first] = 0.0
        for b in range(last - first):
            k = indices[first + b]
            l_kj = lower[first + b]
            acc[b] += z[indptr[k]] * l_kj  # Z_kk·L_kj
            for zq in range(indptr[k] + 1, indptr[k + 1]):
                c = slot[indices[zq]]
                if c >= 0:
                    z_rk = z[zq]
                    acc[c] += z_rk * l_kj  # Z_rk·L_kj into Z_rj
                    acc[b] += z_rk * lower[first + c]  # Z_kr·L_rj into Z_kj
        diagonal = 1.0 / pivots[j]
        for b in range(last - first):
            z[first + b] = -acc[b]
            diagonal += lower[first + b] * acc[b]
            slot[indices[first + b]] = -1
        z[indptr[j]] = diagonal
    return z


@njit(cache=True, nogil=True)
def lookup(
    indptr: np.ndarray, indices: np.ndarray, rows: np.ndarray, cols: np.ndarray
) -> np.ndarray:  # pragma: no cover - compiled
    """Data positions of (rows[p], cols[p]) in a CSC pattern with sorted rows; −1 if absent."""
    out = np.empty(rows.shape[0], np.int64)
    for p in range(rows.shape[0]):
        lo = indptr[cols[p]]
        hi = indptr[cols[p] + 1]
        target = rows[p]
        while lo < hi:
            mid = (lo + hi) >> 1
            if indices[mid] < target:
                lo = mid + 1
            else:
                hi = mid
        out[p] = lo if lo < indptr[cols[p] + 1] and indices[lo] == target else -1
    return out
