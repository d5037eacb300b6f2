"""The time-series plot's geometry (server/monitoring/series_plot.py) against the fit."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.stats import norm

from server.monitoring.series_plot import series_plot
from server.monitoring.timeseries import fit_series


def _fit():
    """A settling mark with a yearly breathing, eight quarterly epochs (invented)."""
    days = np.arange(8) * 91.3
    truth = -0.004 * days / 365.25 + 0.0015 * np.sin(2 * np.pi * days / 365.25)
    noise = np.random.default_rng(11).normal(0.0, 0.0003, days.size)
    return fit_series(
        "W-3", "H", days, truth + noise, np.full(days.size, 0.0003), period_days=365.25
    )


def test_the_curve_passes_through_the_fitted_values_and_the_bars_span_the_interval():
    fit = _fit()
    plot = series_plot(fit, 0.95)
    curve = np.array([[float(c) for c in pair.split(",")] for pair in plot.curve.split()])
    fitted_y = [(p.y - p.high_y) for p in plot.points]  # bar half-lengths in pixels
    # each bar is ± z·sd, z the two-sided 95 % normal quantile (scipy), so its two halves
    # are equal and proportional to z
    for p in plot.points:
        assert p.low_y - p.y == pytest.approx(p.y - p.high_y)
    scale = fitted_y[0] / (norm.ppf(0.975) * 0.0003)
    # the curve at each epoch's x is the fitted value there (same pixel scale)
    for p, value, fitted in zip(plot.points, fit.values, fit.fitted):
        y_curve = np.interp(p.x, curve[:, 0], curve[:, 1])
        assert y_curve == pytest.approx(p.y + (value - fitted) * scale, abs=0.2)
    # residual stems: the largest reaches the panel's edge, the signs point up for positive
    stems = [plot.zero_y - p.residual_y for p in plot.points]
    assert max(abs(t) for t in stems) == pytest.approx(plot.height - plot.zero_y - 6.0)
    assert all(np.sign(t) == np.sign(r) for t, r in zip(stems, fit.residuals) if r)
