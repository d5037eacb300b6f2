"""Synthetic field books for the benchmark: invented networks of a chosen size.

Two families, both written as ordinary field book text with normally
distributed observation errors of exactly the a priori standard deviations:

* ``leveling(marks)``: a regional leveling network.  Junction benchmarks on a
  square grid about 10 km apart are joined by level lines along the grid,
  each line a chain of marks about 1 km apart (sections with ``len=``), so
  the network is a mesh of loops of roughly 40 km; one junction in 25 is held
  fixed, which also gives runs between fixed benchmarks.
* ``horizontal(points)``: a triangulated control network.  Points on a
  jittered square grid 300 m apart; every point carries a directions round
  to its six triangle neighbours and distances along the triangle edges
  (each measured once); a sparse set of points (one in 400, at least four)
  is held fixed.

The generators are deterministic for a given seed.
"""

from __future__ import annotations

import math

import numpy as np

LEVEL_SD_MM_PER_SQRTKM = 1.0
DIRECTION_SD_SEC = 1.0
DISTANCE_SD = (2.0, 2.0)  # mm, ppm


def leveling(marks: int, *, seed: int = 1, section_km: float = 1.0, per_line: int = 9) -> str:
    """A leveling network of about ``marks`` marks (junctions plus line marks)."""
    rng = np.random.default_rng(seed)
    junctions = max(2, round(math.sqrt(marks / (2 * per_line + 1))))
    names: dict[tuple[int, int], str] = {}
    heights: dict[str, float] = {}

    def height_at(x_km: float, y_km: float) -> float:
        return 200.0 + 80.0 * math.sin(x_km / 37.0) * math.cos(y_km / 23.0) + 0.4 * x_km

    lines = [
        "fieldbook 1",
        f'title "benchmark leveling, {marks} marks"',
        "units length=m",
        "tolerance misclosure=4mm/sqrtkm",
        f"defaults level={LEVEL_SD_MM_PER_SQRTKM}mm/sqrtkm",
    ]
    spacing = section_km * (per_line + 1)
    for i in range(junctions):
        for j in range(junctions):
            name = f"J{i}_{j}"
            names[(i, j)] = name
            heights[name] = height_at(j * spacing, i * spacing)
            if i % 5 == 0 and j % 5 == 0:
                lines.append(f"point {name} height={heights[name]:.5f} fix")
    sd_km = LEVEL_SD_MM_PER_SQRTKM * 1e-3

    def run_line(
        start: str, end: str, x0: float, y0: float, dx: float, dy: float, label: str
    ) -> None:
        previous = start
        for k in range(1, per_line + 2):
            if k <= per_line:
                mark = f"{label}_{k}"
                x, y = x0 + dx * k, y0 + dy * k
                heights[mark] = height_at(x, y) + rng.normal(0.0, 0.5)
            else:
                mark = end
            length = section_km * rng.uniform(0.7, 1.3)
            dh = heights[mark] - heights[previous] + rng.normal(0.0, sd_km * math.sqrt(length))
            lines.append(f"level {previous} {mark} {dh:+.5f} len={length:.3f}km")
            previous = mark

    for i in range(junctions):
        for j in range(junctions):
            x, y = j * spacing, i * spacing
            if j + 1 < junctions:
                run_line(names[(i, j)], names[(i, j + 1)], x, y, section_km, 0.0, f"E{i}_{j}")
            if i + 1 < junctions:
                run_line(names[(i, j)], names[(i + 1, j)], x, y, 0.0, section_km, f"N{i}_{j}")
    return "\n".join(lines) + "\n"


def horizontal(
    points: int,
    *,
    seed: int = 1,
    spacing: float = 300.0,
    fixed_every: int = 400,
    sparse: bool = False,
    planned: bool = False,
) -> str:
    """A triangulated 2D network of about ``points`` points.

    ``sparse``: a lighter survey, as in an everyday project: rounds to the four
    grid neighbours and distances along the grid, about six observations per point.
    ``planned``: a design book instead: every value ``?`` and every point on a ``point``
    line with its approximate coordinates (``plan``).
    """
    rng = np.random.default_rng(seed)
    size = max(3, round(math.sqrt(points)))
    east = (np.arange(size)[None, :] + rng.uniform(-0.2, 0.2, (size, size))) * spacing + 500000.0
    north = (np.arange(size)[:, None] + rng.uniform(-0.2, 0.2, (size, size))) * spacing + 200000.0
    name = [[f"P{i}_{j}" for j in range(size)] for i in range(size)]
    lines = [
        "fieldbook 1",
        f'title "benchmark horizontal network, {size * size} points"',
        "units length=m angle=dms",
        "tolerance relative=2cm+50ppm",
        (
            f"defaults direction={DIRECTION_SD_SEC}sec "
            f"distance={DISTANCE_SD[0]}mm+{DISTANCE_SD[1]}ppm centering=0mm"
        ),
    ]
    # held points: a regular sprinkle, always including the four corners
    step = max(2, round(math.sqrt(fixed_every)))
    held = {(i, j) for i in range(0, size, step) for j in range(0, size, step)}
    held |= {(0, 0), (0, size - 1), (size - 1, 0), (size - 1, size - 1)}
    for i, j in sorted(held):
        lines.append(f"point {name[i][j]} east={east[i, j]:.4f} north={north[i, j]:.4f} fix")
    if planned:
        lines += [
            f"point {name[i][j]} east={east[i, j]:.2f} north={north[i, j]:.2f}"
            for i in range(size)
            for j in range(size)
            if (i, j) not in held
        ]
    offsets = ((0, 1), (1, 0), (1, 1), (0, -1), (-1, 0), (-1, -1))
    if sparse:
        offsets = ((0, 1), (1, 0), (0, -1), (-1, 0))
    sd_dir = math.radians(DIRECTION_SD_SEC / 3600.0)
    for i in range(size):
        for j in range(size):
            targets = [
                (i + di, j + dj) for di, dj in offsets if 0 <= i + di < size and 0 <= j + dj < size
            ]
            orientation = rng.uniform(0.0, 2.0 * math.pi)
            lines.append(f"directions {name[i][j]}")
            for ti, tj in targets:
                azimuth = math.atan2(east[ti, tj] - east[i, j], north[ti, tj] - north[i, j])
                value = math.degrees(azimuth - orientation + rng.normal(0.0, sd_dir)) % 360.0
                lines.append(f"  {name[ti][tj]} {'?' if planned else _dms(value)}")
            lines.append("end")
            for ti, tj in targets:
                if (ti, tj) < (i, j):
                    continue  # each triangle edge measured once, from its lower end
                d = math.hypot(east[ti, tj] - east[i, j], north[ti, tj] - north[i, j])
                sd = math.hypot(DISTANCE_SD[0] * 1e-3, DISTANCE_SD[1] * 1e-6 * d)
                booked = "?" if planned else f"{d + rng.normal(0.0, sd):.4f}"
                lines.append(f"distance {name[i][j]} {name[ti][tj]} {booked}")
    return "\n".join(lines) + "\n"


def _dms(degrees: float) -> str:
    """D:MM:SS.ss with the seconds rounded and carried."""
    total = round(degrees * 360000.0)
    whole, hundredths = divmod(total, 100)
    minutes, seconds = divmod(whole, 60)
    d, m = divmod(minutes, 60)
    return f"{d % 360}:{m:02d}:{seconds:02d}.{hundredths:02d}"


def geodetic(points: int, *, seed: int = 1, spacing: float = 250.0) -> str:
    """A 3D control network on a site grid: GNSS baselines and total-station rounds.

    Points on a jittered square grid ``spacing`` apart, heights on a smooth hill (60 to
    160 m), geoid undulation −23.84 m.  Every point is a setup: a directions round to its
    four grid neighbours with a slope distance and a zenith angle to each (instrument and
    target heights of about 1.5 m and 1.8 m, refraction k = 0.13).  One point in 225 (every
    15th row and column, at least four) is held fixed; in every third row, pairs of
    neighbours (two columns in three) have GNSS baselines from the nearest held point, so
    that each such pair gives its rounds a known backsight.  The observations are
    computed from the true latitudes, longitudes and heights with PROJ's ``cart`` and the
    local axes of the ellipsoid normal, with normal errors of their standard deviations.
    """
    import pyproj

    rng = np.random.default_rng(seed)
    side = max(2, math.ceil(math.sqrt(points)))
    cells = [(i, j) for i in range(side) for j in range(side)][:points]
    name = {cell: f"G{cell[0]}_{cell[1]}" for cell in cells}
    held = [c for c in cells if c[0] % 15 == 0 and c[1] % 15 == 0]
    for corner in ((0, 0), (0, side - 1), (side - 1, 0), cells[-1]):
        if corner in name and corner not in held:
            held.append(corner)
    x = np.array([c[1] * spacing + rng.uniform(-0.15, 0.15) * spacing for c in cells])
    y = np.array([c[0] * spacing + rng.uniform(-0.15, 0.15) * spacing for c in cells])
    x -= x.mean()
    y -= y.mean()
    height = 110.0 + 50.0 * np.sin(x / 1700.0) * np.cos(y / 2300.0)
    undulation = -23.84
    site = "+proj=tmerc +lat_0=47.05 +lon_0=-122.9 +k=1 +x_0=20000 +y_0=20000 +ellps=GRS80"
    east, north = x + 20000.0, y + 20000.0
    inverse = pyproj.Transformer.from_pipeline(
        f"+proj=pipeline +step +inv {site} +step +proj=unitconvert +xy_in=rad +xy_out=deg"
    )
    lon, lat = inverse.transform(east, north)
    cart = pyproj.Transformer.from_pipeline("+proj=cart +ellps=GRS80")
    h = height + undulation

    def xyz(lift: np.ndarray | float = 0.0) -> np.ndarray:
        return np.stack(cart.transform(lon, lat, h + lift), axis=1)

    phi, lam = np.radians(lat), np.radians(lon)
    axes_e = np.stack([-np.sin(lam), np.cos(lam), np.zeros_like(lam)], axis=1)
    axes_n = np.stack([-np.sin(phi) * np.cos(lam), -np.sin(phi) * np.sin(lam), np.cos(phi)], 1)
    axes_u = np.stack([np.cos(phi) * np.cos(lam), np.cos(phi) * np.sin(lam), np.sin(phi)], 1)
    marks = xyz()
    index = {cell: k for k, cell in enumerate(cells)}

    lines = [
        "fieldbook 1",
        f'title "Synthetic 3D control, {len(cells)} marks"',
        "units length=m angle=dms",
        "crs local lat=47:03:00 lon=-122:54:00 east=20000m north=20000m",
        f"geoid undulation={undulation}m",
        "refraction k=0.13",
        "defaults slope=1mm+1.5ppm zenith=1sec direction=1sec baseline=3mm centering=0mm",
    ]
    for cell in held:
        k = index[cell]
        lines.append(
            f"point {name[cell]} east={east[k]:.4f} north={north[k]:.4f} height={height[k]:.4f} fix"
        )
    sec = math.pi / 180.0 / 3600.0
    for cell in cells:
        i = index[cell]
        neighbours = [
            index[n]
            for n in (
                (cell[0], cell[1] + 1),
                (cell[0] + 1, cell[1]),
                (cell[0], cell[1] - 1),
                (cell[0] - 1, cell[1]),
            )
            if n in index
        ]
        j = np.array(neighbours)
        hi = round(1.45 + 0.1 * rng.random(), 3)
        ht = 1.8
        d = marks[j] - marks[i]
        azimuth = np.arctan2(d @ axes_e[i], d @ axes_n[i])
        orientation = rng.uniform(0, 2 * math.pi)
        sight = marks[j] + ht * axes_u[j] - marks[i] - hi * axes_u[i]
        slope = np.linalg.norm(sight, axis=1)
        zenith = np.arccos(sight @ axes_u[i] / slope) - 0.13 * slope / (2 * 6_371_000.0)
        lines.append(f"directions {name[cell]}")
        for k, a in zip(j, azimuth):
            value = (a - orientation + rng.normal(0, DIRECTION_SD_SEC * sec)) % (2 * math.pi)
            lines.append(f"  {name[cells[k]]} {_dms_of_radians(value)}")
        lines.append("end")
        for k, s, z in zip(j, slope, zenith):
            sd_s = math.hypot(0.001, 1.5e-6 * s)
            lines.append(
                f"slope {name[cell]} {name[cells[k]]} {s + rng.normal(0, sd_s):.5f} "
                f"hi={hi}m ht={ht}m"
            )
            lines.append(
                f"zenith {name[cell]} {name[cells[k]]} "
                f"{_dms_of_radians(z + rng.normal(0, sec))} hi={hi}m ht={ht}m"
            )
    held_index = np.array([index[c] for c in held])
    for cell in cells:
        if cell[0] % 3 or cell[1] % 3 > 1 or cell in held:
            continue
        k = index[cell]
        base = held_index[np.argmin(np.linalg.norm(marks[held_index] - marks[k], axis=1))]
        vector = marks[k] - marks[base] + rng.normal(0, 0.003, 3)
        lines.append(
            f"baseline {name[cells[base]]} {name[cell]} " + " ".join(f"{c:+.4f}" for c in vector)
        )
    return "\n".join(lines) + "\n"


def _dms_of_radians(radians: float) -> str:
    """D:M:S to 0.01″, carried so that the seconds never read 60."""
    hundredths = round(math.degrees(radians) * 360000.0)
    degrees, rest = divmod(hundredths, 360000)
    minutes, rest = divmod(rest, 6000)
    return f"{degrees}:{minutes:02d}:{rest / 100:05.2f}"
