"""The sparse engine against the dense one, and the assembly's fixed layout of A.

What a surveyor relies on: whichever algebra the program picks (dense for a
small job; sparse with CHOLMOD, or SciPy's SuperLU where CHOLMOD is not
installed), the adjusted coordinates, standard deviations, ellipses,
redundancy numbers, w-tests, MDBs and relative ellipses are the same.  The
dense path (full Qxx = N⁻¹) is the reference; agreement is asked to 1e-9
relative.
"""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from server.engine import backends as sparse
from server.engine import diagnosis, kernels
from server.engine import gauss_newton as engine
from server.errors import NetworkError
from server.fieldbook.parser import parse_fieldbook
from server.model.assembly import Assembly, ControlEquation
from server.model.network import build_network
from server.pipeline import adjust_fieldbook
from server.results.json_writer import json_bytes
from server.results.result import build_result
from tests.synthetic import grid_network

BACKENDS = ["superlu"] + (["cholmod"] if sparse.cholmod_available() else [])


def _result(text: str, method: str, factorization: str | None = None):
    fieldbook = parse_fieldbook(text)
    network = build_network(fieldbook)
    solution = engine.adjust(network, method=method, factorization=factorization)
    return build_result(network, solution, (), []), solution


def _figures(result) -> np.ndarray:
    """Every number of a result a surveyor reads, in a fixed order."""
    out: list[float] = []
    for p in result.points:
        out += [
            p.east or 0.0,
            p.north or 0.0,
            p.height or 0.0,
            p.sd_east or 0.0,
            p.sd_north or 0.0,
            p.sd_height or 0.0,
        ]
        if p.ellipse is not None:
            out += [p.ellipse.semi_major, p.ellipse.semi_minor, p.ellipse.azimuth]
    for o in result.observations:
        out += [o.adjusted or 0.0, o.residual or 0.0, o.redundancy or 0.0, o.w or 0.0, o.mdb or 0.0]
    for r in result.relative:
        out += [r.semi_major, r.semi_minor, r.azimuth, r.sd_distance]
    out.append(result.summary.variance_factor or 0.0)
    return np.array(out)


def _assert_same(a, b, rtol=1e-9):
    fa, fb = _figures(a), _figures(b)
    assert fa.shape == fb.shape
    # relative where a figure is not tiny; residuals near zero compared absolutely (1e-9 m, ″)
    np.testing.assert_allclose(fa, fb, rtol=rtol, atol=1e-9)


def _leveling(seed: int, marks: int = 80, sections: int = 200, weighted: bool = False) -> str:
    rng = np.random.default_rng(seed)
    heights = 100 + rng.normal(0, 5, marks)
    lines = ["defaults level=1.0mm/sqrtkm", f"point M0 height={heights[0]:.5f} fix"]
    if weighted:
        lines.append(f"point M1 height={heights[1] + 0.004:.5f} sd=3mm")
    pairs = [(k, k + 1) for k in range(marks - 1)]
    while len(pairs) < sections:
        i, j = rng.choice(marks, 2, replace=False)
        pairs.append((int(i), int(j)))
    for i, j in pairs:
        length = rng.uniform(0.2, 2.0)
        dh = heights[j] - heights[i] + rng.normal(0, 1e-3 * math.sqrt(length))
        lines.append(f"level M{i} M{j} {dh:+.6f} len={length:.3f}km")
    return "\n".join(lines) + "\n"


def _horizontal(seed: int, **options) -> str:
    return grid_network(np.random.default_rng(seed), size=6, **options).text


NETWORKS = {
    "leveling": _leveling(1),
    "leveling with a weighted benchmark": _leveling(2, weighted=True),
    "2D held control": _horizontal(3),
    "2D with centering": _horizontal(4).replace("centering=0mm", "centering=1.5mm"),
    "2D free network": _horizontal(5, fixed=()),
    "2D free network with an azimuth": _horizontal(6, fixed=())
    + "azimuth P0_0 P0_1 12:34:56 sd=5sec\n",
    "2D weighted control": _horizontal(7).replace(" fix", " sd=5mm"),
}


@pytest.mark.parametrize("backend", BACKENDS)
@pytest.mark.parametrize("name", list(NETWORKS))
def test_sparse_path_reproduces_the_dense_path(name, backend):
    """The dense LAPACK back end and each sparse one: coordinates, σ, ellipses, r_i, w, MDB
    and relative ellipses agree to 1e-9."""
    text = NETWORKS[name]
    if name == "2D free network with an azimuth":
        # one azimuth fixes rotation: translation only is free
        assert build_network(parse_fieldbook(text)).free_datum == ("translation",)
    dense, dense_solution = _result(text, "dense")
    sparse_result, sparse_solution = _result(text, "sparse", backend)
    assert dense_solution.method == "dense" and sparse_solution.method == backend
    assert dense.summary.redundancy == sparse_result.summary.redundancy
    assert dense.summary.iterations == sparse_result.summary.iterations
    _assert_same(dense, sparse_result)


def _bordered_inverse(network, solution):
    """Qxx of the inner-constraint solution by the bordered system [[N, G], [Gᵀ, 0]]⁻¹,
    with N and G formed here at the solution (independent of the S-transformation)."""
    import scipy.linalg

    from server.engine.datum import inner_constraints
    from server.engine.state import State

    state = State(network, solution.coordinates)
    state.orientation[:] = [solution.orientations[line] for line in state.round_lines]
    assembly = state.assembly(state.column)
    evaluation = assembly.evaluate(*state.arrays())
    design = assembly.design_matrix(evaluation.slot_val, len(network.parameters)).toarray()
    normal = design.T @ (design / evaluation.sigmas[:, None] ** 2)
    g = inner_constraints(state) * math.sqrt(np.abs(np.diag(normal)).max())
    k = g.shape[1]
    bordered = np.block([[normal, g], [g.T, np.zeros((k, k))]])
    return scipy.linalg.inv(bordered)[: len(normal), : len(normal)]


@pytest.mark.parametrize("method", ["dense"] + BACKENDS)
def test_free_network_covariance_is_the_inner_constraint_one(method):
    """S-transformed minimal-datum Qxx equals the bordered system's, off the pattern too."""
    text = NETWORKS["2D free network"]
    network = build_network(parse_fieldbook(text))
    backend = None if method == "dense" else method
    solution = engine.adjust(
        network, method="dense" if method == "dense" else "sparse", factorization=backend
    )
    n = len(network.parameters)
    full = _bordered_inverse(network, solution)
    rows, cols = np.meshgrid(np.arange(n), np.arange(n), indexing="ij")
    got = solution.covariance_entries(rows.ravel(), cols.ravel()).reshape(n, n)
    np.testing.assert_allclose(got, full, rtol=1e-8, atol=1e-12 * np.abs(full).max())
    # inner constraints: the coordinate corrections have no mean shift
    e_cols = [k for k, p in enumerate(network.parameters) if p.kind == "E"]
    assert abs(full[np.ix_(e_cols, e_cols)].sum()) < 1e-9 * np.abs(full).max() * len(e_cols) ** 2
    assert abs(got[np.ix_(e_cols, e_cols)].sum()) < 1e-9 * np.abs(full).max() * len(e_cols) ** 2


@pytest.mark.parametrize("backend", BACKENDS)
def test_covariance_off_the_pattern_is_solved_exactly(backend):
    """Pairs not joined by any observation (not on the factor's pattern) still come out right."""
    text = NETWORKS["leveling"]
    network = build_network(parse_fieldbook(text))
    dense = engine.adjust(network, method="dense")
    sparse_solution = engine.adjust(network, method="sparse", factorization=backend)
    n = len(network.parameters)
    index = [0, 5, n // 2, n - 1]
    np.testing.assert_allclose(
        sparse_solution.covariance_block(index), dense.covariance_block(index), rtol=1e-10
    )


def test_fallback_is_chosen_by_the_environment(monkeypatch):
    """STATIONFIT_FACTORIZATION=superlu forces SciPy's SuperLU even where CHOLMOD is installed."""
    monkeypatch.setenv(sparse.BACKEND_VARIABLE, "superlu")
    assert sparse.choose_backend() == "superlu"
    network = build_network(parse_fieldbook(NETWORKS["2D held control"]))
    solution = engine.adjust(network, method="sparse")
    assert solution.method == "superlu"
    monkeypatch.setenv(sparse.BACKEND_VARIABLE, "nonsense")
    with pytest.raises(ValueError, match="back end"):
        sparse.choose_backend()


def test_automatic_choice_is_dense_for_tiny_and_sparse_for_larger_networks():
    tiny = "defaults level=1mm\npoint A height=0 fix\nlevel A B 1\nlevel B A -1.001\n"
    assert engine.adjust(build_network(parse_fieldbook(tiny))).method == "dense"
    larger = build_network(parse_fieldbook(NETWORKS["leveling"]))
    assert len(larger.parameters) > engine.DENSE_LIMIT
    assert engine.adjust(larger).method in ("cholmod", "superlu")


# --------------------------------------------------------------------------- the pieces


def test_coincident_points_are_named_not_divided_by_zero():
    used = parse_fieldbook("defaults distance=2mm\ndistance A B 10\n").observations
    assembly = Assembly(
        used,
        {"A": 0, "B": 1},
        {},
        np.array([0, 2]),
        np.array([1, 3]),
        np.array([-1, -1]),
        np.zeros(0, np.int64),
        [],
    )
    same = np.array([5.0, 5.0])
    with pytest.raises(NetworkError) as caught:
        assembly.evaluate(same, same, np.zeros(2), np.zeros(0))
    assert set(caught.value.points) == {"A", "B"}


def test_control_rows_observe_one_component():
    used = parse_fieldbook("defaults level=1mm\nlevel A B 1\n").observations
    assembly = Assembly(
        used,
        {"A": 0, "B": 1},
        {},
        np.array([-1, -1]),
        np.array([-1, -1]),
        np.array([-1, 0]),
        np.zeros(0, np.int64),
        [ControlEquation(1, 2, 7.5, 0.002)],
    )
    evaluation = assembly.evaluate(np.zeros(2), np.zeros(2), np.array([1.0, 2.0]), np.zeros(0))
    assert evaluation.misclosure.tolist() == pytest.approx([0.0, 5.5])
    assert evaluation.sigmas[1] == 0.002


def _random_rows(rng, n=120, m=400):
    row_ptr, cols = [0], []
    for _ in range(m):
        k = int(rng.integers(1, 7))
        cols += list(rng.choice(n, size=k, replace=False))
        row_ptr.append(len(cols))
    return n, np.array(row_ptr, np.int64), np.array(cols, np.int64)


def test_normal_matrix_refill_equals_the_sparse_product():
    import scipy.sparse

    rng = np.random.default_rng(1)
    n, row_ptr, cols = _random_rows(rng)
    values = rng.normal(size=cols.size)
    weights = rng.uniform(0.1, 10.0, row_ptr.size - 1)
    pattern = sparse.NormalPattern(n, row_ptr, cols)
    a = scipy.sparse.csr_matrix((values, cols, row_ptr), shape=(row_ptr.size - 1, n))
    expected = (a.T @ scipy.sparse.diags(weights) @ a).toarray()
    got = pattern.matrix(pattern.fill(values, weights)).toarray()
    np.testing.assert_allclose(got, expected, rtol=1e-13, atol=1e-12)
    assert np.array_equal(got, got.T)  # symmetric to the last bit


@pytest.mark.parametrize("backend", BACKENDS)
def test_selected_inverse_equals_the_dense_inverse_on_the_factor_pattern(backend):
    rng = np.random.default_rng(2)
    n, row_ptr, cols = _random_rows(rng, n=150, m=600)
    pattern = sparse.NormalPattern(n, row_ptr, cols)
    matrix = pattern.matrix(
        pattern.fill(rng.normal(size=cols.size), rng.uniform(1, 2, row_ptr.size - 1))
    )
    factorization = sparse.make_factorization(backend)
    factorization.factorize(matrix, check=True)
    indptr, indices, unit, pivots, order = factorization.ldl()
    blocked = kernels.selected_inverse(indptr, indices, unit, pivots)
    plain = kernels.selected_inverse_columns(indptr, indices, unit, pivots)
    inverse = np.linalg.inv(matrix.toarray())[np.ix_(order, order)]
    columns = np.repeat(np.arange(n), np.diff(indptr))
    np.testing.assert_allclose(blocked, inverse[indices, columns], rtol=1e-9, atol=1e-13)
    np.testing.assert_allclose(plain, blocked, rtol=1e-10, atol=1e-14)


def test_singular_normal_matrix_is_diagnosed_without_a_dense_eigendecomposition(monkeypatch):
    """A point seen by one direction only: the large-network diagnosis names it too."""
    monkeypatch.setattr(diagnosis, "DENSE_DIAGNOSIS_LIMIT", 0)
    text = NETWORKS["2D held control"] + "directions P0_0\n  LOST 10:00:00\n  P0_1 20:00:00\nend\n"
    text += "point LOST east=512100 north=184100\n"
    network = build_network(parse_fieldbook(text))
    with pytest.raises(NetworkError) as caught:
        engine.adjust(network, method="sparse", factorization="superlu")
    assert "LOST" in caught.value.points


# --------------------------------------------------------------------------- around the engine


def test_progress_reports_stages_and_iterations_in_order():
    calls: list[tuple[str, int]] = []
    result = adjust_fieldbook(
        NETWORKS["2D held control"], progress=lambda s, k: calls.append((s, k))
    )
    stages = [s for s, _ in calls]
    assert stages[:3] == ["parse", "network", "misclosures"]
    assert stages[-2:] == ["statistics", "result"]
    iterations = [k for s, k in calls if s == "iteration"]
    assert iterations == list(range(1, result.summary.iterations + 1))


@pytest.mark.parametrize("name", ["leveling", "2D with centering"])
def test_json_text_reads_back_as_the_result(name):
    data = adjust_fieldbook(NETWORKS[name]).to_json_dict()
    assert json.loads(json_bytes(data)) == data
    with pytest.raises(ValueError):
        json_bytes({"bad": [math.nan]})
