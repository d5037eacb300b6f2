"""Tests of correlated observation blocks (server.statistics.correlated).

Checks: the scalar w-test and MDB of ``quality.py`` for a diagonal block; Monte Carlo draws
through a small network of correlated 3D baselines solved here with numpy and the full
weight matrix, whose w must be standard normal and whose block statistic must follow
scipy.stats.chi2 (docs/references.md "Correlated blocks and geodetic output").
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from server.statistics import correlated, quality

# Points 0 (fixed, at the origin), 1, 2, 3 unknown in 3D; baselines as (from, to).
_BASELINES = [(0, 1), (0, 2), (1, 2), (1, 3), (2, 3), (0, 3)]


def _random_covariance(rng: np.random.Generator, diagonal: bool) -> np.ndarray:
    """A baseline-like 3×3 covariance: sd 3–12 mm, correlations up to about ±0.7."""
    sd = rng.uniform(0.003, 0.012, 3)
    if diagonal:
        return np.diag(sd * sd)
    m = rng.normal(size=(3, 3))
    spd = m @ m.T + 0.8 * np.eye(3)
    corr = spd / np.sqrt(np.outer(np.diag(spd), np.diag(spd)))
    return sd[:, None] * corr * sd[None, :]


def _network(
    rng: np.random.Generator, diagonal: bool = False, extra_height: bool = False
) -> tuple[np.ndarray, np.ndarray]:
    """Design matrix A and block-diagonal covariance Σ of the baselines (+ one z of point 4)."""
    baselines = _BASELINES + ([(3, 4)] if extra_height else [])
    points = 5 if extra_height else 4
    rows = 3 * len(baselines) + (1 if extra_height else 0)
    a = np.zeros((rows, 3 * (points - 1)))
    cov = np.zeros((rows, rows))
    for b, (frm, to) in enumerate(baselines):
        for axis in range(3):
            if frm:
                a[3 * b + axis, 3 * (frm - 1) + axis] = -1.0
            a[3 * b + axis, 3 * (to - 1) + axis] = 1.0
        cov[3 * b : 3 * b + 3, 3 * b : 3 * b + 3] = _random_covariance(rng, diagonal)
    if extra_height:  # a lone measurement of point 4's third coordinate
        a[-1, 3 * 3 + 2] = 1.0
        cov[-1, -1] = 0.004**2
    return a, cov


def _solve(a: np.ndarray, cov: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Weights P = Σ⁻¹ and Qvv = Σ − A·(AᵀPA)⁻¹·Aᵀ of the full network."""
    p = np.linalg.inv(cov)
    qxx = np.linalg.inv(a.T @ p @ a)
    return p, cov - a @ qxx @ a.T


def _blocks(matrix: np.ndarray, count: int) -> np.ndarray:
    return np.stack([matrix[3 * b : 3 * b + 3, 3 * b : 3 * b + 3] for b in range(count)])


def test_diagonal_block_gives_the_usual_w_test_and_mdb():
    rng = np.random.default_rng(11)
    a, cov = _network(rng, diagonal=True)
    p, qvv = _solve(a, cov)
    v = -(qvv @ p) @ rng.multivariate_normal(np.zeros(len(cov)), cov)
    n = len(_BASELINES)
    lambda0 = quality.non_centrality(0.001, 0.80)
    got = correlated.component_tests(
        v.reshape(n, 3),
        _blocks(p, n),
        _blocks(qvv, n),
        lambda0,
        quality.normal_critical_value(0.001),
    )
    sigmas = np.sqrt(np.diag(cov))
    r = quality.redundancy_numbers(np.diag(a @ np.linalg.inv(a.T @ p @ a) @ a.T), sigmas)
    np.testing.assert_allclose(got.redundancy.ravel(), r, rtol=1e-10)
    np.testing.assert_allclose(got.w.ravel(), quality.w_statistics(v, sigmas, r), rtol=1e-9)
    np.testing.assert_allclose(
        got.mdb.ravel(), quality.minimal_detectable_bias(sigmas, r, lambda0), rtol=1e-9
    )
    np.testing.assert_allclose(got.estimated_bias.ravel(), -v / r, rtol=1e-9)  # the contract


def _monte_carlo(
    a: np.ndarray, cov: np.ndarray, draws: int, seed: int
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Residual stacks (draws·n, 3) with the P and Qvv blocks repeated for each draw."""
    rng = np.random.default_rng(seed)
    p, qvv = _solve(a, cov)
    errors = rng.multivariate_normal(np.zeros(len(cov)), cov, size=draws)
    residuals = -errors @ (qvv @ p).T  # v = −Qvv·P·e
    n = len(cov) // 3
    v = residuals[:, : 3 * n].reshape(draws * n, 3)
    return v, np.tile(_blocks(p, n), (draws, 1, 1)), np.tile(_blocks(qvv, n), (draws, 1, 1))


def test_component_w_is_standard_normal_for_correlated_baselines():
    a, cov = _network(np.random.default_rng(3))
    draws = 4000
    v, p, qvv = _monte_carlo(a, cov, draws, seed=5)
    tests = correlated.component_tests(v, p, qvv, 17.075, 3.2905)
    assert tests.controlled.all()
    # per component of each baseline: mean 0 (5 standard errors) and sd 1 (within 5 %)
    w = tests.w.reshape(draws, -1)
    assert np.abs(w.mean(axis=0)).max() < 5.0 / np.sqrt(draws)
    np.testing.assert_allclose(w.std(axis=0), 1.0, atol=0.05)
    # the correlations matter: the naive v_i/(σ_i·√r_i) is not the same statistic
    naive = v / np.sqrt(np.einsum("nii->ni", np.linalg.inv(p)) * tests.redundancy)
    assert np.abs(naive - tests.w).max() > 0.1


def test_a_bias_in_one_component_is_estimated_and_found_by_its_w_test():
    """A 60 mm blunder added to one component of one correlated baseline: the mean of the
    estimated bias over the draws is the blunder (the estimator is unbiased), and the
    component's w-test rejects far more often than α, the block test too."""
    a, cov = _network(np.random.default_rng(3))
    p, qvv = _solve(a, cov)
    draws, row = 3000, 3 * 2 + 1  # baseline 2 (points 1–2), its dy
    rng = np.random.default_rng(12)
    errors = rng.multivariate_normal(np.zeros(len(cov)), cov, size=draws)
    errors[:, row] += 0.060
    residuals = -errors @ (qvv @ p).T
    n = len(_BASELINES)
    v = residuals.reshape(draws * n, 3)
    pb, qb = np.tile(_blocks(p, n), (draws, 1, 1)), np.tile(_blocks(qvv, n), (draws, 1, 1))
    tests = correlated.component_tests(v, pb, qb, 17.075, 3.2905)
    bias = tests.estimated_bias.reshape(draws, n, 3)[:, 2, 1]
    assert bias.mean() == pytest.approx(0.060, abs=5 * bias.std() / np.sqrt(draws))
    mdb = tests.mdb.reshape(draws, n, 3)[0, 2, 1]
    assert mdb < 0.060  # so the power to find it exceeds 80 %
    assert tests.flagged.reshape(draws, n, 3)[:, 2, 1].mean() > 0.8
    assert correlated.block_tests(v, pb, qb, 0.001).flagged.reshape(draws, n)[:, 2].mean() > 0.5


def test_block_statistic_follows_chi_square_3_and_rejects_at_alpha():
    a, cov = _network(np.random.default_rng(4))
    draws = 6000
    v, p, qvv = _monte_carlo(a, cov, draws, seed=6)
    alpha = 0.05
    tests = correlated.block_tests(v, p, qvv, alpha)
    assert (tests.rank == 3).all()
    assert tests.critical == pytest.approx(scipy.stats.chi2.ppf(1.0 - alpha, 3), rel=1e-12)
    rate = tests.flagged.mean()
    se = np.sqrt(alpha * (1.0 - alpha) / tests.flagged.size)
    assert abs(rate - alpha) < 4.0 * se
    # the whole distribution, on one baseline (independent draws): Kolmogorov–Smirnov
    one = tests.statistic.reshape(draws, -1)[:, 2]
    assert scipy.stats.kstest(one, scipy.stats.chi2(3).cdf).pvalue > 0.001


def test_rank_deficient_block_uses_the_pseudo_inverse():
    """A point tied by one baseline and one height: its baseline's Qvv block has rank 1."""
    a, cov = _network(np.random.default_rng(8), extra_height=True)
    draws = 4000
    p_full, qvv_full = _solve(a, cov)
    rng = np.random.default_rng(9)
    errors = rng.multivariate_normal(np.zeros(len(cov)), cov, size=draws)
    v_all = -errors @ (qvv_full @ p_full).T
    last = slice(3 * len(_BASELINES), 3 * len(_BASELINES) + 3)
    # P of the baseline alone: its own covariance block inverted
    p = np.tile(np.linalg.inv(cov[last, last]), (draws, 1, 1))
    qvv = np.tile(qvv_full[last, last], (draws, 1, 1))
    tests = correlated.block_tests(v_all[:, last], p, qvv, 0.05)
    assert (tests.rank == 1).all()
    assert tests.statistic.mean() == pytest.approx(1.0, abs=0.1)  # χ²(1) has mean 1
    # numpy's pseudo-inverse of the block itself (SVD, no whitening) gives the same T
    direct = np.einsum(
        "ni,ij,nj->n",
        v_all[:50, last],
        np.linalg.pinv(qvv_full[last, last], rcond=1e-8),
        v_all[:50, last],
    )
    np.testing.assert_allclose(tests.statistic[:50], direct, rtol=1e-5)
    # the critical value stays χ²(3) whatever the rank (the contract)
    assert tests.critical == pytest.approx(scipy.stats.chi2.ppf(0.95, 3), rel=1e-12)


def test_uncontrolled_components_are_left_out():
    p = np.diag([1e4, 1e4, 1e4])[None]
    qvv = np.diag([0.5e-4, 0.5e-4, 0.0])[None]  # third component: redundancy 0
    v = np.array([[0.01, -0.01, 0.5]])  # a huge residual where nothing is controlled
    comp = correlated.component_tests(v, p, qvv, 17.075, 3.2905)
    assert comp.controlled.tolist() == [[True, True, False]]
    assert np.isnan(comp.w[0, 2]) and np.isnan(comp.mdb[0, 2]) and not comp.flagged[0, 2]
    block = correlated.block_tests(v, p, qvv, 0.001)
    # closed form of what remains: (0.01² + 0.01²) / 0.5e-4 = 4
    assert block.statistic[0] == pytest.approx(4.0, rel=1e-9)
    assert int(block.rank[0]) == 2


def test_shapes_are_checked():
    with pytest.raises(ValueError, match="blocks must be"):
        correlated.block_tests(np.zeros((2, 3)), np.zeros((2, 3, 3)), np.zeros((3, 3, 3)), 0.05)
