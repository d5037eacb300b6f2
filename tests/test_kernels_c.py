"""The engine's kernels in C against their numba build, to the last bit, and against bad input.

``kernels`` serves the C extension when it is built (an install builds it) and numba's
kernels otherwise; every adjustment's figures must not depend on which one loaded, so the
two are compared bit for bit on random sparse problems, including supernodes wide enough
for the BLAS/LAPACK paths.  The selected inverse is also checked against numpy's dense
inverse (an independent computation).  The C build must turn malformed index arrays into
ValueError, never into a read or write outside an array.
"""

from __future__ import annotations

import ast
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse

from server.engine import backends, kernels, kernels_numba

pytestmark = pytest.mark.skipif(
    kernels.IMPLEMENTATION != "C",
    reason="the C kernels are not built (pip install -e . or python setup.py build_ext -i)",
)

ROOT = Path(__file__).resolve().parents[1]
BACKENDS = ["superlu"] + (["cholmod"] if backends.cholmod_available() else [])

# (unknowns, rows of A, most unknowns in a row): leveling-like pairs, a few per row, rows long
# enough to make single columns with hundreds of rows below them (the products numba hands to
# dgemv), and "grid": a 30 x 30 mesh, whose separators make supernodes of every size
# (L_JJ⁻¹ by LAPACK, each of the three products by dgemm)
PROBLEMS = [(400, 1600, 2), (150, 600, 6), (200, 400, 40), "grid"]


def _bits(array: np.ndarray) -> np.ndarray:
    """The array's bytes as integers: equal means equal to the last bit (and the sign of 0)."""
    array = np.ascontiguousarray(array)
    return array.view(np.int64) if array.dtype == np.float64 else array


def _assert_identical(got, expected) -> None:
    got, expected = np.asarray(got), np.asarray(expected)
    assert got.dtype == expected.dtype and got.shape == expected.shape
    assert np.array_equal(_bits(got), _bits(expected))


def _rows(seed: int, n: int, m: int, longest: int):
    """A random design: m rows, each with 1 … ``longest`` distinct unknowns, plus one row per
    unknown so that AᵀPA is positive definite."""
    rng = np.random.default_rng(seed)
    sizes = rng.integers(1, longest + 1, m)
    cols = [rng.choice(n, size=int(k), replace=False) for k in sizes] + [[j] for j in range(n)]
    return _design(rng, n, cols)


def _grid(seed: int, side: int = 30):
    """A mesh: each node, each pair of neighbours and each cell's four corners one row."""
    rng = np.random.default_rng(seed)
    cols: list[list[int]] = []
    for i in range(side):
        for j in range(side):
            here = i * side + j
            cols.append([here])
            if j + 1 < side:
                cols.append([here, here + 1])
            if i + 1 < side:
                cols.append([here, here + side])
            if i + 1 < side and j + 1 < side:
                cols.append([here, here + side + 1, here + 1, here + side])
    return _design(rng, side * side, cols)


def _design(rng, n, cols):
    row_ptr = np.concatenate([[0], np.cumsum([len(c) for c in cols])]).astype(np.int64)
    slot_col = np.concatenate(cols).astype(np.int64)
    values = rng.normal(size=slot_col.size)
    weights = rng.uniform(0.1, 10.0, row_ptr.size - 1)
    return rng, n, row_ptr, slot_col, values, weights


def _problem(number: int):
    shape = PROBLEMS[number]
    return _grid(number) if shape == "grid" else _rows(number, *shape)


def _factor(n, row_ptr, slot_col, values, weights, backend):
    pattern = backends.NormalPattern(n, row_ptr, slot_col)
    matrix = pattern.matrix(pattern.fill(values, weights))
    factorization = backends.make_factorization(backend)
    factorization.factorize(matrix, check=True)
    return matrix, factorization.ldl()


@pytest.mark.parametrize("problem", range(len(PROBLEMS)))
def test_normal_matrix_kernels_match_numba_bit_for_bit(problem):
    rng, n, row_ptr, slot_col, values, weights = _problem(problem)
    got = kernels.normal_pattern(n, row_ptr, slot_col)
    expected = kernels_numba.normal_pattern(n, row_ptr, slot_col)
    for g, e in zip(got, expected):
        _assert_identical(g, e)
    indptr, indices, pair_ptr, targets = got
    data = kernels.fill_normal(int(indptr[-1]), row_ptr, values, weights, pair_ptr, targets)
    _assert_identical(
        data,
        kernels_numba.fill_normal(int(indptr[-1]), row_ptr, values, weights, pair_ptr, targets),
    )
    q_data = rng.normal(size=data.size)
    _assert_identical(
        kernels.row_quadratic(row_ptr, values, pair_ptr, targets, q_data),
        kernels_numba.row_quadratic(row_ptr, values, pair_ptr, targets, q_data),
    )
    # independent: scipy's sparse product AᵀPA
    a = scipy.sparse.csr_matrix((values, slot_col, row_ptr), shape=(row_ptr.size - 1, n))
    expected_n = (a.T @ scipy.sparse.diags(weights) @ a).tocsc()
    expected_n.sort_indices()
    got_n = scipy.sparse.csc_matrix((data, indices, indptr), shape=(n, n))
    np.testing.assert_allclose(got_n.toarray(), expected_n.toarray(), rtol=1e-13, atol=1e-12)


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("problem", range(len(PROBLEMS)))
def test_selected_inverse_matches_numba_bit_for_bit_and_the_dense_inverse(problem, backend):
    rng, n, row_ptr, slot_col, values, weights = _problem(problem)
    matrix, (indptr, indices, unit, pivots, order) = _factor(
        n, row_ptr, slot_col, values, weights, backend
    )
    starts = kernels.supernodes(indptr, indices)
    _assert_identical(starts, kernels_numba.supernodes(indptr, indices))
    blocked = kernels.selected_inverse(indptr, indices, unit, pivots)
    _assert_identical(blocked, kernels_numba.selected_inverse(indptr, indices, unit, pivots))
    plain = kernels.selected_inverse_columns(indptr, indices, unit, pivots)
    _assert_identical(plain, kernels_numba.selected_inverse_columns(indptr, indices, unit, pivots))
    # independent: numpy's dense inverse of N, read on the factor's pattern
    inverse = np.linalg.inv(matrix.toarray())[np.ix_(order, order)]
    columns = np.repeat(np.arange(n), np.diff(indptr))
    np.testing.assert_allclose(blocked, inverse[indices, columns], rtol=1e-9, atol=1e-13)
    np.testing.assert_allclose(plain, inverse[indices, columns], rtol=1e-9, atol=1e-13)
    rows = rng.integers(0, n, 2000)
    cols = rng.integers(0, n, 2000)
    found = kernels.lookup(indptr, indices, rows, cols)
    _assert_identical(found, kernels_numba.lookup(indptr, indices, rows, cols))
    dense_pattern = np.zeros((n, n), bool)
    dense_pattern[indices, columns] = True
    assert np.array_equal(found >= 0, dense_pattern[rows, cols])
    assert np.array_equal(indices[found[found >= 0]], rows[found >= 0])
    widths = np.diff(starts)
    heights = indptr[starts[1:]] - indptr[starts[1:] - 1] - 1
    if problem == 2 and backend == "superlu":  # (CHOLMOD makes it one dense supernode)
        assert np.any((widths == 1) & (heights * heights > 4096))  # Z_RR·Y by dgemv
    if problem == 3:  # the mesh reaches LAPACK and every dgemm of the blocked kernel
        assert widths.max() > 24  # L_JJ⁻¹ by LAPACK
        assert np.any((widths > 1) & (heights > 1) & (heights * widths * widths > 4096))


def test_selected_inverse_of_a_dense_block_with_one_row_below():
    """A supernode of 70 columns over a single row (numba's vector-times-matrix dgemv), the
    factor taken from numpy's dense Cholesky: N = C·Cᵀ, L = C·diag(C)⁻¹, D = diag(C)²."""
    rng = np.random.default_rng(5)
    n = 73
    structure = np.eye(n, dtype=bool)
    structure[:70, :70] = True  # the block
    structure[71, :70] = structure[:70, 71] = True  # its row below, skipping 70
    structure[72, 70:] = structure[70:, 72] = True
    a = rng.normal(size=(n, n)) * structure
    matrix = a @ a.T * structure + n * np.eye(n)
    cholesky = np.linalg.cholesky(matrix)
    lower = cholesky / np.diag(cholesky)
    pivots = np.diag(cholesky) ** 2
    sparse_lower = scipy.sparse.csc_matrix(np.where(np.tril(structure), lower, 0.0))
    sparse_lower.sort_indices()
    indptr = sparse_lower.indptr.astype(np.int64)
    indices = sparse_lower.indices.astype(np.int64)
    unit = sparse_lower.data
    starts = kernels.supernodes(indptr, indices)
    assert starts[1] == 70 and indptr[70] - indptr[69] == 2  # width 70, one row below
    blocked = kernels.selected_inverse(indptr, indices, unit, pivots)
    _assert_identical(blocked, kernels_numba.selected_inverse(indptr, indices, unit, pivots))
    columns = np.repeat(np.arange(n), np.diff(indptr))
    inverse = np.linalg.inv(matrix)
    np.testing.assert_allclose(blocked, inverse[indices, columns], rtol=1e-9, atol=1e-13)


def _valid_factor():
    _, n, row_ptr, slot_col, values, weights = _rows(7, 60, 200, 4)
    _, (indptr, indices, unit, pivots, _) = _factor(
        n, row_ptr, slot_col, values, weights, "superlu"
    )
    return n, row_ptr, slot_col, values, weights, indptr, indices, unit, pivots


def _corrupt(array: np.ndarray, where: int, value) -> np.ndarray:
    copy = array.copy()
    copy[where] = value
    return copy


def test_bad_index_arrays_raise_value_error():
    n, row_ptr, slot_col, values, weights, indptr, indices, unit, pivots = _valid_factor()
    pat_indptr, _, pair_ptr, targets = kernels.normal_pattern(n, row_ptr, slot_col)
    nnz = int(pat_indptr[-1])
    big = 1 << 40
    calls = [
        lambda: kernels.normal_pattern(n, row_ptr, _corrupt(slot_col, 3, n)),
        lambda: kernels.normal_pattern(n, row_ptr, _corrupt(slot_col, 3, -1)),
        lambda: kernels.normal_pattern(n, _corrupt(row_ptr, 5, row_ptr[7]), slot_col),
        lambda: kernels.normal_pattern(n, _corrupt(row_ptr, -1, big), slot_col),
        lambda: kernels.normal_pattern(-1, row_ptr, slot_col),
        lambda: kernels.normal_pattern(n, row_ptr, slot_col.astype(np.float64)),
        lambda: kernels.normal_pattern(n, row_ptr, slot_col.astype(np.int32)),
        lambda: kernels.fill_normal(
            nnz, row_ptr, values, weights, pair_ptr, _corrupt(targets, 9, nnz)
        ),
        lambda: kernels.fill_normal(
            nnz, row_ptr, values, weights, pair_ptr, _corrupt(targets, 0, -5)
        ),
        lambda: kernels.fill_normal(
            nnz, row_ptr, values, weights, _corrupt(pair_ptr, 4, big), targets
        ),
        lambda: kernels.fill_normal(nnz, row_ptr, values[:-3], weights, pair_ptr, targets),
        lambda: kernels.fill_normal(nnz, row_ptr, values, weights[:-1], pair_ptr, targets),
        lambda: kernels.fill_normal(
            nnz, _corrupt(row_ptr, 2, -4), values, weights, pair_ptr, targets
        ),
        lambda: kernels.row_quadratic(row_ptr, values, pair_ptr, targets, np.ones(nnz - 1)),
        lambda: kernels.row_quadratic(row_ptr, values, pair_ptr[:5], targets, np.ones(nnz)),
        lambda: kernels.supernodes(_corrupt(indptr, -1, indptr[-1] + 1), indices),
        lambda: kernels.supernodes(_corrupt(indptr, 3, -big), indices),
        lambda: kernels.selected_inverse(_corrupt(indptr, -1, big), indices, unit, pivots),
        lambda: kernels.selected_inverse(indptr, _corrupt(indices, 1, n), unit, pivots),
        lambda: kernels.selected_inverse(indptr, _corrupt(indices, 1, -1), unit, pivots),
        lambda: kernels.selected_inverse(indptr, _corrupt(indices, 0, 1), unit, pivots),  # diagonal
        lambda: kernels.selected_inverse(indptr, indices, unit, pivots[:-1]),
        lambda: kernels.selected_inverse(indptr, indices, unit[:-1], pivots),
        lambda: kernels.selected_inverse_columns(indptr, _corrupt(indices, 2, big), unit, pivots),
        lambda: kernels.selected_inverse_columns(
            _corrupt(indptr, 4, indptr[6]), indices, unit, pivots
        ),
        lambda: kernels.lookup(indptr, indices, np.array([0]), np.array([n])),
        lambda: kernels.lookup(indptr, indices, np.array([0]), np.array([-1])),
        lambda: kernels.lookup(indptr, indices, np.array([0, 1]), np.array([0])),
        lambda: kernels.lookup(_corrupt(indptr, 2, big), indices, np.array([0]), np.array([1])),
    ]
    for number, call in enumerate(calls):
        with pytest.raises(ValueError):
            call()
            pytest.fail(f"call {number} accepted a bad array")


def test_a_factor_pattern_that_is_not_filled_raises_value_error():
    """Column j holds rows a < b below its diagonal, so its recurrence needs Z_ba: with row b
    taken out of column a, numba would read a wrong element (or past the array); the C build
    says the pattern is not filled."""
    n, *_, indptr, indices, unit, pivots = _valid_factor()
    j = int(np.flatnonzero(np.diff(indptr) > 2)[0])
    a, b = indices[indptr[j] + 1], indices[indptr[j] + 2]
    column_a = indices[indptr[a] : indptr[a + 1]]
    drop = int(indptr[a] + np.flatnonzero(column_a == b)[0])
    keep = np.ones(indices.size, bool)
    keep[drop] = False
    thinned = indptr - (np.arange(n + 1) > a)
    kernels_numba.selected_inverse(thinned, indices[keep], unit[keep], pivots)  # no error there
    with pytest.raises(ValueError, match="not filled"):
        kernels.selected_inverse(thinned, indices[keep], unit[keep], pivots)


def test_random_corruptions_never_crash():
    """Indices overwritten at random: each call returns or raises ValueError.  Run in a child
    process so that a crash fails this test instead of ending the test session."""
    script = r"""
import numpy as np
from tests.test_kernels_c import _valid_factor
from server.engine import kernels
n, row_ptr, slot_col, values, weights, indptr, indices, unit, pivots = _valid_factor()
_, _, pair_ptr, targets = kernels.normal_pattern(n, row_ptr, slot_col)
rng = np.random.default_rng(11)
outcomes = {"ok": 0, "ValueError": 0}
def hit(array):
    copy = array.copy()
    for _ in range(int(rng.integers(1, 4))):
        copy[rng.integers(0, copy.size)] = rng.choice(
            [-1, 0, 1, n - 1, n, n + 1, int(rng.integers(-3 * n, 3 * n)), 1 << 40])
    return copy
for trial in range(3000):
    kind = trial % 6
    try:
        if kind == 0:
            kernels.normal_pattern(n, hit(row_ptr), hit(slot_col))
        elif kind == 1:
            kernels.fill_normal(int(targets.max()) + 1, hit(row_ptr), values, weights,
                                hit(pair_ptr), hit(targets))
        elif kind == 2:
            kernels.row_quadratic(row_ptr, values, hit(pair_ptr), hit(targets), np.ones(50))
        elif kind == 3:
            kernels.selected_inverse(hit(indptr), hit(indices), unit, pivots)
        elif kind == 4:
            kernels.selected_inverse_columns(indptr, hit(indices), unit, pivots)
        else:
            kernels.lookup(hit(indptr), indices, hit(indices[:200]), hit(indices[:200]))
        outcomes["ok"] += 1
    except ValueError:
        outcomes["ValueError"] += 1
print(outcomes)
"""
    proc = subprocess.run(
        [sys.executable, "-c", script], capture_output=True, text=True, timeout=300, cwd=ROOT
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    outcomes = ast.literal_eval(proc.stdout.strip())
    assert outcomes["ValueError"] > 1000  # most corruptions are caught, and nothing crashed


def test_numba_is_not_imported_with_the_c_kernels():
    script = (
        "import sys\nfrom server.engine import kernels\nkernels.warm_up()\n"
        "assert kernels.IMPLEMENTATION == 'C'\nassert 'numba' not in sys.modules\n"
    )
    subprocess.run([sys.executable, "-c", script], check=True, timeout=60, cwd=ROOT)


def test_without_the_extension_numba_serves_the_same_numbers(tmp_path):
    """The fallback's wiring: with the extension unavailable, kernels.py serves numba's
    kernels (or plain Python), and they give this build's selected inverse bit for bit."""
    _, n, row_ptr, slot_col, values, weights = _problem(1)
    _, (indptr, indices, unit, pivots, _) = _factor(
        n, row_ptr, slot_col, values, weights, "superlu"
    )
    expected = kernels.selected_inverse(indptr, indices, unit, pivots)
    script = (
        "import sys\nimport numpy as np\n"
        "sys.modules['server.engine._kernels_c'] = None  # import fails: not built\n"
        "from server.engine import kernels\n"
        "assert kernels.IMPLEMENTATION in ('numba', 'Python'), kernels.IMPLEMENTATION\n"
        "arrays = np.load(sys.argv[1])\n"
        "z = kernels.selected_inverse(*(arrays[k] for k in ('p', 'i', 'l', 'd')))\n"
        "sys.stdout.write(z.tobytes().hex())\n"
    )
    saved = tmp_path / "factor.npz"
    np.savez(saved, p=indptr, i=indices, l=unit, d=pivots)
    proc = subprocess.run(
        [sys.executable, "-c", script, str(saved)],
        capture_output=True,
        text=True,
        timeout=120,
        cwd=ROOT,
    )
    assert proc.returncode == 0, proc.stderr[-2000:]
    assert proc.stdout == expected.tobytes().hex()
