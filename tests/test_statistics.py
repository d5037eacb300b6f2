"""Statistics against published tables and independent computation (scipy, numpy)."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from server.pipeline import adjust_fieldbook
from server.statistics import quality as st

# Two-sided 5 % chi-square bounds.  Published: NIST/SEMATECH e-Handbook of
# Statistical Methods, §1.3.6.7.4, "Critical Values of the Chi-Square
# Distribution" (r = 5 and 10 from the table; r = 20 upper computed; docs/references.md
# "Chi-square bounds of the global test").
NIST_CHI_SQUARE = [
    (5, 0.831, 12.833),
    (10, 3.247, 20.483),
    (20, 9.591, 34.170),
]


@pytest.mark.parametrize(("r", "lower", "upper"), NIST_CHI_SQUARE)
def test_chi_square_bounds_match_published_table(r, lower, upper):
    low, high = st.chi_square_bounds(r, 0.05)
    assert low == pytest.approx(lower, abs=5e-4)  # table printed to 3 decimals
    assert high == pytest.approx(upper, abs=5e-4)


def test_chi_square_bounds_match_scipy_for_any_redundancy():
    for r in (1, 2, 7, 33, 250):
        low, high = st.chi_square_bounds(r, 0.01)
        assert low == pytest.approx(scipy.stats.chi2.ppf(0.005, r), rel=1e-12)
        assert high == pytest.approx(scipy.stats.chi2.ppf(0.995, r), rel=1e-12)


def test_w_test_critical_value_and_non_centrality():
    """Baarda (1968): α₀ = 0.001 two-sided → 3.2905; with power 0.80, λ₀ = 17.075 (computed)."""
    assert st.normal_critical_value(0.001) == pytest.approx(3.2905, abs=5e-5)
    assert st.normal_critical_value(0.05) == pytest.approx(1.9600, abs=5e-5)
    assert st.non_centrality(0.001, 0.80) == pytest.approx(17.075, abs=5e-4)
    assert st.non_centrality(0.05, 0.80) == pytest.approx(7.849, abs=5e-4)


def test_ellipse_factor_known_and_estimated_variance():
    """2D 95 %: √χ²₂ = 2.4477 with σ₀ known; √(2F(2, r)) with r = 5 → 3.4018, r = 10 → 2.8645."""
    assert st.ellipse_factor(0.95, 0) == pytest.approx(2.4477, abs=5e-5)
    assert st.ellipse_factor(0.95, 5) == pytest.approx(3.4018, abs=5e-5)
    assert st.ellipse_factor(0.95, 10) == pytest.approx(2.8645, abs=5e-5)
    assert st.ellipse_factor(0.95, 100000) == pytest.approx(2.4477, abs=1e-3)


@pytest.mark.parametrize("seed", range(5))
def test_standard_ellipse_matches_eigen_decomposition(seed):
    rng = np.random.default_rng(seed)
    m = rng.normal(size=(2, 2))
    cov = m @ m.T
    major, minor, azimuth = st.standard_ellipse(cov)
    values, vectors = np.linalg.eigh(cov)
    assert major == pytest.approx(math.sqrt(values[1]), rel=1e-12)
    assert minor == pytest.approx(math.sqrt(values[0]), rel=1e-9)
    east, north = vectors[:, 1]
    expected = math.degrees(math.atan2(east, north)) % 180.0
    assert min(abs(azimuth - expected), 180 - abs(azimuth - expected)) < 1e-9
    assert 0.0 <= azimuth < 180.0


def test_standard_ellipse_orientation_conventions():
    """An ellipse elongated east–west has azimuth 90°; north–south 0°."""
    assert st.standard_ellipse(np.diag([4.0, 1.0]))[2] == pytest.approx(90.0)
    assert st.standard_ellipse(np.diag([1.0, 4.0]))[2] == pytest.approx(0.0)
    # positively correlated E and N: the major axis points north-east
    assert st.standard_ellipse(np.array([[1.0, 0.9], [0.9, 1.0]]))[2] == pytest.approx(45.0)


def test_monte_carlo_variance_factor_averages_one():
    """Simulated leveling with exactly the a priori σ: E[σ̂₀²] = 1 and vᵀPv ~ χ²(r)."""
    rng = np.random.default_rng(2026)
    truth = {f"P{k}": 100 + k * 0.37 for k in range(10)}
    pairs = [(i, j) for i in range(10) for j in range(i + 1, 10) if (j - i) in (1, 2, 5)]
    factors, statistics = [], []
    for _ in range(200):
        lines = ["defaults level=1.0mm/sqrtkm", "point P0 height=100 fix"]
        for i, j in pairs:
            length = 0.2 + 0.1 * ((i + j) % 5)
            dh = truth[f"P{j}"] - truth[f"P{i}"] + rng.normal(0, 1e-3 * math.sqrt(length))
            lines.append(f"level P{i} P{j} {dh:+.10f} len={length:.1f}km")
        result = adjust_fieldbook("\n".join(lines))
        factors.append(result.summary.variance_factor)
        statistics.append(result.summary.global_test.statistic)
    r = result.summary.redundancy
    # standard error of the mean of 200 draws of χ²(r)/r is √(2/r/200)
    assert abs(np.mean(factors) - 1.0) < 4 * math.sqrt(2 / r / 200)
    # the 95 % acceptance region holds about 95 % of the draws (binomial, n = 200)
    passed = np.mean(
        [
            st.chi_square_bounds(r, 0.05)[0] <= t <= st.chi_square_bounds(r, 0.05)[1]
            for t in statistics
        ]
    )
    assert 0.89 <= passed <= 0.99
