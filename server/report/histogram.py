"""Histogram of the standardized residuals w against the standard normal density.

Presentation only, like ``plot.py``: the w-statistics come from the frozen
``AdjustmentResult``; what is worked out here is counting and drawing.

* **Which observations.**  Those with a w-statistic: used and controlled
  (redundancy number at least 0.001).  Ignored and uncontrolled
  observations have no w and are left out; the histogram says how many
  were tested.
* **Bins.**  Half a unit of w wide, with edges on multiples of 0.5 so that
  0 is an edge, spanning at least −4 … +4 and at most −8 … +8.  A value on
  an edge falls in the bin above it (the last bin is closed).  A gross
  blunder can give |w| of 20 or more; values beyond ±8 are counted in two
  overflow bins drawn apart at the ends, so one blunder does not squeeze
  the rest of the histogram into a sliver.
* **Reference curve.**  Under the null hypothesis (a priori σ₀ = 1, no
  blunder) each w is standard normal, so a bin of width Δ is expected to
  hold n·Δ·φ(w) observations, φ the standard normal density.  The curve is
  that expectation, drawn over the bars.
* **Layout.**  ``layout`` places bars, curve, ticks and the critical values
  in a box of the given size with y pointing down (SVG's convention); the
  PDF flips y itself.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

from server.results.result import AdjustmentResult

#: Width of a bin, in units of w.
BIN_WIDTH = 0.5
#: The bins always cover at least −HALF_RANGE … +HALF_RANGE …
HALF_RANGE = 4.0
#: … and at most −OVERFLOW … +OVERFLOW; values beyond go to the overflow bins.
OVERFLOW = 8.0
#: Samples of the reference curve per unit of w.
CURVE_SAMPLES = 20


@dataclass(frozen=True, slots=True)
class Histogram:
    """Counts of w per bin, with what the reference curve and the test need.

    ``below`` and ``above`` count the w beyond the first and last edge; with
    ``counts`` they hold every tested observation once.
    """

    edges: tuple[float, ...]
    counts: tuple[int, ...]
    flagged_counts: tuple[int, ...]
    below: int
    above: int
    tested: int
    critical: float
    beyond: int
    largest: float

    @property
    def bin_width(self) -> float:
        """Δ, the width of every bin."""
        return self.edges[1] - self.edges[0]


def tested_w(result: AdjustmentResult) -> list[float]:
    """The w-statistics of the tested observations, in file order."""
    return [o.w for o in result.observations if o.w is not None and not o.ignored]


def w_histogram(result: AdjustmentResult) -> Histogram | None:
    """Counts of w in bins of ``BIN_WIDTH``; None when no observation was tested."""
    values = tested_w(result)
    if not values:
        return None
    low = min(-HALF_RANGE, max(-OVERFLOW, math.floor(min(values) / BIN_WIDTH) * BIN_WIDTH))
    high = max(HALF_RANGE, min(OVERFLOW, (math.floor(max(values) / BIN_WIDTH) + 1) * BIN_WIDTH))
    n_bins = round((high - low) / BIN_WIDTH)
    edges = tuple(low + k * BIN_WIDTH for k in range(n_bins + 1))
    critical = result.summary.critical_w
    counts = [0] * n_bins
    flagged = [0] * n_bins
    below = above = 0
    for w in values:
        if w < low:
            below += 1
        elif w > high:
            above += 1
        else:
            k = min(math.floor((w - low) / BIN_WIDTH), n_bins - 1)
            counts[k] += 1
            flagged[k] += abs(w) > critical
    return Histogram(
        edges=edges,
        counts=tuple(counts),
        flagged_counts=tuple(flagged),
        below=below,
        above=above,
        tested=len(values),
        critical=critical,
        beyond=sum(1 for w in values if abs(w) > critical),
        largest=max(abs(w) for w in values),
    )


def expected_count(histogram: Histogram, w: float) -> float:
    """n·Δ·φ(w): how many of the tested observations a bin at w should hold."""
    density = math.exp(-0.5 * w * w) / math.sqrt(2.0 * math.pi)
    return histogram.tested * histogram.bin_width * density


# --------------------------------------------------------------------------------------
# layout (drawing only)


@dataclass(frozen=True, slots=True)
class Bar:
    """One bin drawn: its box (y down), its count, whether it holds a flagged w."""

    x: float
    y: float
    width: float
    height: float
    count: int
    low: float
    high: float
    beyond: bool
    overflow: bool = False


@dataclass(frozen=True, slots=True)
class Layout:
    """Everything a drawing of the histogram needs, in the units of the box (y down)."""

    width: float
    height: float
    left: float
    top: float
    right: float
    bottom: float
    bars: tuple[Bar, ...]
    curve: tuple[tuple[float, float], ...]
    x_ticks: tuple[tuple[float, str], ...]
    y_ticks: tuple[tuple[float, str], ...]
    critical_x: tuple[float, float]
    critical_label: str
    zero_x: float

    @property
    def curve_path(self) -> str:
        """The reference curve as SVG path data."""
        return svg_path(self.curve)


def _count_step(largest: float) -> int:
    """A 1-2-5 step for the count axis giving at most about six ticks."""
    for step in (1, 2, 5, 10, 20, 50, 100, 200, 500, 1000, 2000, 5000):
        if largest / step <= 6:
            return step
    return 10000


def _w_label(w: float) -> str:
    return f"{w:+g}".replace("-", "−") if w else "0"


def layout(
    histogram: Histogram,
    width: float,
    height: float,
    *,
    margin: tuple[float, float, float, float] = (14.0, 10.0, 30.0, 34.0),
) -> Layout:
    """Place the histogram in a ``width`` × ``height`` box; ``margin`` is (top, right, bottom,
    left).

    Overflow bins sit one and a half bin widths beyond the ends of the axis,
    labelled "< −8" and "> +8".
    """
    top, right_margin, bottom_margin, left = margin
    right, bottom = width - right_margin, height - bottom_margin
    delta = histogram.bin_width
    low, high = histogram.edges[0], histogram.edges[-1]
    start = low - (2 * delta if histogram.below else 0.0)
    end = high + (2 * delta if histogram.above else 0.0)
    peak = max(*histogram.counts, histogram.below, histogram.above, expected_count(histogram, 0.0))
    step = _count_step(peak)
    y_max = step * math.ceil(peak * 1.08 / step)

    def x_of(w: float) -> float:
        return left + (w - start) / (end - start) * (right - left)

    def y_of(count: float) -> float:
        return bottom - count / y_max * (bottom - top)

    bars = []
    for k, count in enumerate(histogram.counts):
        a, b = histogram.edges[k], histogram.edges[k + 1]
        y = y_of(count)
        bars.append(
            Bar(
                x=x_of(a),
                y=y,
                width=x_of(b) - x_of(a),
                height=bottom - y,
                count=count,
                low=a,
                high=b,
                beyond=histogram.flagged_counts[k] > 0,
            )
        )
    ticks = []
    for count, a, b, label in (
        (histogram.below, start, start + delta, f"< {_w_label(low)}"),
        (histogram.above, end - delta, end, f"> {_w_label(high)}"),
    ):
        if count:
            y = y_of(count)
            bars.append(
                Bar(
                    x=x_of(a),
                    y=y,
                    width=x_of(b) - x_of(a),
                    height=bottom - y,
                    count=count,
                    low=-math.inf if a == start else high,
                    high=low if a == start else math.inf,
                    beyond=abs(low if a == start else high) >= histogram.critical,
                    overflow=True,
                )
            )
            ticks.append((x_of((a + b) / 2), label))
    samples = max(2, int((high - low) * CURVE_SAMPLES) + 1)
    curve = tuple(
        (round(x_of(w), 2), round(y_of(expected_count(histogram, w)), 2))
        for w in (low + (high - low) * i / (samples - 1) for i in range(samples))
    )
    w_step = 1 if high - low <= 12 else 2
    first = math.ceil(low / w_step) * w_step
    # an overflow bin's "< −8" stands for the end of the axis; a "−8" beside it would crowd it
    x_ticks = tuple(
        (x_of(float(w)), _w_label(w))
        for w in range(first, math.floor(high) + 1, w_step)
        if not (w == low and histogram.below) and not (w == high and histogram.above)
    ) + tuple(ticks)
    y_ticks = tuple((y_of(float(c)), str(c)) for c in range(0, int(y_max) + 1, step))
    c = histogram.critical
    return Layout(
        width=width,
        height=height,
        left=left,
        top=top,
        right=right,
        bottom=bottom,
        bars=tuple(bars),
        curve=curve,
        x_ticks=x_ticks,
        y_ticks=y_ticks,
        critical_x=(x_of(-c), x_of(c)),
        critical_label=f"{c:.2f}",
        zero_x=x_of(0.0),
    )


def svg_path(points: tuple[tuple[float, float], ...]) -> str:
    """An SVG path through the points ("M x y L x y …")."""
    return "M" + " L".join(f"{x:g} {y:g}" for x, y in points)
