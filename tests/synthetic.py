"""Synthetic horizontal networks for tests: true coordinates, exact observations, normal noise.

Invented geometry only; used to check the adjustment against independent
solvers and against the statistics it claims.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from server.units import format_dms


@dataclass
class Synthetic:
    text: str
    truth: dict[str, tuple[float, float]]
    fixed: tuple[str, ...]


def _azimuth(a: tuple[float, float], b: tuple[float, float]) -> float:
    return math.atan2(b[0] - a[0], b[1] - a[1])


def grid_network(
    rng: np.random.Generator,
    *,
    size: int = 4,
    spacing: float = 400.0,
    fixed: tuple[str, ...] | None = None,
    direction_sd_sec: float = 1.0,
    distance_sd_mm: float = 2.0,
    ppm: float = 2.0,
    noise: bool = True,
    angles: bool = True,
    give_approximate: bool = False,
    origin: tuple[float, float] = (512000.0, 184000.0),
    rotation_deg: float = 0.0,
) -> Synthetic:
    """A jittered grid: a direction round and distances at every station, some angles."""
    if fixed is None:  # three corners of the grid
        fixed = ("P0_0", f"P0_{size - 1}", f"P{size - 1}_0")
    rot = math.radians(rotation_deg)
    truth: dict[str, tuple[float, float]] = {}
    for i in range(size):
        for j in range(size):
            x = j * spacing + rng.uniform(-0.2, 0.2) * spacing
            y = i * spacing + rng.uniform(-0.2, 0.2) * spacing
            truth[f"P{i}_{j}"] = (
                origin[0] + x * math.cos(rot) + y * math.sin(rot),
                origin[1] - x * math.sin(rot) + y * math.cos(rot),
            )
    names = list(truth)
    lines = [
        "fieldbook 1",
        "units length=m angle=dms",
        (
            f"defaults direction={direction_sd_sec}sec angle={direction_sd_sec * 1.4:.2f}sec "
            f"distance={distance_sd_mm}mm+{ppm}ppm centering=0mm"
        ),
    ]
    for name in names:
        e, n = truth[name]
        if name in fixed:
            lines.append(f"point {name} east={e:.4f} north={n:.4f} fix")
        elif give_approximate:
            lines.append(
                f"point {name} east={e + rng.normal(0, 0.5):.3f} north={n + rng.normal(0, 0.5):.3f}"
            )
    sd_dir = math.radians(direction_sd_sec / 3600)

    def neighbours(name: str) -> list[str]:
        return [m for m in names if m != name and math.dist(truth[m], truth[name]) < 1.6 * spacing]

    for name in names:
        targets = neighbours(name)
        orientation = rng.uniform(0, 2 * math.pi)
        lines.append(f"directions {name}")
        for t in targets:
            value = _azimuth(truth[name], truth[t]) - orientation
            if noise:
                value += rng.normal(0, sd_dir)
            lines.append(f"  {t} {format_dms(math.degrees(value) % 360.0, 2)}")
        lines.append("end")
        for t in targets:
            if name < t:
                d = math.dist(truth[name], truth[t])
                sd = math.hypot(distance_sd_mm * 1e-3, ppm * 1e-6 * d)
                lines.append(f"distance {name} {t} {d + (rng.normal(0, sd) if noise else 0):.5f}")
        if angles and len(targets) >= 2 and name.endswith("_1"):
            back, fore = targets[0], targets[-1]
            value = _azimuth(truth[name], truth[fore]) - _azimuth(truth[name], truth[back])
            if noise:
                value += rng.normal(0, sd_dir * 1.4)
            lines.append(f"angle {back} {name} {fore} {format_dms(math.degrees(value) % 360.0, 2)}")
    return Synthetic("\n".join(lines) + "\n", truth, fixed)


def leveling_grid(
    rng: np.random.Generator,
    *,
    side: int = 50,
    spacing_km: float = 0.3,
    sd_mm_per_sqrtkm: float = 1.0,
) -> str:
    """A ``side`` × ``side`` grid of marks joined by level runs along rows and columns.

    Four corner benchmarks are held fixed; heights are a gentle random surface and
    every height difference carries normal noise at its a priori standard deviation.
    Large networks (thousands of marks) for load and crash tests.
    """
    heights = 100.0 + np.cumsum(rng.normal(0.0, 0.4, size=(side, side)), axis=1)
    corners = {(0, 0), (0, side - 1), (side - 1, 0), (side - 1, side - 1)}
    lines = [
        "fieldbook 1",
        f'title "Synthetic leveling grid {side} x {side}"',
        f"defaults level={sd_mm_per_sqrtkm}mm/sqrtkm",
    ]
    for i, j in sorted(corners):
        lines.append(f"point G{i}_{j} height={heights[i, j]:.5f} fix")
    sd_m = sd_mm_per_sqrtkm * 1e-3 * math.sqrt(spacing_km)
    for i in range(side):
        for j in range(side):
            for di, dj in ((0, 1), (1, 0)):
                k, m = i + di, j + dj
                if k < side and m < side:
                    dh = heights[k, m] - heights[i, j] + rng.normal(0.0, sd_m)
                    lines.append(f"level G{i}_{j} G{k}_{m} {dh:+.5f} len={spacing_km}km")
    return "\n".join(lines) + "\n"
