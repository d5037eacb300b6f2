"""Displacement plot data: marks in plan with their displacement vectors and confidence
ellipses exaggerated by one scale, or in 1D a bar per mark with its confidence interval.

Only numbers in the SVG's own pixel frame; ``templates/partials/displacement_plot.html``
draws them (no script, so the page keeps its content security policy).
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from server.monitoring.congruence import Congruence, f_quantile

WIDTH, HEIGHT, MARGIN = 640.0, 420.0, 56.0


@dataclass(frozen=True, slots=True)
class PlotMark:
    name: str
    x: float
    y: float
    #: end of the exaggerated vector (plan) or top of the bar (1D)
    tip_x: float
    tip_y: float
    #: confidence ellipse at the tip (plan): semi-axes in pixels, SVG rotation in degrees;
    #: in 1D the interval's ends in y
    rx: float
    ry: float
    rotate: float
    low_y: float
    high_y: float
    moved: bool


@dataclass(frozen=True, slots=True)
class DisplacementPlot:
    width: float
    height: float
    one_dimensional: bool
    exaggeration: float
    confidence: float
    #: a scale bar for the displacements: its length in pixels and in the length unit
    bar_pixels: float
    bar_length: float
    baseline_y: float
    marks: tuple[PlotMark, ...]


def _nice(value: float) -> float:
    """The 1-2-5 number at or below ``value``."""
    if value <= 0.0 or not math.isfinite(value):
        return 1.0
    power = 10.0 ** math.floor(math.log10(value))
    return max(step * power for step in (1.0, 2.0, 5.0) if step * power <= value)


def displacement_plot(
    comparison: Congruence, plan: np.ndarray, confidence: float
) -> DisplacementPlot:
    """The plot of one comparison; ``plan`` the marks' east and north (any length unit)."""
    dof = comparison.degrees_of_freedom
    moved = set(comparison.moved)
    if comparison.dimension == 1:
        return _bars(comparison, confidence, dof, moved)
    factor = math.sqrt(2.0 * f_quantile(confidence, 2, dof))
    east, north = plan[:, 0], plan[:, 1]
    span = max(float(np.ptp(east)), float(np.ptp(north)), 1e-9)
    scale = min(WIDTH - 2 * MARGIN, HEIGHT - 2 * MARGIN) / span  # pixels per unit of plan
    cx, cy = float(east.mean()), float(north.mean())
    reach = max(
        (
            d.length + (d.ellipse[0] * factor if d.ellipse else 0.0)
            for d in comparison.displacements
        ),
        default=0.0,
    )
    reach = max(reach, 1e-12)
    # the longest vector with its ellipse reaches a fifth of the plot
    pixels_per_unit = 0.2 * min(WIDTH, HEIGHT) / reach
    exaggeration = _nice(pixels_per_unit / scale)
    per_unit = exaggeration * scale
    marks = []
    for d, (e, n) in zip(comparison.displacements, plan):
        x = WIDTH / 2 + (float(e) - cx) * scale
        y = HEIGHT / 2 - (float(n) - cy) * scale
        tip_x = x + d.components[0] * per_unit
        tip_y = y - d.components[1] * per_unit
        major, minor, azimuth = d.ellipse if d.ellipse else (0.0, 0.0, 0.0)
        marks.append(
            PlotMark(
                name=d.mark,
                x=x,
                y=y,
                tip_x=tip_x,
                tip_y=tip_y,
                rx=major * factor * per_unit,
                ry=minor * factor * per_unit,
                rotate=azimuth - 90.0,
                low_y=tip_y,
                high_y=tip_y,
                moved=d.mark in moved,
            )
        )
    bar = _nice(reach)
    return DisplacementPlot(
        width=WIDTH,
        height=HEIGHT,
        one_dimensional=False,
        exaggeration=exaggeration,
        confidence=confidence,
        bar_pixels=bar * per_unit,
        bar_length=bar,
        baseline_y=HEIGHT - 16.0,
        marks=tuple(marks),
    )


def _bars(comparison: Congruence, confidence: float, dof: int, moved: set[str]) -> DisplacementPlot:
    factor = math.sqrt(f_quantile(confidence, 1, dof))
    reach = max(
        (abs(d.components[0]) + factor * d.sd[0] for d in comparison.displacements), default=0.0
    )
    reach = max(reach, 1e-12)
    half = HEIGHT / 2 - MARGIN
    per_unit = half / reach
    step = (WIDTH - 2 * MARGIN) / max(len(comparison.displacements), 1)
    base = HEIGHT / 2
    marks = []
    for i, d in enumerate(comparison.displacements):
        x = MARGIN + step * (i + 0.5)
        tip = base - d.components[0] * per_unit
        spread = factor * d.sd[0] * per_unit
        marks.append(
            PlotMark(
                name=d.mark,
                x=x,
                y=base,
                tip_x=x,
                tip_y=tip,
                rx=min(step * 0.3, 14.0),
                ry=0.0,
                rotate=0.0,
                low_y=tip + spread,
                high_y=tip - spread,
                moved=d.mark in moved,
            )
        )
    bar = _nice(reach)
    return DisplacementPlot(
        width=WIDTH,
        height=HEIGHT,
        one_dimensional=True,
        exaggeration=1.0,
        confidence=confidence,
        bar_pixels=bar * per_unit,
        bar_length=bar,
        baseline_y=base,
        marks=tuple(marks),
    )
