"""Approximate (start) coordinates for the unknown points.

Heights are carried along the leveling from every point whose height is
known.  Horizontal positions are given or computed by ``horizontal_start``
(polar ties, intersections, resections).  A point that cannot be reached is
named in a ``NetworkError``: a surveyor never types approximate values.
"""

from __future__ import annotations

import math
from collections import deque

from server.errors import NetworkError
from server.model.network import Network

NAN = math.nan


def approximate_coordinates(network: Network) -> dict[str, tuple[float, float, float]]:
    """Start values (east, north, height) in metres for every point, NaN where not needed."""
    coords = {
        p.name: (
            p.east if p.east is not None else NAN,
            p.north if p.north is not None else NAN,
            p.height if p.height is not None else NAN,
        )
        for p in network.points
    }
    heights = _start_heights(network, {n: c[2] for n, c in coords.items()})
    for name, height in heights.items():
        e, n, _ = coords[name]
        coords[name] = (e, n, height)
    if network.horizontal:
        from server.model.horizontal_start import start_positions

        positions = start_positions(network, {n: (c[0], c[1]) for n, c in coords.items()})
        for name, (east, north) in positions.items():
            coords[name] = (east, north, coords[name][2])
    return coords


def _start_heights(network: Network, heights: dict[str, float]) -> dict[str, float]:
    """Carry heights along the used level observations, breadth first from known heights."""
    edges: dict[str, list[tuple[str, float]]] = {}
    for obs in network.used:
        if obs.kind == "level":
            edges.setdefault(obs.from_point, []).append((obs.to, obs.value))
            edges.setdefault(obs.to, []).append((obs.from_point, -obs.value))
    known = {name: h for name, h in heights.items() if not math.isnan(h)}
    queue = deque(name for name in edges if name in known)
    while queue:
        name = queue.popleft()
        for other, rise in edges[name]:
            if other not in known:
                known[other] = known[name] + rise
                queue.append(other)
    missing = sorted(name for name in edges if name not in known)
    if missing:
        raise NetworkError(
            "no height can be carried to these points from any point with a known height: "
            + ", ".join(missing[:12]),
            missing,
        )
    return {name: known[name] for name in edges}
