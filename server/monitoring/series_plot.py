"""One mark's time series as plot numbers in an SVG's pixel frame.

The upper panel shows each epoch's adjusted value with its error bar (± the confidence
multiple of its sd) and the fitted curve (offset, rate and, when asked, the periodic term);
the lower panel shows the residuals as stems from zero, on their own scale, so a pattern
the fit leaves behind is seen.  ``templates/partials/series_plot.html`` draws it.
"""

from __future__ import annotations

from dataclasses import dataclass

from scipy.stats import norm

from server.monitoring.timeseries import SeriesFit

WIDTH, TOP_HEIGHT, BOTTOM_HEIGHT = 560.0, 150.0, 60.0
LEFT, RIGHT, PAD = 56.0, 12.0, 12.0


@dataclass(frozen=True, slots=True)
class SeriesPoint:
    """One epoch: its x, the value's y and the ends of its error bar; the residual stem."""

    x: float
    y: float
    low_y: float
    high_y: float
    residual_y: float


@dataclass(frozen=True, slots=True)
class SeriesPlot:
    """Pixel geometry of one series and the labels its axes need (values in metres)."""

    mark: str
    component: str
    width: float
    height: float
    points: tuple[SeriesPoint, ...]
    curve: str  # SVG polyline points
    zero_y: float  # the residual panel's zero line
    top_label: float  # value at the top of the upper panel
    bottom_label: float  # value at its bottom
    residual_label: float  # residual at the top of the lower panel (symmetric about zero)
    first_day: float
    last_day: float


def series_plot(fit: SeriesFit, confidence: float) -> SeriesPlot:
    """The plot of one fitted series; error bars at the two-sided ``confidence`` level."""
    days, values, sd = fit.days, fit.values, fit.sd
    k = float(norm.ppf(0.5 + confidence / 2.0))
    low = [v - k * s for v, s in zip(values, sd)] + [c for _, c in fit.curve]
    high = [v + k * s for v, s in zip(values, sd)] + [c for _, c in fit.curve]
    v_min, v_max = min(low), max(high)
    span = (v_max - v_min) or 1e-3
    v_min, v_max = v_min - 0.05 * span, v_max + 0.05 * span
    d_min, d_max = min(days), max(days)
    d_span = (d_max - d_min) or 1.0

    def x(day: float) -> float:
        return LEFT + (day - d_min) / d_span * (WIDTH - LEFT - RIGHT)

    def y(value: float) -> float:
        return PAD + (v_max - value) / (v_max - v_min) * (TOP_HEIGHT - 2 * PAD)

    r_max = max((abs(r) for r in fit.residuals), default=0.0) or 1e-4
    zero = TOP_HEIGHT + BOTTOM_HEIGHT / 2.0

    def ry(residual: float) -> float:
        return zero - residual / r_max * (BOTTOM_HEIGHT / 2.0 - 6.0)

    points = tuple(
        SeriesPoint(x(d), y(v), y(v - k * s), y(v + k * s), ry(r))
        for d, v, s, r in zip(days, values, sd, fit.residuals)
    )
    curve = " ".join(f"{x(d):.1f},{y(c):.1f}" for d, c in fit.curve)
    return SeriesPlot(
        mark=fit.mark,
        component=fit.component,
        width=WIDTH,
        height=TOP_HEIGHT + BOTTOM_HEIGHT,
        points=points,
        curve=curve,
        zero_y=zero,
        top_label=v_max,
        bottom_label=v_min,
        residual_label=r_max,
        first_day=d_min,
        last_day=d_max,
    )
