"""Time series of a mark's component (server/monitoring/timeseries.py).

Checks: a known sinusoid plus noise is recovered within its stated precision; the fit equals
numpy's and scipy's weighted least squares on the same design; the F-test of the periodic term
holds its size (seeded Monte Carlo); prediction interval and alarm by their definitions.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.optimize
import scipy.stats

from server.monitoring.timeseries import DAYS_PER_YEAR, design, fit_series

PERIOD = 365.25


def _series(rng, n=12, rate=-4.0e-3, a=1.2e-3, b=-0.5e-3, sd_level=0.3e-3):
    days = np.sort(rng.uniform(0.0, 730.0, n))
    sd = sd_level * rng.uniform(0.7, 1.5, n)
    mean = days.mean()
    truth = 0.012 + rate * (days - mean) / DAYS_PER_YEAR
    truth += a * np.sin(2 * math.pi * days / PERIOD) + b * np.cos(2 * math.pi * days / PERIOD)
    return days, truth + rng.normal(0.0, sd), sd


def test_a_known_sinusoid_is_recovered_within_its_stated_precision():
    rng = np.random.default_rng(42)
    days, y, sd = _series(rng)
    fit = fit_series("W-3", "H", days, y, sd, period_days=PERIOD)
    assert fit.periodic is not None
    assert abs(fit.rate - (-4.0e-3)) < 3.0 * fit.sd_rate
    amplitude = math.hypot(1.2e-3, -0.5e-3)
    assert abs(fit.periodic.amplitude - amplitude) < 3.0 * fit.periodic.sd_amplitude
    phase = math.degrees(math.atan2(-0.5e-3, 1.2e-3))
    assert abs(fit.periodic.phase - phase) < 3.0 * fit.periodic.sd_phase
    assert fit.periodic.significant and fit.rate_significant


def test_the_fit_equals_numpy_and_scipy_least_squares_on_the_same_design():
    rng = np.random.default_rng(5)
    days, y, sd = _series(rng, n=9)
    fit = fit_series("W-3", "H", days, y, sd, period_days=PERIOD)
    a = design(days, PERIOD, float(days.mean()))
    p, *_ = np.linalg.lstsq(a / sd[:, None], y / sd, rcond=None)
    assert fit.offset == pytest.approx(p[0], abs=1e-12)
    assert fit.rate == pytest.approx(p[1], abs=1e-12)
    assert fit.periodic is not None
    assert (fit.periodic.a, fit.periodic.b) == pytest.approx((p[2], p[3]), abs=1e-12)

    # scipy's curve_fit with sigma and absolute_sigma=False scales the covariance by the
    # variance factor, as the fit does with redundancy > 0
    def model(t, c, r, s, k):
        return (
            c
            + r * (t - days.mean()) / DAYS_PER_YEAR
            + s * np.sin(2 * math.pi * t / PERIOD)
            + k * np.cos(2 * math.pi * t / PERIOD)
        )

    popt, pcov = scipy.optimize.curve_fit(model, days, y, sigma=sd, absolute_sigma=False)
    assert popt == pytest.approx(p, abs=1e-9)
    assert fit.sd_rate == pytest.approx(math.sqrt(pcov[1, 1]), rel=1e-6)
    assert fit.residuals == pytest.approx(tuple(y - a @ p), abs=1e-12)


def test_the_periodic_term_f_test_holds_its_size():
    """Monte Carlo (seeded, 2000 runs): with no periodic term in the data the F-test rejects
    in α = 5 % ± 1.5 % of the runs."""
    rng = np.random.default_rng(99)
    days = np.linspace(0.0, 700.0, 8)
    sd = np.full(8, 0.4e-3)
    runs = 2000
    rejected = 0
    for _ in range(runs):
        y = 0.01 + 1e-3 * days / DAYS_PER_YEAR + rng.normal(0.0, 0.4e-3, 8)
        fit = fit_series("M", "H", days, y, sd, period_days=PERIOD)
        assert fit.periodic is not None
        rejected += fit.periodic.significant
    assert 0.035 <= rejected / runs <= 0.065


def test_rate_t_test_uses_students_t_on_the_redundancy():
    rng = np.random.default_rng(8)
    days, y, sd = _series(rng, n=7, a=0.0, b=0.0)
    fit = fit_series("M", "E", days, y, sd)
    assert fit.redundancy == 5 and fit.periodic is None
    assert fit.rate_critical == pytest.approx(scipy.stats.t.ppf(0.975, 5))
    # published t table, t(0.975; 5) = 2.571, from memory:
    # docs/references.md "F quantiles of the congruence test"
    assert fit.rate_critical == pytest.approx(2.571, abs=0.001)


def test_prediction_and_alarm_follow_their_definitions():
    rng = np.random.default_rng(13)
    days, y, sd = _series(rng, n=10)
    when = 900.0
    fit = fit_series(
        "W-3",
        "H",
        days,
        y,
        sd,
        period_days=PERIOD,
        predict_days=when,
        threshold=0.003,
        confidence=0.95,
    )
    a = design(np.array([when, days[0]]), PERIOD, float(days.mean()))
    aw = design(days, PERIOD, float(days.mean())) / sd[:, None]
    q = np.linalg.inv(aw.T @ aw)
    p = q @ aw.T @ (y / sd)
    s2 = float(np.sum((y / sd - aw @ p) ** 2)) / (10 - 4)
    pred = fit.prediction
    assert pred is not None
    assert pred.value == pytest.approx(a[0] @ p, abs=1e-12)
    assert pred.sd == pytest.approx(math.sqrt(s2 * a[0] @ q @ a[0]), rel=1e-9)
    half = scipy.stats.t.ppf(0.975, 6) * pred.sd
    assert (pred.lower, pred.upper) == pytest.approx((pred.value - half, pred.value + half))
    g = a[0] - a[1]
    assert pred.movement == pytest.approx(g @ p, abs=1e-12)
    bound = abs(pred.movement) - scipy.stats.t.ppf(0.95, 6) * pred.sd_movement
    assert pred.alarm == (bound > 0.003)
    assert pred.alarm  # about −9 mm in 2.4 years against a 3 mm threshold


def test_fewer_than_five_epochs_leave_the_periodic_term_out():
    days = np.array([0.0, 100.0, 200.0, 300.0])
    fit = fit_series(
        "M", "H", days, np.array([0.0, 1e-3, 2e-3, 3.1e-3]), np.full(4, 1e-4), period_days=PERIOD
    )
    assert fit.periodic is None and fit.redundancy == 2
