"""Geometry of the network plot: the result's points and observations laid out for an SVG.

Presentation only, like ``report.py``: nothing here computes a statistic.
Positions, ellipse axes, residuals and w-statistics come from the frozen
``AdjustmentResult``; the figures shown beside the plot are the strings of
``report.point_rows`` and ``report.observation_rows``, so the plot and the
tables always agree.  What is worked out here is drawing only:

* **Map coordinates.**  One map unit is one length unit of the field book.
  ``x = E − E0`` and ``y = N0 − N`` with ``(E0, N0)`` the north-west corner of
  the drawn points: SVG's y axis grows downward, so grid north is up and east
  is right.
* **Lines.**  One line per pair of points joined by an observation (an angle
  joins AT with BACK and AT with FORE), carrying the indices of its
  observations in ``result.observations``.
* **Ellipses.**  Drawn at an exaggeration factor from a 1-2-5 series.  An
  ellipse is an SVG ``<ellipse>`` with ``ry`` the semi-major and ``rx`` the
  semi-minor axis, turned by ``rotate(azimuth)``: with y pointing down a
  positive SVG rotation is clockwise on screen, which turns the ``ry`` axis
  from grid north to the azimuth, as surveyors measure it.
* **Screen furniture** (symbols, labels, north arrow, scale bars) is sized
  in screen pixels; the server lays it out for a nominal canvas of
  ``NOMINAL_WIDTH_PX`` × ``NOMINAL_HEIGHT_PX`` and ``static/plot.js``
  redoes it for the real canvas when it zooms.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from typing import Any

from server.report import tables as report
from server.results.result import AdjustmentResult, ObservationResult, PointResult

#: The canvas the server lays the plot out for (CSS keeps the same 8:5 shape).
NOMINAL_WIDTH_PX = 960
NOMINAL_HEIGHT_PX = 600
#: Room kept around the points when the whole network is shown, in pixels: for the labels,
#: and at the bottom for the scale bars.
MARGIN_PX = {"top": 44, "right": 64, "bottom": 84, "left": 60}
#: By default the largest ellipse is drawn at most this share of the network's extent
#: (and, the factors being 1-2-5 steps, at least 40 % of it).
ELLIPSE_SHARE = 0.065
#: Longest scale bar, in pixels; the bar is the longest 1-2-5 length not over it.
MAP_BAR_PX = 130
ELLIPSE_BAR_PX = 110

#: Exaggeration factors offered: 1, 2, 5, 10 … 5 000 000.
EXAGGERATIONS: tuple[int, ...] = tuple(m * 10**k for k in range(7) for m in (1, 2, 5))
#: Lengths a scale bar may show: 1-2-5 steps from 0.0001 to 50 000 length units.
BAR_LENGTHS: tuple[float, ...] = tuple(float(f"{m}e{k}") for k in range(-4, 5) for m in (1, 2, 5))

#: GNSS baselines: drawn in a colour and dash of their own, whatever else joins the pair.
BASELINE_KINDS = frozenset({"baseline"})
DISTANCE_KINDS = frozenset({"distance", "slope"})
SIGHTING_KINDS = frozenset({"direction", "angle", "azimuth", "zenith"})
HEIGHT_KINDS = frozenset({"level"})

#: Label positions around a point, as compass directions in degrees, in order of preference.
_LABEL_DIRECTIONS = (45.0, 90.0, 135.0, 315.0, 270.0, 225.0, 0.0, 180.0)
_LABEL_GAP_PX = 9.0
_LABEL_CHAR_PX = 7.4
_LABEL_HEIGHT_PX = 14.0
_SYMBOL_RADIUS_PX = 7.0


# --------------------------------------------------------------------------------------
# 1-2-5 series and the labels of lengths


def _round_sig(value: float, digits: int = 6) -> float:
    """A float cut to ``digits`` significant figures, for compact SVG attributes."""
    if value == 0 or not math.isfinite(value):
        return 0.0
    return round(value, digits - 1 - math.floor(math.log10(abs(value))))


def exaggeration_at_most(wanted: float) -> int:
    """The largest factor of ``EXAGGERATIONS`` not over ``wanted`` (the smallest if none)."""
    fitting = [f for f in EXAGGERATIONS if f <= wanted * (1 + 1e-9)]
    return fitting[-1] if fitting else EXAGGERATIONS[0]


def bar_length(longest: float) -> float:
    """The longest of ``BAR_LENGTHS`` not over ``longest`` (the shortest if none fits)."""
    fitting = [length for length in BAR_LENGTHS if length <= longest * (1 + 1e-9)]
    return fitting[-1] if fitting else BAR_LENGTHS[0]


def _number(value: float) -> str:
    text = f"{value:.4f}".rstrip("0").rstrip(".")
    return text or "0"


def length_text(value: float, unit: str) -> str:
    """A scale-bar length in words: '10 mm', '200 m', '1 km', '0.05 ft'."""
    if unit == "m":
        if value < 1:
            return f"{_number(value * 1000)} mm"
        if value >= 1000:
            return f"{_number(value / 1000)} km"
        return f"{_number(value)} m"
    return f"{_number(value)} {report.length_label(unit)}"


def exaggeration_text(factor: int) -> str:
    """'×10 000' with a thin space between thousands."""
    return "×" + f"{factor:,}".replace(",", "\u2009")


# --------------------------------------------------------------------------------------
# points and lines


def point_kind(point: PointResult) -> str:
    """How the point's horizontal position enters the adjustment: fixed, weighted or free."""
    if "en" in point.fixed:
        return "fixed"
    if "en" in point.weighted:
        return "weighted"
    return "free"


def observation_ends(obs: ObservationResult) -> list[tuple[str, str]]:
    """The point pairs an observation joins: AT with BACK and AT with FORE for an angle."""
    if obs.kind == "angle" and obs.at is not None:
        return [(obs.at, obs.from_point), (obs.at, obs.to)]
    return [(obs.from_point, obs.to)]


def _line_style(kinds: set[str]) -> str:
    """How a line is drawn, from the kinds of its observations."""
    if kinds & BASELINE_KINDS:
        return "baseline"
    if kinds & DISTANCE_KINDS:
        return "distance"
    if kinds & SIGHTING_KINDS:
        return "sighting"
    return "height"


def _unit_suffix(row: report.ObservationRow, unit: str) -> str:
    return report.ARCSEC if row.angular else f" {unit}"


def _point_detail(
    row: report.PointRow, point: PointResult, unit: str, confidence: str
) -> list[list[str]]:
    """(label, value) rows for the side panel, every value formatted by ``report``."""
    out = [["Role", row.role], ["East", f"{row.east} {unit}"], ["North", f"{row.north} {unit}"]]
    if row.note:
        out.insert(1, ["Note", row.note])
    if point.height is not None:
        out.append(["Height", f"{row.height} {unit}"])
    out += [["sd East", f"{row.sd_east} {unit}"], ["sd North", f"{row.sd_north} {unit}"]]
    if point.height is not None:
        out.append(["sd Height", f"{row.sd_height} {unit}"])
    if point.ellipse is not None:
        out += [
            [f"Ellipse a ({confidence})", f"{row.semi_major} {unit}"],
            ["Ellipse b", f"{row.semi_minor} {unit}"],
            ["Azimuth of a", row.azimuth + ("" if ":" in row.azimuth else "°")],
        ]
    if point.latitude is not None and point.longitude is not None:
        # decimal degrees to 9 places (about 0.1 mm), as in the geodetic coordinates table
        out += [["Latitude", f"{point.latitude:.9f}°"], ["Longitude", f"{point.longitude:.9f}°"]]
    return out


def _observation_detail(row: report.ObservationRow, unit: str) -> dict[str, Any]:
    suffix = _unit_suffix(row, unit)
    observed_suffix = "" if row.angular else f" {unit}"
    return {
        "line": row.line,
        "kind": row.kind,
        "marks": row.stations,
        "observed": row.observed + observed_suffix
        if row.observed != report.NOT_APPLICABLE
        else row.observed,
        "booked": row.booked + observed_suffix
        if row.booked != report.NOT_APPLICABLE
        else row.booked,
        "reduction": row.reduction,
        "residual": row.residual + suffix
        if row.residual != report.NOT_APPLICABLE
        else row.residual,
        "w": row.w,
        "status": row.status or "ok",
        "flagged": row.flagged,
        "ignored": row.ignored,
    }


def _relative_detail(result: AdjustmentResult) -> dict[frozenset[str], list[list[str]]]:
    unit = report.length_label(result.length_unit)
    out: dict[frozenset[str], list[list[str]]] = {}
    for r in result.relative:
        rows = [
            ["Between", f"{r.from_point} – {r.to_point}"],
            ["Distance", f"{report.fmt_length(r.distance, result.length_unit)} {unit}"],
            [
                "sd of the distance",
                f"{report.fmt_length(r.sd_distance, result.length_unit)} {unit}",
            ],
            [
                f"Relative ellipse a ({report.fmt_percent(r.confidence)})",
                f"{report.fmt_length(r.semi_major, result.length_unit)} {unit}",
            ],
            ["Relative ellipse b", f"{report.fmt_length(r.semi_minor, result.length_unit)} {unit}"],
            [
                "Azimuth of a",
                report.fmt_azimuth(r.azimuth, result.angle_unit)
                + ("" if result.angle_unit == "dms" else "°"),
            ],
        ]
        if r.allowed is not None:
            rows.append(["Allowed", f"{report.fmt_length(r.allowed, result.length_unit)} {unit}"])
            rows.append(["Check", "within the allowance" if r.passed else "exceeds the allowance"])
        out[frozenset((r.from_point, r.to_point))] = rows
    return out


# --------------------------------------------------------------------------------------
# label placement (drawing only: keeps names off lines, symbols and each other)


def _label_box(px: float, py: float, direction: float, width: float) -> tuple[float, ...]:
    """(left, top, right, bottom) of a label put in compass ``direction`` of a point."""
    dx = math.sin(math.radians(direction))
    dy = -math.cos(math.radians(direction))
    ax, ay = px + dx * _LABEL_GAP_PX, py + dy * _LABEL_GAP_PX
    if dx > 0.3:
        left = ax
    elif dx < -0.3:
        left = ax - width
    else:
        left = ax - width / 2
    if dy < -0.3:
        top = ay - _LABEL_HEIGHT_PX
    elif dy > 0.3:
        top = ay
    else:
        top = ay - _LABEL_HEIGHT_PX / 2
    return (left, top, left + width, top + _LABEL_HEIGHT_PX)


def _segment_hits_box(x1: float, y1: float, x2: float, y2: float, box: Sequence[float]) -> bool:
    """Liang–Barsky clipping: does the segment pass through the box?"""
    left, top, right, bottom = box
    t0, t1 = 0.0, 1.0
    dx, dy = x2 - x1, y2 - y1
    for p, q in ((-dx, x1 - left), (dx, right - x1), (-dy, y1 - top), (dy, bottom - y1)):
        if p == 0:
            if q < 0:
                return False
            continue
        t = q / p
        if p < 0:
            t0 = max(t0, t)
        else:
            t1 = min(t1, t)
        if t0 > t1:
            return False
    return True


class _Grid:
    """A uniform bucket grid over canvas pixels: which items' boxes may touch a box."""

    def __init__(self, cell: float) -> None:
        self.cell = cell
        self.buckets: dict[tuple[int, int], list[int]] = {}

    def cells(self, box: Sequence[float]) -> list[tuple[int, int]]:
        c = self.cell
        x0, y0, x1, y1 = (math.floor(v / c) for v in box)
        return [(x, y) for x in range(x0, x1 + 1) for y in range(y0, y1 + 1)]

    def add(self, item: int, box: Sequence[float]) -> None:
        for key in self.cells(box):
            self.buckets.setdefault(key, []).append(item)

    def near(self, cells: list[tuple[int, int]]) -> set[int]:
        """The items in any of ``cells`` (of ``cells(box)``: the three grids share a size)."""
        found: set[int] = set()
        buckets = self.buckets
        for key in cells:
            items = buckets.get(key)
            if items:
                found.update(items)
        return found


def _label_cost(
    i: int,
    rank: int,
    box: tuple[float, ...],
    px: list[tuple[float, float]],
    segments: list[tuple[int, int]],
    placed: list[tuple[float, ...]],
    grids: tuple[_Grid, _Grid, _Grid],
) -> float:
    """Badness of a label box of point ``i``: lines crossed, symbols and labels covered."""
    segment_grid, symbol_grid, label_grid = grids
    cells = segment_grid.cells(box)
    left, top, right, bottom = box
    total = rank * 0.5  # the order of preference breaks ties
    for k in segment_grid.near(cells):
        a, b = segments[k]
        (x1, y1), (x2, y2) = px[a], px[b]
        # both ends beyond one side of the box: it cannot cross (most candidates end here)
        if (
            (x1 < left and x2 < left)
            or (x1 > right and x2 > right)
            or (y1 < top and y2 < top)
            or (y1 > bottom and y2 > bottom)
        ):
            continue
        if _segment_hits_box(x1, y1, x2, y2, box):
            total += 20.0 if i in (a, b) else 8.0
    r = _SYMBOL_RADIUS_PX
    for j in symbol_grid.near(cells):
        x, y = px[j]
        # the symbol's square and the box overlap
        if j != i and min(right, x + r) > max(left, x - r) and min(bottom, y + r) > max(top, y - r):
            total += 40.0
    covered = 0.0  # the area shared with each label placed nearby (written out: the inner loop)
    for k in label_grid.near(cells):
        other = placed[k]
        w = (right if right < other[2] else other[2]) - (left if left > other[0] else other[0])
        if w > 0:
            h = (bottom if bottom < other[3] else other[3]) - (top if top > other[1] else other[1])
            if h > 0:
                covered += w * h
    return total + covered * 0.5


def _place_labels(
    names: list[str], px: list[tuple[float, float]], segments: list[tuple[int, int]]
) -> list[dict[str, Any]]:
    """For each point the label side that crosses the fewest lines, symbols and labels."""
    # bucket grids keep this near-linear in the number of points and lines
    cell = max(_LABEL_HEIGHT_PX * 3, 1.0)
    segment_grid, symbol_grid, label_grid = _Grid(cell), _Grid(cell), _Grid(cell)
    for k, (a, b) in enumerate(segments):
        (x1, y1), (x2, y2) = px[a], px[b]
        segment_grid.add(k, (min(x1, x2), min(y1, y2), max(x1, x2), max(y1, y2)))
    for j, (x, y) in enumerate(px):
        symbol_grid.add(
            j,
            (
                x - _SYMBOL_RADIUS_PX,
                y - _SYMBOL_RADIUS_PX,
                x + _SYMBOL_RADIUS_PX,
                y + _SYMBOL_RADIUS_PX,
            ),
        )
    grids = (segment_grid, symbol_grid, label_grid)
    placed: list[tuple[float, ...]] = []
    out: list[dict[str, Any]] = []
    for i, name in enumerate(names):
        width = _LABEL_CHAR_PX * len(name) + 2
        boxes = [_label_box(*px[i], direction, width) for direction in _LABEL_DIRECTIONS]
        rank, best = 0, math.inf
        for r, candidate in enumerate(boxes):
            if r * 0.5 >= best:
                break  # no later side can beat a side already found (its tie-break is higher)
            cost = _label_cost(i, r, candidate, px, segments, placed, grids)
            if cost < best:
                rank, best = r, cost
        box = boxes[rank]
        label_grid.add(len(placed), box)
        placed.append(box)
        dx = math.sin(math.radians(_LABEL_DIRECTIONS[rank]))
        anchor = "start" if dx > 0.3 else ("end" if dx < -0.3 else "middle")
        text_x = {"start": box[0], "end": box[2], "middle": (box[0] + box[2]) / 2}[anchor]
        out.append(
            {
                "anchor": anchor,
                "dx": round(text_x - px[i][0], 2),
                # the baseline sits about a quarter of the line height above the box bottom
                "dy": round(box[3] - 3.5 - px[i][1], 2),
                # where the label sits at the nominal whole-network view, in canvas pixels
                "box": [round(v, 1) for v in box],
            }
        )
    return out


# --------------------------------------------------------------------------------------
# the plot


def _view(width: float, height: float, px_width: float, px_height: float) -> dict[str, float]:
    """The viewBox (same shape as the canvas) that shows the extent inside the margins."""
    m = MARGIN_PX
    usable_w = px_width - m["left"] - m["right"]
    usable_h = px_height - m["top"] - m["bottom"]
    per_px = max(width / usable_w, height / usable_h)
    if per_px <= 0:
        per_px = 1.0 / usable_w  # a single point: one length unit across the canvas
    return {
        "x": _round_sig(width / 2 - (m["left"] + usable_w / 2) * per_px, 9),
        "y": _round_sig(height / 2 - (m["top"] + usable_h / 2) * per_px, 9),
        "width": _round_sig(px_width * per_px, 9),
        "height": _round_sig(px_height * per_px, 9),
        "per_px": per_px,
    }


def _joined_pairs(
    result: AdjustmentResult, position: dict[str, tuple[float, float]]
) -> dict[frozenset[str], dict[str, Any]]:
    """Drawn point pairs with the indices and kinds of their observations, first-seen order."""
    pairs: dict[frozenset[str], dict[str, Any]] = {}
    for k, obs in enumerate(result.observations):
        for a, b in observation_ends(obs):
            if a == b or a not in position or b not in position:
                continue
            key = frozenset((a, b))
            record = pairs.get(key)
            if record is None:
                record = pairs[key] = {
                    "a": a,
                    "b": b,
                    "observations": [],
                    "used": set(),
                    "all": set(),
                    "flagged": False,
                    "has_ignored": False,
                }
            if k not in record["observations"]:
                record["observations"].append(k)
            record["all"].add(obs.kind)
            if obs.ignored:
                record["has_ignored"] = True
            else:
                record["used"].add(obs.kind)
            record["flagged"] = record["flagged"] or obs.flagged
    return pairs


def network_plot_data(
    result: AdjustmentResult,
    *,
    obs_rows: Sequence[report.ObservationRow] | None = None,
    details: bool = True,
) -> dict[str, Any] | None:
    """Everything the network plot draws, or None for a 1D network or one without positions.

    ``obs_rows`` are every observation's rows when the caller has them already (formatted
    once per request); ``details=False`` leaves out the side panel's figures (a drawing
    without the panel, as in the printable report, does not need them)."""
    if result.summary.dimension < 2:
        return None
    grid = {
        p.name: (p.east, p.north)
        for p in result.points
        if p.east is not None and p.north is not None
    }
    drawn = [(i, p) for i, p in enumerate(result.points) if p.name in grid]
    if not drawn:
        return None
    unit = report.length_label(result.length_unit)
    confidence = report.fmt_percent(result.summary.confidence)
    east0 = min(e for e, _ in grid.values())
    north0 = max(n for _, n in grid.values())
    position = {name: (e - east0, north0 - n) for name, (e, n) in grid.items()}
    index_of = {p.name: k for k, (_, p) in enumerate(drawn)}
    width = max(x for x, _ in position.values())
    height = max(y for _, y in position.values())
    view = _view(width, height, NOMINAL_WIDTH_PX, NOMINAL_HEIGHT_PX)
    per_px = view.pop("per_px")

    largest = max((p.ellipse.semi_major for _, p in drawn if p.ellipse is not None), default=0.0)
    if largest > 0:
        factor = exaggeration_at_most(ELLIPSE_SHARE * max(width, height, 1e-9) / largest)
    else:
        factor = EXAGGERATIONS[0]

    if obs_rows is None:
        obs_rows = report.observation_rows(result)
    relative = _relative_detail(result) if details else {}
    pairs = _joined_pairs(result, position)
    lines = []
    for n, (key, record) in enumerate(pairs.items()):
        a, b = record["a"], record["b"]
        (x1, y1), (x2, y2) = position[a], position[b]
        used = bool(record["used"])
        flagged_rows = [obs_rows[k] for k in record["observations"] if obs_rows[k].flagged]
        worst = max(flagged_rows, key=lambda r: abs(r.w_raw or 0.0), default=None)
        kinds = sorted(record["all"])
        lines.append(
            {
                "id": n,
                "a": index_of[a],
                "b": index_of[b],
                "names": [a, b],
                "x1": round(x1, 4),
                "y1": round(y1, 4),
                "x2": round(x2, 4),
                "y2": round(y2, 4),
                "mx": round((x1 + x2) / 2, 4),
                "my": round((y1 + y2) / 2, 4),
                # an ignored-observation mark sits a third of the way along when a flag takes
                # the middle
                "ix": round(x1 + (x2 - x1) * (0.35 if record["flagged"] else 0.5), 4),
                "iy": round(y1 + (y2 - y1) * (0.35 if record["flagged"] else 0.5), 4),
                "kinds": kinds,
                "style": _line_style(record["used"]) if used else "ignored",
                "used": used,
                "has_ignored": record["has_ignored"] and used,
                "flagged": record["flagged"],
                "observations": record["observations"],
                "detail": [_observation_detail(obs_rows[k], unit) for k in record["observations"]]
                if details
                else [],
                "relative": relative.get(key),
                "title": f"{a} – {b}: "
                + ", ".join(kinds)
                + ("" if used else " (not used)")
                + (f"; flagged, line {worst.line} w = {worst.w}" if worst is not None else ""),
                "flag_title": ""
                if worst is None
                else f"Flagged: line {worst.line}, {worst.kind} {worst.stations}, w = {worst.w}",
            }
        )
    # draw unused lines first and flagged ones last, so a flag is never hidden
    lines.sort(key=lambda line: (line["used"], line["flagged"], line["id"]))

    point_rows = report.point_rows(result)
    names = [p.name for _, p in drawn]
    px = [
        ((position[nm][0] - view["x"]) / per_px, (position[nm][1] - view["y"]) / per_px)
        for nm in names
    ]
    labels = _place_labels(names, px, [(line["a"], line["b"]) for line in lines if line["used"]])
    points = []
    for k, (i, p) in enumerate(drawn):
        x, y = position[p.name]
        row = point_rows[i]
        ellipse = None
        if p.ellipse is not None:
            ellipse = {
                "a": p.ellipse.semi_major,
                "b": p.ellipse.semi_minor,
                "azimuth": round(p.ellipse.azimuth, 4),
                "rx": _round_sig(p.ellipse.semi_minor * factor),
                "ry": _round_sig(p.ellipse.semi_major * factor),
            }
        points.append(
            {
                "id": k,
                "index": i,
                "name": p.name,
                "x": round(x, 4),
                "y": round(y, 4),
                "kind": point_kind(p),
                "in_use": p.in_use,
                "label": labels[k],
                "ellipse": ellipse,
                "detail": _point_detail(row, p, unit, confidence) if details else [],
                "title": f"{p.name} ({row.role}): E {row.east}, N {row.north} {unit}",
            }
        )

    map_bar = bar_length(MAP_BAR_PX * per_px)
    ellipse_bar = bar_length(ELLIPSE_BAR_PX * per_px / factor)
    kinds_present = {p["kind"] for p in points}
    styles_present = {line["style"] for line in lines}
    return {
        "unit": unit,
        "confidence": confidence,
        "origin": {"east": east0, "north": north0},
        "extent": {"width": round(width, 4), "height": round(height, 4)},
        "view": view,
        "nominal": {
            "width": NOMINAL_WIDTH_PX,
            "height": NOMINAL_HEIGHT_PX,
            "margin": MARGIN_PX,
            "per_px": _round_sig(per_px),
        },
        "bars": {
            "map_px": MAP_BAR_PX,
            "ellipse_px": ELLIPSE_BAR_PX,
            "lengths": list(BAR_LENGTHS),
            "labels": [length_text(v, result.length_unit) for v in BAR_LENGTHS],
        },
        "map_bar": {
            "length": map_bar,
            "px": round(map_bar / per_px, 2),
            "label": length_text(map_bar, result.length_unit),
        },
        "ellipse_bar": {
            "length": ellipse_bar,
            "px": round(ellipse_bar * factor / per_px, 2),
            "label": length_text(ellipse_bar, result.length_unit),
        },
        "has_ellipses": largest > 0,
        "exaggeration": factor,
        "exaggeration_index": EXAGGERATIONS.index(factor),
        "exaggerations": list(EXAGGERATIONS),
        "exaggeration_labels": [exaggeration_text(f) for f in EXAGGERATIONS],
        "exaggeration_label": exaggeration_text(factor),
        "critical_w": report.fmt_w(result.summary.critical_w),
        "points": points,
        "lines": lines,
        "not_drawn": [p.name for p in result.points if p.east is None or p.north is None],
        "present": {
            "fixed": "fixed" in kinds_present,
            "weighted": "weighted" in kinds_present,
            "free": "free" in kinds_present,
            "unused_point": any(not p["in_use"] for p in points),
            "baseline": "baseline" in styles_present,
            "distance": "distance" in styles_present,
            "sighting": "sighting" in styles_present,
            "height": "height" in styles_present,
            "ignored": "ignored" in styles_present or any(ln["has_ignored"] for ln in lines),
            "flagged": any(line["flagged"] for line in lines),
        },
    }


#: What ``static/plot.js`` reads of the plot: the view, the bars, the exaggeration series.
_SCRIPT_KEYS = (
    "view",
    "nominal",
    "extent",
    "bars",
    "exaggeration_index",
    "exaggerations",
    "exaggeration_labels",
)
#: The figures of an observation in the side panel, in the order of its list in the script data.
OBSERVATION_KEYS = (
    "line",
    "kind",
    "marks",
    "booked",
    "reduction",
    "observed",
    "residual",
    "w",
    "status",
)


def script_data(data: dict[str, Any]) -> dict[str, Any]:
    """The part of the plot the page's script needs: the side panel's figures of each point
    and line, by id.  The geometry, symbols, titles and ellipse axes are in the SVG already,
    so they are not written a second time; an observation's figures are a list in the order
    of ``observation_keys`` and a list of (label, value) rows is its values with the index of
    its labels in ``label_sets``, so no name is repeated for each of thousands of rows."""
    label_sets: dict[tuple[str, ...], int] = {}

    def packed(rows: list[list[str]]) -> list[Any]:
        labels = tuple(label for label, _ in rows)
        return [label_sets.setdefault(labels, len(label_sets)), [value for _, value in rows]]

    points = [
        {"id": p["id"], "name": p["name"], "detail": packed(p["detail"])} for p in data["points"]
    ]
    lines = [
        {
            "id": line["id"],
            "names": line["names"],
            "used": line["used"],
            "detail": [[o[key] for key in OBSERVATION_KEYS] for o in line["detail"]],
            **({"relative": packed(line["relative"])} if line["relative"] else {}),
        }
        for line in data["lines"]
    ]
    return {
        **{key: data[key] for key in _SCRIPT_KEYS},
        "observation_keys": list(OBSERVATION_KEYS),
        "label_sets": [list(labels) for labels in label_sets],
        "points": points,
        "lines": lines,
    }
